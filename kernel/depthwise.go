package kernel

import (
	"fmt"
	"math"
)

// Depthwise computes a depthwise convolution (ONNX Conv with group equal
// to the input channel count C): each input channel c is convolved with
// its own multiplier filters, giving output channels c·multiplier …
// (c+1)·multiplier−1. src is C×H×W, w is (C·multiplier)×KH×KW (ONNX's
// M×1×KH×KW weight layout as is), dst is (C·multiplier)×OH×OW and is
// overwritten.
//
// A depthwise filter has K = KH·KW ≤ 49 taps, so lowering it to a GEMM
// gives matrices too thin for the packed kernels to pay back the im2col
// copy. Instead each input plane is first copied into a zero-padded
// scratch plane (a few tens of KiB, cache resident), after which every
// output row is the same branch-free loop over all its columns: the
// padding costs one copy per plane instead of bounds bookkeeping per row
// and tap, which dominated the previous row-wise loops at MobileNet's
// 7–28-wide planes. See DepthwiseFused.
func (p *Im2colPlan) Depthwise(dst, src, w []float32, multiplier int) error {
	return p.DepthwiseRange(dst, src, w, multiplier, 0, p.g.C*multiplier)
}

// DepthwiseRange is Depthwise restricted to output channels [m0, m1), so
// callers can split the channels over goroutines; the other output
// channels are not touched. It allocates its scratch plane; repeated
// callers use DepthwiseFused with their own.
func (p *Im2colPlan) DepthwiseRange(dst, src, w []float32, multiplier, m0, m1 int) error {
	return p.DepthwiseFused(dst, src, w, multiplier, m0, m1, nil, make([]float32, p.DepthwiseScratch()))
}

// DepthwiseEpilogue is applied to every depthwise output value as the
// kernel writes it, so the output is written once:
//
//	v = min(Hi, max(Lo, v + Bias[m]))
//
// for output channel m (Bias indexed like dst's channels; nil adds
// nothing). Lo = −Inf, Hi = +Inf is no activation, Lo = 0, Hi = +Inf is
// ReLU, and finite bounds are Clip (ReLU6: 0, 6). A NaN v stays NaN, as
// Go's min and max keep it.
type DepthwiseEpilogue struct {
	Bias   []float32
	Lo, Hi float32
}

// Unclamped returns an epilogue that adds bias (which may be nil) and
// clamps nothing.
func Unclamped(bias []float32) DepthwiseEpilogue {
	return DepthwiseEpilogue{Bias: bias, Lo: float32(math.Inf(-1)), Hi: float32(math.Inf(1))}
}

// dwSlack is how many floats past the last padded row the scratch holds:
// the vector kernels load whole vectors past a row's end (up to a vector
// plus the odd half of a phased row), and the lanes that read them are
// masked off at the store.
const dwSlack = 128

// dwLayout is the zero-padded scratch plane of one input channel: padded
// row r, column c holds the image value at (r − top, c − left), or zero.
// It has exactly the rows and columns the output reads, so an output
// (oh, ow) at tap (kh, kw) reads padded (oh·sh + kh·dh, ow·sw + kw·dw).
//
// A phased layout (horizontal stride 2 on the vector kernels) stores each
// padded row de-interleaved: its even columns, then half floats on its
// odd ones, so padded column c is at (c mod 2)·half + ⌊c/2⌋ and the
// stride-2 taps become unit-stride vector loads. The copy de-interleaves
// once per input value; gathering even lanes per tap instead (a permute
// per tap and vector, tried first) ran stride 2 at a third of stride 1's
// rate per multiply-add.
type dwLayout struct {
	rows, pitch int
	top, left   int
	h, w        int // image size
	phased      bool
	half        int // phased: floats of the even half of a row
}

func (l dwLayout) size() int { return l.rows*l.pitch + dwSlack }

// clearPad zeroes every cell of the padded plane that fill does not
// write (the padding, any image-free rows, the slack). fill never writes
// them, so they stay zero from one channel to the next: one clearPad per
// call, one fill per channel, and no full clear of an unphased plane.
func (l dwLayout) clearPad(scr []float32) {
	scr = scr[:l.size()]
	if l.phased {
		clear(scr)
		return
	}
	top := min(l.top, l.rows)
	nr := max(0, min(l.h, l.rows-top))
	left := min(l.left, l.pitch)
	right := min(l.left+max(0, min(l.w, l.pitch-l.left)), l.pitch)
	clear(scr[:top*l.pitch])
	for i := top; i < top+nr; i++ {
		row := scr[i*l.pitch : (i+1)*l.pitch]
		clear(row[:left])
		clear(row[right:])
	}
	clear(scr[(top+nr)*l.pitch:])
}

// fill copies an h×w image plane into its place in the padded plane (see
// clearPad), with the vector copy loops unless isa is ISAPortable.
func (l dwLayout) fill(isa ISA, scr, plane []float32) {
	f := l.filler(isa, 0, l.h)
	f.fill(scr, plane)
}

// dwTailMasks gives the AVX2 kernels their partial-vector store masks:
// &dwTailMasks[8-t] is 8 lane masks with the first t lanes set.
var dwTailMasks = [16]int32{-1, -1, -1, -1, -1, -1, -1, -1}

// dwFiller copies image rows [r0, r0+nr) of planes into a padded plane
// of layout l, its offsets and the vector copy's masks worked out once
// for a run of planes (filler): on 7×7 planes that setup, per plane,
// took about a third as long as the copy.
type dwFiller struct {
	l           dwLayout
	isa         ISA // ISAAVX512, ISAAVX2, or ISAPortable for the Go loop
	r0, nr, nc  int
	dst, ev, od int // where row r0 goes in the scratch: unphased, even and odd halves
	mask        int // AVX-512: the tail, or the phased load|even<<16|odd<<32 masks
	m1, m2, m3  *int32
}

// filler works out the copy of image rows [r0, r1) for isa.
func (l dwLayout) filler(isa ISA, r0, r1 int) dwFiller {
	r1 = min(r1, l.h, l.rows-l.top)
	width := l.pitch
	if l.phased {
		width = 2 * l.half
	}
	f := dwFiller{l: l, isa: ISAPortable, r0: r0, nr: r1 - r0, nc: min(l.w, width-l.left)}
	if f.nr <= 0 || f.nc <= 0 {
		f.nr = 0
		return f
	}
	row0 := (r0 + l.top) * l.pitch
	f.dst = row0 + l.left
	// Image column j is padded column left + j: the even j go to the
	// half of left's parity, the odd j to the other.
	f.ev = row0 + (l.left&1)*l.half + l.left>>1
	f.od = row0 + ((l.left+1)&1)*l.half + (l.left+1)>>1
	if isa == ISAPortable {
		return f
	}
	vis, width := dwResolve(isa)
	if width == 0 {
		return f
	}
	f.isa = vis
	f.mask, f.m1, f.m2, f.m3 = dwCopyMasks(vis, f.nc%width, l.phased)
	return f
}

// dwCopyMasks returns the tail masks of the vector copy of rows whose
// last vector holds r floats, on path vis: for AVX-512 a k-register
// value (phased: the load's mask, the even half's <<16 and the odd
// half's <<32), for AVX2 the lane masks in dwTailMasks (load; phased:
// also even, odd).
func dwCopyMasks(vis ISA, r int, phased bool) (mask int, m1, m2, m3 *int32) {
	re, ro := (r+1)/2, r/2
	switch {
	case vis == ISAAVX512 && !phased:
		return 1<<r - 1, nil, nil, nil
	case vis == ISAAVX512:
		return (1<<r - 1) | (1<<re-1)<<16 | (1<<ro-1)<<32, nil, nil, nil
	case !phased:
		return 0, &dwTailMasks[8-r], nil, nil
	}
	return 0, &dwTailMasks[8-r], &dwTailMasks[8-re], &dwTailMasks[8-ro]
}

// fill copies the rows of one image plane (all h·w values of it; only
// rows [r0, r0+nr) are read) into scr.
func (f *dwFiller) fill(scr, plane []float32) {
	if f.nr == 0 {
		return
	}
	l, nr, nc := &f.l, f.nr, f.nc
	plane = plane[f.r0*l.w : f.r0*l.w+(nr-1)*l.w+nc]
	if !l.phased {
		dst := scr[f.dst : f.dst+(nr-1)*l.pitch+nc]
		switch f.isa {
		case ISAAVX512:
			dwFillAVX512(&dst[0], &plane[0], nr, nc, 4*l.pitch, 4*l.w, f.mask)
		case ISAAVX2:
			dwFillAVX2(&dst[0], &plane[0], nr, nc, 4*l.pitch, 4*l.w, f.m1)
		default:
			for i := 0; i < nr; i++ {
				copy(dst[i*l.pitch:i*l.pitch+nc], plane[i*l.w:i*l.w+nc])
			}
		}
		return
	}
	ne, no := (nc+1)/2, nc/2
	ev := scr[f.ev : f.ev+(nr-1)*l.pitch+ne]
	od := scr[f.od : f.od+(nr-1)*l.pitch+max(no, 1)]
	switch f.isa {
	case ISAAVX512:
		dwFillPhasedAVX512(&ev[0], &od[0], &plane[0], nr, nc, 4*l.pitch, 4*l.w, f.mask)
		return
	case ISAAVX2:
		dwFillPhasedAVX2(&ev[0], &od[0], &plane[0], nr, nc, 4*l.pitch, 4*l.w, f.m1, f.m2, f.m3)
		return
	}
	for i := 0; i < nr; i++ {
		src := plane[i*l.w : i*l.w+nc]
		e, o := ev[i*l.pitch:], od[i*l.pitch:]
		for j, v := range src {
			if j&1 == 0 {
				e[j>>1] = v
			} else {
				o[j>>1] = v
			}
		}
	}
}

// dwArgs is the geometry one plane kernel sees: a KH×KW filter with
// strides and dilations over a padded plane pitch floats wide, giving
// oh×ow outputs; q is the offset of the odd half of a phased row (0 when
// not phased).
type dwArgs struct {
	kh, kw, sh, sw, dh, dw int
	oh, ow, pitch          int
	q                      int
}

// colOff is where, relative to its padded row and output column 0, tap
// column kw reads, and colStep how far it moves per output column.
func (a *dwArgs) colOff(kw int) int {
	if a.q != 0 {
		return (kw&1)*a.q + kw>>1
	}
	return kw * a.dw
}

func (a *dwArgs) colStep() int {
	if a.q != 0 {
		return 1
	}
	return a.sw
}

// forwardLayout is the padded plane of the forward pass, phased when the
// vector kernels of isa will run it at horizontal stride 2.
func (p *Im2colPlan) forwardLayout(isa ISA) (dwLayout, dwArgs) {
	g := p.g
	l := dwLayout{
		rows:  (p.oh-1)*g.StrideH + (g.KH-1)*g.DilationH + 1,
		pitch: (p.ow-1)*g.StrideW + (g.KW-1)*g.DilationW + 1,
		top:   g.PadTop, left: g.PadLeft, h: g.H, w: g.W,
	}
	a := dwArgs{g.KH, g.KW, g.StrideH, g.StrideW, g.DilationH, g.DilationW, p.oh, p.ow, l.pitch, 0}
	if g.StrideW == 2 && isa != ISAPortable && dwVectorShape(isa, &a) {
		l.phased = true
		l.half = (l.pitch + 1) / 2
		l.pitch = 2 * l.half
		a.pitch, a.q = l.pitch, l.half
	}
	return l, a
}

// DepthwiseScratch returns how many floats of scratch DepthwiseFused
// needs.
func (p *Im2colPlan) DepthwiseScratch() int {
	l, _ := p.forwardLayout(ISAPortable)
	lp := l
	if lp.pitch%2 == 1 { // a phased plane rounds the row up to even
		lp.pitch++
	}
	return max(l.size(), lp.size())
}

// DepthwiseFused is DepthwiseRange with the epilogue ep (nil for none)
// applied as each output row is written, and caller-owned scratch of at
// least DepthwiseScratch() floats (its contents are ignored), so a caller
// running many planes allocates nothing.
//
// Each input plane is copied once into the zero-padded scratch plane and
// each output plane is then one kernel call: on amd64 with AVX-512F or
// AVX2+FMA, 3×3 and 5×5 filters at stride 1 and 2 (the depthwise shapes
// of MobileNetV2/V3 and EfficientNet) run generated vector kernels that
// keep the filter, bias and bounds in registers and store each output
// vector once (partial vectors under a mask); every other shape, and
// every shape off amd64 or on a plan from PortableLoops, runs the
// pure-Go loop over the (unphased) layout. Measured per CPU second on the
// shared 2-core Zen machine (BenchmarkDepthwiseFused): 40–55 GFLOP/s for
// 3×3 stride 1 on 56–112-wide planes, about half that at stride 2 and on
// 14-wide planes, 10–15 on 7-wide ones (one partial vector per row);
// the pure-Go loop runs 1–2.
func (p *Im2colPlan) DepthwiseFused(dst, src, w []float32, multiplier, m0, m1 int, ep *DepthwiseEpilogue, scratch []float32) error {
	isa := ISAAuto
	if p.portable {
		isa = ISAPortable
	}
	return p.depthwiseFused(isa, dst, src, w, multiplier, m0, m1, ep, scratch)
}

func (p *Im2colPlan) depthwiseFused(isa ISA, dst, src, w []float32, multiplier, m0, m1 int, ep *DepthwiseEpilogue, scratch []float32) error {
	if err := p.checkDepthwise(dst, src, w, multiplier, m0, m1, true); err != nil {
		return err
	}
	if ep != nil && ep.Bias != nil && len(ep.Bias) < m1 {
		return fmt.Errorf("kernel: depthwise bias has %d values, want at least %d", len(ep.Bias), m1)
	}
	l, a := p.forwardLayout(isa)
	if len(scratch) < l.size() {
		return fmt.Errorf("kernel: depthwise scratch has %d values, want %d", len(scratch), l.size())
	}
	scr := scratch[:l.size()]
	l.clearPad(scr)
	hw, ohw, taps := p.g.H*p.g.W, p.oh*p.ow, p.g.KH*p.g.KW
	par := dwParams(ep)
	planes := newDwPlanes(isa, &a)
	fill := l.filler(isa, 0, l.h)
	last := -1
	for mo := m0; mo < m1; mo++ {
		if ch := mo / multiplier; ch != last {
			fill.fill(scr, src[ch*hw:(ch+1)*hw])
			last = ch
		}
		if ep != nil && ep.Bias != nil {
			par[0] = ep.Bias[mo]
		}
		planes.plane(dst[mo*ohw:(mo+1)*ohw], scr, w[mo*taps:(mo+1)*taps], &par, false)
	}
	return nil
}

// dwParams is the {bias, lo, hi} triple the kernels take, bias still 0.
func dwParams(ep *DepthwiseEpilogue) [3]float32 {
	par := [3]float32{0, float32(math.Inf(-1)), float32(math.Inf(1))}
	if ep != nil {
		par[1], par[2] = ep.Lo, ep.Hi
	}
	return par
}

// DepthwisePlanes is DepthwiseFused over whole N×C×H×W tensors for a plan
// made for one channel (Geometry().C == 1), as a convolution operator
// holds it: it computes input planes [p0, p1) of the flattened (image,
// channel) index, plane pl being channel pl mod channels. Plane pl reads
// src[pl·H·W:] and writes its multiplier output planes from
// dst[pl·multiplier·OH·OW:]; output channel m = (pl mod channels)·
// multiplier + j takes filter w[m·KH·KW:] and ep.Bias[m]. The scratch
// padding is cleared once per call, so a goroutine should hand it a run
// of planes, not one at a time.
func (p *Im2colPlan) DepthwisePlanes(dst, src, w []float32, channels, multiplier, p0, p1 int, ep *DepthwiseEpilogue, scratch []float32) error {
	isa := ISAAuto
	if p.portable {
		isa = ISAPortable
	}
	return p.depthwisePlanes(isa, dst, src, w, channels, multiplier, p0, p1, 0, p.oh, ep, scratch)
}

// DepthwiseRows is DepthwisePlanes for output rows [oy0, oy1) of every
// plane: only the input rows those outputs read are copied into the
// scratch plane, and the other output rows are not touched. A caller that
// splits a layer by rows over goroutines has each read and write its own
// band of every plane (and the few rows the filter reaches beyond it),
// where a split by planes has each goroutine read the whole map of its
// planes. Every output value is computed as DepthwisePlanes computes it.
func (p *Im2colPlan) DepthwiseRows(dst, src, w []float32, channels, multiplier, p0, p1, oy0, oy1 int, ep *DepthwiseEpilogue, scratch []float32) error {
	isa := ISAAuto
	if p.portable {
		isa = ISAPortable
	}
	return p.depthwisePlanes(isa, dst, src, w, channels, multiplier, p0, p1, oy0, oy1, ep, scratch)
}

func (p *Im2colPlan) depthwisePlanes(isa ISA, dst, src, w []float32, channels, multiplier, p0, p1, oy0, oy1 int, ep *DepthwiseEpilogue, scratch []float32) error {
	g := p.g
	hw, ohw, taps := g.H*g.W, p.oh*p.ow, g.KH*g.KW
	m := channels * multiplier
	switch {
	case oy0 < 0 || oy0 > oy1 || oy1 > p.oh:
		return fmt.Errorf("kernel: depthwise output rows [%d, %d) outside [0, %d)", oy0, oy1, p.oh)
	case g.C != 1:
		return fmt.Errorf("kernel: depthwise planes need a one-channel plan, got C=%d", g.C)
	case channels <= 0 || multiplier <= 0:
		return fmt.Errorf("kernel: depthwise planes: %d channels, multiplier %d must be positive", channels, multiplier)
	case p0 < 0 || p0 > p1:
		return fmt.Errorf("kernel: depthwise plane range [%d, %d) is invalid", p0, p1)
	case len(src) < p1*hw:
		return fmt.Errorf("kernel: depthwise input has %d values, want %d planes of %d", len(src), p1, hw)
	case len(dst) < p1*multiplier*ohw:
		return fmt.Errorf("kernel: depthwise output has %d values, want %d planes of %d", len(dst), p1*multiplier, ohw)
	case len(w) < m*taps:
		return fmt.Errorf("kernel: depthwise weights have %d values, want %d (%d×%d×%d)", len(w), m*taps, m, g.KH, g.KW)
	case ep != nil && ep.Bias != nil && len(ep.Bias) < m:
		return fmt.Errorf("kernel: depthwise bias has %d values, want %d", len(ep.Bias), m)
	}
	l, a := p.forwardLayout(isa)
	if len(scratch) < l.size() {
		return fmt.Errorf("kernel: depthwise scratch has %d values, want %d", len(scratch), l.size())
	}
	scr := scratch[:l.size()]
	l.clearPad(scr)
	par := dwParams(ep)
	// Padded rows [pr0, pr1) hold what output rows [oy0, oy1) read.
	pr0 := oy0 * g.StrideH
	pr1 := (oy1-1)*g.StrideH + (g.KH-1)*g.DilationH + 1
	band := scr[pr0*l.pitch:]
	a.oh = oy1 - oy0
	planes := newDwPlanes(isa, &a)
	fill := l.filler(isa, max(0, pr0-l.top), pr1-l.top)
	for pl := p0; pl < p1; pl++ {
		if a.oh == 0 {
			break
		}
		fill.fill(scr, src[pl*hw:(pl+1)*hw])
		for j := 0; j < multiplier; j++ {
			mo := (pl%channels)*multiplier + j
			out := dst[(pl*multiplier+j)*ohw+oy0*p.ow : (pl*multiplier+j)*ohw+oy1*p.ow]
			if ep != nil && ep.Bias != nil {
				par[0] = ep.Bias[mo]
			}
			planes.plane(out, band, w[mo*taps:(mo+1)*taps], &par, false)
		}
	}
	return nil
}

// dwPlanes computes output planes of one shape a from padded planes: with
// the vector kernel for isa when there is one for the shape (its setup,
// dwVec, worked out once when the dwPlanes is made), else in Go.
type dwPlanes struct {
	a   *dwArgs
	vec dwVec
	ok  bool
}

func newDwPlanes(isa ISA, a *dwArgs) dwPlanes {
	d := dwPlanes{a: a}
	if isa != ISAPortable {
		d.vec, d.ok = dwPrepare(isa, a)
	}
	return d
}

// plane computes one output plane. par is {bias, lo, hi}; with accum the
// output is added to instead of starting from the bias.
func (d *dwPlanes) plane(out, scr, filt []float32, par *[3]float32, accum bool) {
	if d.ok && d.vec.plane(d.a, out, scr, filt, par, accum) {
		return
	}
	dwPlaneGo(d.a, out, scr, filt, par, accum)
}

// dwPlaneGo is the pure-Go plane loop: tap by tap, each output row gets a
// scaled input row added (unit-stride rows are contiguous loops the
// compiler keeps free of bounds checks), then the clamp.
func dwPlaneGo(a *dwArgs, out, scr, filt []float32, par *[3]float32, accum bool) {
	bias, lo, hi := par[0], par[1], par[2]
	clamp := !math.IsInf(float64(lo), -1) || !math.IsInf(float64(hi), 1)
	for r := 0; r < a.oh; r++ {
		o := out[r*a.ow : (r+1)*a.ow]
		if !accum {
			for j := range o {
				o[j] = bias
			}
		}
		for kh := 0; kh < a.kh; kh++ {
			base := (r*a.sh + kh*a.dh) * a.pitch
			for kw := 0; kw < a.kw; kw++ {
				wv := filt[kh*a.kw+kw]
				off := base + a.colOff(kw)
				st := a.colStep()
				if st == 1 {
					in := scr[off : off+len(o)]
					for j := range o {
						o[j] += wv * in[j]
					}
					continue
				}
				in := scr[off : off+(len(o)-1)*st+1]
				for j := range o {
					o[j] += wv * in[j*st]
				}
			}
		}
		if clamp {
			for j, v := range o {
				o[j] = min(hi, max(lo, v))
			}
		}
	}
}

func (p *Im2colPlan) checkDepthwise(dst, src, w []float32, multiplier, m0, m1 int, needSrc bool) error {
	g := p.g
	if multiplier <= 0 {
		return fmt.Errorf("kernel: depthwise multiplier %d must be positive", multiplier)
	}
	m := g.C * multiplier
	ohw := p.oh * p.ow
	taps := g.KH * g.KW
	switch {
	case m0 < 0 || m1 > m || m0 > m1:
		return fmt.Errorf("kernel: depthwise channel range [%d, %d) outside [0, %d)", m0, m1, m)
	case needSrc && len(src) < g.C*g.H*g.W:
		return fmt.Errorf("kernel: depthwise input has %d values, want %d (%d×%d×%d)", len(src), g.C*g.H*g.W, g.C, g.H, g.W)
	case len(w) < m*taps:
		return fmt.Errorf("kernel: depthwise weights have %d values, want %d (%d×%d×%d)", len(w), m*taps, m, g.KH, g.KW)
	case len(dst) < m*ohw:
		return fmt.Errorf("kernel: depthwise output has %d values, want %d (%d×%d×%d)", len(dst), m*ohw, m, p.oh, p.ow)
	}
	return nil
}

// backwardLayout is the padded plane of the input gradient: the output
// gradient dy spread out by the strides (zeros between) and padded so
// that the input gradient is a stride-1 convolution of it with the
// flipped filter,
//
//	dx[ih, iw] = Σ_{kh,kw} w[KH−1−kh, KW−1−kw]·U[ih + kh·dh, iw + kw·dw]
//
// with U[oh·sh + (KH−1)·dh − PadTop, ow·sw + (KW−1)·dw − PadLeft] =
// dy[oh, ow] (the transposed convolution of Dumoulin & Visin, "A guide to
// convolution arithmetic for deep learning", arXiv:1603.07285, §4). The
// stride-2 spread costs 4× the multiply-adds on zeros, but every plane
// then runs the same vector kernels as the forward pass.
func (p *Im2colPlan) backwardLayout() (dwLayout, dwArgs) {
	g := p.g
	l := dwLayout{
		rows:  g.H + (g.KH-1)*g.DilationH,
		pitch: g.W + (g.KW-1)*g.DilationW,
		top:   (g.KH-1)*g.DilationH - g.PadTop,
		left:  (g.KW-1)*g.DilationW - g.PadLeft,
		h:     p.oh, w: p.ow,
	}
	return l, dwArgs{g.KH, g.KW, 1, 1, g.DilationH, g.DilationW, g.H, g.W, l.pitch, 0}
}

// spread writes the output-gradient plane dy into U (see backwardLayout).
// Positions outside U are outputs whose taps all fall in the padding.
func (p *Im2colPlan) spread(l dwLayout, scr, dy []float32) {
	g := p.g
	for oh := 0; oh < p.oh; oh++ {
		y := oh*g.StrideH + l.top
		if y < 0 || y >= l.rows {
			continue
		}
		// Output columns whose spread column x = ow·sw + left is in [0, pitch).
		ow0 := 0
		if l.left < 0 {
			ow0 = (-l.left + g.StrideW - 1) / g.StrideW
		}
		ow1 := min(p.ow, (l.pitch-1-l.left)/g.StrideW+1)
		if l.pitch-1-l.left < 0 {
			ow1 = 0
		}
		if ow0 >= ow1 {
			continue
		}
		row := scr[y*l.pitch : (y+1)*l.pitch]
		src := dy[oh*p.ow+ow0 : oh*p.ow+ow1]
		x := ow0*g.StrideW + l.left
		if g.StrideW == 1 {
			copy(row[x:x+len(src)], src)
			continue
		}
		d := row[x : x+(len(src)-1)*g.StrideW+1]
		for j, v := range src {
			d[j*g.StrideW] = v
		}
	}
}

// DepthwiseBackwardScratch returns how many floats of scratch
// DepthwiseBackwardInto needs.
func (p *Im2colPlan) DepthwiseBackwardScratch() int {
	lb, _ := p.backwardLayout()
	lf, _ := p.forwardLayout(ISAPortable)
	return lb.size() + lf.size() + p.g.KH*p.g.KW
}

// DepthwiseBackward accumulates the gradients of a depthwise convolution
// for input channels [c0, c1) (and their output channels): dsrc += the
// input gradient and dw += the filter gradient, given the output gradient
// dy. Either of dsrc and dw may be nil to skip it; src is read only for
// dw. It allocates its scratch; see DepthwiseBackwardInto.
func (p *Im2colPlan) DepthwiseBackward(dsrc, dw, dy, src, w []float32, multiplier, c0, c1 int) error {
	return p.DepthwiseBackwardInto(dsrc, dw, dy, src, w, multiplier, c0, c1, make([]float32, p.DepthwiseBackwardScratch()))
}

// DepthwiseBackwardInto is DepthwiseBackward with caller-owned scratch of
// at least DepthwiseBackwardScratch() floats.
//
// The input gradient is the stride-1 convolution of the spread, padded dy
// with the flipped filter (see backwardLayout), so it runs on the forward
// kernels, accumulating into dsrc. The filter gradient is
// dw[kh, kw] = Σ dy[oh, ow]·x[oh·sh + kh·dh − PadTop, ow·sw + kw·dw − PadLeft],
// one dot product per tap and output row over the zero-padded input
// plane of the forward pass.
func (p *Im2colPlan) DepthwiseBackwardInto(dsrc, dw, dy, src, w []float32, multiplier, c0, c1 int, scratch []float32) error {
	isa := ISAAuto
	if p.portable {
		isa = ISAPortable
	}
	return p.depthwiseBackward(isa, dsrc, dw, dy, src, w, multiplier, c0, c1, scratch)
}

func (p *Im2colPlan) depthwiseBackward(isa ISA, dsrc, dw, dy, src, w []float32, multiplier, c0, c1 int, scratch []float32) error {
	g := p.g
	if c0 < 0 || c1 > g.C || c0 > c1 {
		return fmt.Errorf("kernel: depthwise backward channel range [%d, %d) outside [0, %d)", c0, c1, g.C)
	}
	if err := p.checkDepthwise(dy, src, w, multiplier, c0*multiplier, c1*multiplier, dw != nil); err != nil {
		return err
	}
	hw, taps := g.H*g.W, g.KH*g.KW
	if dsrc != nil && len(dsrc) < g.C*hw {
		return fmt.Errorf("kernel: depthwise input gradient has %d values, want %d", len(dsrc), g.C*hw)
	}
	if dw != nil && len(dw) < g.C*multiplier*taps {
		return fmt.Errorf("kernel: depthwise filter gradient has %d values, want %d", len(dw), g.C*multiplier*taps)
	}
	return p.dwBackwardPlanes(isa, dsrc, dw, dy, src, w, 1, g.C, multiplier, c0, c1, scratch, false)
}

// DepthwiseBackwardPlanes is DepthwiseBackwardInto over whole
// N×C×H×W tensors for a plan made for one channel (Geometry().C == 1),
// as DepthwisePlanes is for the forward pass: for channels [c0, c1) of
// all images, dsrc += the input gradient (planes laid out like src) and
// dw += the filter gradient summed over the images (rows indexed by
// output channel like w), from dy laid out like the forward output.
// Either of dsrc and dw may be nil; src is read only for dw. With setDX
// the planes of dsrc are overwritten instead of added to, so the caller
// need not zero them first (every value of each plane is written). The
// scratch is cleared once per call, so a goroutine should hand it a run
// of channels.
func (p *Im2colPlan) DepthwiseBackwardPlanes(dsrc, dw, dy, src, w []float32, images, channels, multiplier, c0, c1 int, scratch []float32, setDX bool) error {
	g := p.g
	hw, ohw, taps := g.H*g.W, p.oh*p.ow, g.KH*g.KW
	m := channels * multiplier
	switch {
	case g.C != 1:
		return fmt.Errorf("kernel: depthwise backward planes need a one-channel plan, got C=%d", g.C)
	case images <= 0 || channels <= 0 || multiplier <= 0:
		return fmt.Errorf("kernel: depthwise backward planes: %d images, %d channels, multiplier %d must be positive", images, channels, multiplier)
	case c0 < 0 || c1 > channels || c0 > c1:
		return fmt.Errorf("kernel: depthwise backward channel range [%d, %d) outside [0, %d)", c0, c1, channels)
	case len(dy) < images*m*ohw:
		return fmt.Errorf("kernel: depthwise output gradient has %d values, want %d", len(dy), images*m*ohw)
	case len(w) < m*taps:
		return fmt.Errorf("kernel: depthwise weights have %d values, want %d", len(w), m*taps)
	case dsrc != nil && len(dsrc) < images*channels*hw:
		return fmt.Errorf("kernel: depthwise input gradient has %d values, want %d", len(dsrc), images*channels*hw)
	case dw != nil && len(dw) < m*taps:
		return fmt.Errorf("kernel: depthwise filter gradient has %d values, want %d", len(dw), m*taps)
	case dw != nil && len(src) < images*channels*hw:
		return fmt.Errorf("kernel: depthwise input has %d values, want %d", len(src), images*channels*hw)
	}
	isa := ISAAuto
	if p.portable {
		isa = ISAPortable
	}
	return p.dwBackwardPlanes(isa, dsrc, dw, dy, src, w, images, channels, multiplier, c0, c1, scratch, setDX)
}

// dwBackwardPlanes does the work of both backward entry points once the
// sizes are checked: plane (n, ch) of src/dsrc is at (n·channels + ch)·H·W
// and output channel mo of image n at (n·channels·multiplier + mo)·OH·OW.
func (p *Im2colPlan) dwBackwardPlanes(isa ISA, dsrc, dw, dy, src, w []float32, images, channels, multiplier, c0, c1 int, scratch []float32, setDX bool) error {
	g := p.g
	hw, ohw, taps := g.H*g.W, p.oh*p.ow, g.KH*g.KW
	lb, ab := p.backwardLayout()
	lf, af := p.forwardLayout(ISAPortable) // dwFilterGrad reads it unphased
	if need := lb.size() + lf.size() + taps; len(scratch) < need {
		return fmt.Errorf("kernel: depthwise backward scratch has %d values, want %d", len(scratch), need)
	}
	u := scratch[:lb.size()]
	xs := scratch[lb.size() : lb.size()+lf.size()]
	flip := scratch[lb.size()+lf.size() : lb.size()+lf.size()+taps]
	// spread writes the same positions of u for every plane and fill the
	// same cells of xs, so one clear each serves the whole call.
	if dsrc != nil {
		clear(u)
	}
	if dw != nil {
		lf.clearPad(xs)
	}
	par := [3]float32{0, float32(math.Inf(-1)), float32(math.Inf(1))}
	planes := newDwPlanes(isa, &ab)
	fillX, fillU := lf.filler(isa, 0, lf.h), lb.filler(isa, 0, lb.h)
	m := channels * multiplier
	for ch := c0; ch < c1; ch++ {
		for n := 0; n < images; n++ {
			pl := n*channels + ch
			if dw != nil {
				fillX.fill(xs, src[pl*hw:(pl+1)*hw])
			}
			for mo := ch * multiplier; mo < (ch+1)*multiplier; mo++ {
				gy := dy[(n*m+mo)*ohw : (n*m+mo+1)*ohw]
				filt := w[mo*taps : (mo+1)*taps]
				if dsrc != nil {
					if g.StrideH == 1 && g.StrideW == 1 && lb.top >= 0 && lb.left >= 0 {
						fillU.fill(u, gy) // unspread: a plain padded copy
					} else {
						p.spread(lb, u, gy)
					}
					for t := range flip {
						flip[t] = filt[taps-1-t]
					}
					// The plane's first output channel sets it under setDX.
					accum := !setDX || mo > ch*multiplier
					planes.plane(dsrc[pl*hw:(pl+1)*hw], u, flip, &par, accum)
				}
				if dw != nil {
					dwFilterGrad(&af, dw[mo*taps:(mo+1)*taps], gy, xs)
				}
			}
		}
	}
	return nil
}

// dwFilterGrad adds the filter gradient of one plane: for each tap, the
// dot product of dy with the input values that tap read.
func dwFilterGrad(a *dwArgs, dfilt, dy, xs []float32) {
	for kh := 0; kh < a.kh; kh++ {
		for kw := 0; kw < a.kw; kw++ {
			var acc float32
			for r := 0; r < a.oh; r++ {
				gy := dy[r*a.ow : (r+1)*a.ow]
				off := (r*a.sh+kh*a.dh)*a.pitch + kw*a.dw
				if a.sw == 1 {
					in := xs[off : off+len(gy)]
					var s0, s1 float32
					j := 0
					for ; j+1 < len(gy); j += 2 {
						s0 += gy[j] * in[j]
						s1 += gy[j+1] * in[j+1]
					}
					if j < len(gy) {
						s0 += gy[j] * in[j]
					}
					acc += s0 + s1
					continue
				}
				in := xs[off : off+(len(gy)-1)*a.sw+1]
				for j, v := range gy {
					acc += v * in[j*a.sw]
				}
			}
			dfilt[kh*a.kw+kw] += acc
		}
	}
}
