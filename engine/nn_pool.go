package engine

import (
	"fmt"
	"math"

	"heedmap/kernel"
	"heedmap/onnx"
	"heedmap/tensor"
)

func init() {
	register("MaxPool", buildMaxPool)
	register("AveragePool", buildAveragePool)
	register("GlobalAveragePool", buildGlobalPool(false))
	register("GlobalMaxPool", buildGlobalPool(true))
}

// poolOp is MaxPool or AveragePool over 1-D or 2-D windows.
type poolOp struct {
	win          windowAttrs
	max          bool
	includePad   bool
	storageOrder int64
	kernel       []int
	hasIndices   bool   // the node exposes MaxPool's Indices output
	arena        *arena // output buffers; nil allocates
	team         *team  // the Graph's helper goroutines; nil starts fresh ones
}

func buildMaxPool(n *onnx.Node, env *Env) (Op, error) {
	return teamPool(env)(buildPool(n, true))
}

func buildAveragePool(n *onnx.Node, env *Env) (Op, error) {
	return teamPool(env)(buildPool(n, false))
}

// teamPool returns a function that gives a built pooling operator the
// Graph's helper team.
func teamPool(env *Env) func(Op, error) (Op, error) {
	return func(op Op, err error) (Op, error) {
		if p, ok := op.(*poolOp); ok && env != nil {
			p.team = env.team
		}
		return op, err
	}
}

func buildPool(n *onnx.Node, isMax bool) (Op, error) {
	w, err := parseWindow(n)
	if err != nil {
		return nil, err
	}
	if w.kernel == nil {
		return nil, fmt.Errorf("kernel_shape is required")
	}
	op := &poolOp{win: w, max: isMax, includePad: n.Int("count_include_pad", 0) != 0, kernel: int64sToInts(w.kernel)}
	if isMax {
		op.storageOrder = n.Int("storage_order", 0)
		op.hasIndices = len(n.Outputs) > 1 && n.Outputs[1] != ""
		if op.hasIndices && op.storageOrder != 0 {
			return nil, fmt.Errorf("MaxPool Indices with storage_order=1 not supported")
		}
	} else if w.dilations != nil {
		for _, d := range w.dilations {
			if d != 1 {
				// Average pooling with dilation exists only from opset 19;
				// its divisor rules are not implemented here.
				return nil, fmt.Errorf("AveragePool dilations %v not supported", w.dilations)
			}
		}
	}
	return op, nil
}

func (op *poolOp) geometry(x []int) (geom2, error) {
	if len(x) != len(op.kernel)+2 {
		return geom2{}, fmt.Errorf("input %v for kernel_shape %v", x, op.kernel)
	}
	return op.win.resolve(x[2:], op.kernel)
}

func (op *poolOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return op.forward(in[0], op.hasIndices)
}

// forward pools x; for MaxPool with wantIdx it also returns the argmax of
// every window as ONNX Indices (flat offsets into x), which is what
// Backward routes gradients through. Without a consumer for Indices they
// are not materialised in the forward pass but recomputed by Backward.
func (op *poolOp) forward(x *tensor.Tensor, wantIdx bool) ([]*tensor.Tensor, error) {
	if err := wantFloat(x, "X", 3); err != nil {
		return nil, err
	}
	g, err := op.geometry(x.Shape)
	if err != nil {
		return nil, err
	}
	nc := x.Shape[0] * x.Shape[1]
	spatial := len(x.Shape) - 2
	y := op.arena.tensor(g.outShape(x.Shape[0], x.Shape[1], spatial)...)
	ihw, ohw := g.ih*g.iw, g.oh*g.ow
	var idx *tensor.Tensor
	if op.max && wantIdx {
		idx = tensor.NewInt64(y.Shape...)
	}
	op.team.split(nc, nc*ohw*g.kh*g.kw, func(p0, p1 int) {
		for p := p0; p < p1; p++ {
			src := x.F32[p*ihw : (p+1)*ihw]
			dst := y.F32[p*ohw : (p+1)*ohw]
			var ix64 []int64
			if idx != nil {
				ix64 = idx.I64[p*ohw : (p+1)*ohw]
			}
			if op.max {
				maxPlane(src, dst, ix64, g, int64(p*ihw))
				continue
			}
			for oy := 0; oy < g.oh; oy++ {
				y0 := oy*g.sh - g.pt
				ylo, yhi := max(y0, 0), min(y0+g.kh, g.ih)
				for ox := 0; ox < g.ow; ox++ {
					x0 := ox*g.sw - g.pl
					xlo, xhi := max(x0, 0), min(x0+g.kw, g.iw)
					var sum float32
					for iy := ylo; iy < yhi; iy++ {
						for _, v := range src[iy*g.iw+xlo : iy*g.iw+xhi] {
							sum += v
						}
					}
					cnt := max(yhi-ylo, 0) * max(xhi-xlo, 0)
					dst[oy*g.ow+ox] = sum / float32(op.divisor(g, y0, x0, cnt))
				}
			}
		}
	})
	if idx != nil {
		return []*tensor.Tensor{y, idx}, nil
	}
	return []*tensor.Tensor{y}, nil
}

// divisor is the number of elements a window averages: with
// count_include_pad the window clipped to the padded input (so a ceil_mode
// window hanging past the end padding counts only the padded part, as in
// PyTorch), otherwise the cnt in-bounds elements.
func (op *poolOp) divisor(g geom2, y0, x0, cnt int) int {
	if !op.includePad {
		return max(cnt, 1)
	}
	h := min(y0+g.kh, g.ih+g.pb) - y0
	w := min(x0+g.kw, g.iw+g.pr) - x0
	return max(h*w, 1)
}

// BackwardNeeds: MaxPool routes through the argmax, kept from the forward
// pass when the node exposes Indices and recomputed from X otherwise;
// AveragePool needs only shapes.
func (op *poolOp) BackwardNeeds() (in, out []int) {
	if op.max && op.hasIndices {
		return nil, []int{1}
	}
	if op.max {
		return []int{0}, nil
	}
	return nil, nil
}

func (op *poolOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	x, dy := in[0], gradOut[0]
	if op.max && len(out) > 1 && out[1] != nil && out[1].I64 != nil {
		// Route through the kept Indices (flat offsets into x).
		dx := op.arena.zeroed(x.Shape...)
		for i, j := range out[1].I64 {
			dx.F32[j] += dy.F32[i]
		}
		return []*tensor.Tensor{dx}, nil
	}
	g, err := op.geometry(x.Shape)
	if err != nil {
		return nil, err
	}
	nc := x.Shape[0] * x.Shape[1]
	ihw, ohw := g.ih*g.iw, g.oh*g.ow
	// Every plane is cleared by the goroutine that accumulates into it,
	// while it is in that core's cache, instead of in one serial pass.
	dx := op.arena.tensor(x.Shape...)
	op.team.split(nc, nc*ohw*g.kh*g.kw, func(p0, p1 int) {
		var sc *maxScratch
		if op.max {
			sc = newMaxScratch(g.ow)
		}
		for p := p0; p < p1; p++ {
			dsrc := dx.F32[p*ihw : (p+1)*ihw]
			clear(dsrc)
			gy := dy.F32[p*ohw : (p+1)*ohw]
			if op.max {
				maxPlaneBackward(x.F32[p*ihw:(p+1)*ihw], gy, dsrc, g, sc)
				continue
			}
			for oy := 0; oy < g.oh; oy++ {
				for ox := 0; ox < g.ow; ox++ {
					y0, x0 := oy*g.sh-g.pt, ox*g.sw-g.pl
					ylo, yhi := max(y0, 0), min(y0+g.kh, g.ih)
					xlo, xhi := max(x0, 0), min(x0+g.kw, g.iw)
					cnt := max(yhi-ylo, 0) * max(xhi-xlo, 0)
					v := gy[oy*g.ow+ox] / float32(op.divisor(g, y0, x0, cnt))
					for iy := ylo; iy < yhi; iy++ {
						for ix := xlo; ix < xhi; ix++ {
							dsrc[iy*g.iw+ix] += v
						}
					}
				}
			}
		}
	})
	return []*tensor.Tensor{dx}, nil
}

// globalPoolOp is GlobalAveragePool or GlobalMaxPool over all spatial axes
// of any rank.
type globalPoolOp struct {
	max   bool
	arena *arena // output buffers; nil allocates
	team  *team  // splits the planes; nil starts fresh goroutines
}

func buildGlobalPool(isMax bool) Builder {
	return func(n *onnx.Node, env *Env) (Op, error) { return &globalPoolOp{max: isMax, team: env.team}, nil }
}

func (op *globalPoolOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	x := in[0]
	if err := wantFloat(x, "X", 3); err != nil {
		return nil, err
	}
	nc := x.Shape[0] * x.Shape[1]
	hw := tensor.Numel(x.Shape[2:])
	shape := []int{x.Shape[0], x.Shape[1]}
	for range x.Shape[2:] {
		shape = append(shape, 1)
	}
	if hw == 0 {
		return nil, fmt.Errorf("global pooling over empty spatial shape %v", x.Shape)
	}
	y := op.arena.tensor(shape...)
	op.team.split(nc, nc*hw, func(p0, p1 int) {
		if op.max {
			for p := p0; p < p1; p++ {
				src := x.F32[p*hw : (p+1)*hw]
				best := src[0]
				for _, v := range src[1:] {
					if v > best {
						best = v
					}
				}
				y.F32[p] = best
			}
			return
		}
		meanPlanes(y.F32[p0:p1], x.F32[p0*hw:p1*hw], hw)
	})
	return []*tensor.Tensor{y}, nil
}

// meanPlanes sets dst[p] to the mean of plane p of src (planes of hw
// values), each summed in float64 in order. Four planes go side by side,
// so the four sums' additions overlap instead of each waiting for the
// previous one (a 7×7 map is 49 dependent additions); each plane's sum is
// the same as alone. Measured on MobileNetV2's 1280×7×7 pooling: about
// 150 µs a pass on one core before.
func meanPlanes(dst, src []float32, hw int) {
	n := float64(hw)
	p := 0
	for ; p+4 <= len(dst); p += 4 {
		a, b := src[p*hw:(p+1)*hw], src[(p+1)*hw:(p+2)*hw]
		c, d := src[(p+2)*hw:(p+3)*hw], src[(p+3)*hw:(p+4)*hw]
		var s0, s1, s2, s3 float64
		for i := range a {
			s0 += float64(a[i])
			s1 += float64(b[i])
			s2 += float64(c[i])
			s3 += float64(d[i])
		}
		dst[p], dst[p+1], dst[p+2], dst[p+3] = float32(s0/n), float32(s1/n), float32(s2/n), float32(s3/n)
	}
	for ; p < len(dst); p++ {
		var s float64
		for _, v := range src[p*hw : (p+1)*hw] {
			s += float64(v)
		}
		dst[p] = float32(s / n)
	}
}

func (op *globalPoolOp) BackwardNeeds() (in, out []int) {
	if op.max {
		return []int{0}, []int{0}
	}
	return nil, nil
}

// Backward spreads the mean's gradient evenly; the max's goes to the first
// position attaining the maximum (a subgradient choice, matching MaxPool).
func (op *globalPoolOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	x, dy := in[0], gradOut[0]
	nc := x.Shape[0] * x.Shape[1]
	hw := tensor.Numel(x.Shape[2:])
	var dx *tensor.Tensor
	if op.max {
		dx = op.arena.zeroed(x.Shape...) // one element per plane written
	} else {
		dx = op.arena.tensor(x.Shape...) // every element written
	}
	for p := 0; p < nc; p++ {
		d := dx.F32[p*hw : (p+1)*hw]
		if op.max {
			src, m := x.F32[p*hw:(p+1)*hw], out[0].F32[p]
			for i, v := range src {
				if v == m {
					d[i] = dy.F32[p]
					break
				}
			}
			continue
		}
		v := dy.F32[p] / float32(hw)
		for i := range d {
			d[i] = v
		}
	}
	return []*tensor.Tensor{dx}, nil
}

// maxScratch is maxPlaneBackward's scratch for one output row: each
// window's maximum and its flat offset (maxRow), and the offsets of
// kernel.ArgMax9Stride2.
type maxScratch struct {
	val []float32
	arg []int64
	at  []int32
}

func newMaxScratch(ow int) *maxScratch {
	return &maxScratch{val: make([]float32, ow), arg: make([]int64, ow), at: make([]int32, ow)}
}

// maxPlaneBackward adds each window's output gradient dy into dx (one
// channel plane) at the position maxPlane routes it to: the window's
// maximum, the first in scan order on ties, offset 0 for a window entirely
// in padding. It recomputes the argmax from x with maxRow, one output row
// at a time, instead of materialising Indices for the whole plane.
// sc is scratch for one output row (newMaxScratch(g.ow)), made once per
// run of planes rather than per plane.
func maxPlaneBackward(src, dy, dx []float32, g geom2, sc *maxScratch) {
	if g.kh == 3 && g.kw == 3 && g.dh == 1 && g.dw == 1 {
		maxPlaneBackward3x3(src, dy, dx, g, sc)
		return
	}
	for oy := 0; oy < g.oh; oy++ {
		maxRow(src, sc.val, sc.arg, g, 0, oy, 0, g.ow)
		for ox, a := range sc.arg {
			dx[a] += dy[oy*g.ow+ox]
		}
	}
}

// maxPlaneBackward3x3 is maxPlaneBackward for the undilated 3×3 window:
// interior windows at column stride 2 find their argmax through
// kernel.ArgMax9Stride2, at other strides with the nine reads written out
// in maxRow's scan order (strictly greater replaces, so ties and NaNs keep
// the first); the border ones go through maxRow. The general loop's
// per-window tap ranges and its data-dependent branch were 5 % of a
// ResNet-18 forward+backward pass at batch 1, the written-out scan still
// 7 % (2.6 ms a pass).
func maxPlaneBackward3x3(src, dy, dx []float32, g geom2, sc *maxScratch) {
	oxLo, oxHi := interior3x3(g)
	iw := int32(g.iw)
	tapOffs := [9]int32{0, 1, 2, iw, iw + 1, iw + 2, 2 * iw, 2*iw + 1, 2*iw + 2}
	border := func(oy, ox0, ox1 int) {
		maxRow(src, sc.val, sc.arg, g, 0, oy, ox0, ox1)
		for ox := ox0; ox < ox1; ox++ {
			dx[sc.arg[ox]] += dy[oy*g.ow+ox]
		}
	}
	for oy := 0; oy < g.oh; oy++ {
		y0 := oy*g.sh - g.pt
		if y0 < 0 || y0+2 >= g.ih || oxLo >= oxHi {
			border(oy, 0, g.ow)
			continue
		}
		border(oy, 0, oxLo)
		r0 := y0 * g.iw
		gy := dy[oy*g.ow : (oy+1)*g.ow]
		x0 := oxLo*g.sw - g.pl
		if g.sw == 2 {
			// The argmax of every interior window in vector form, then
			// the adds in output order.
			n := oxHi - oxLo
			rows := [3][]float32{
				src[r0+x0 : r0+x0+2*n+1],
				src[r0+g.iw+x0 : r0+g.iw+x0+2*n+1],
				src[r0+2*g.iw+x0 : r0+2*g.iw+x0+2*n+1],
			}
			at := sc.at[oxLo:oxHi]
			kernel.ArgMax9Stride2(at, &rows, &tapOffs)
			d := dx[r0+x0:]
			for i, a := range at {
				d[2*i+int(a)] += gy[oxLo+i]
			}
			border(oy, oxHi, g.ow)
			continue
		}
		for ox := oxLo; ox < oxHi; ox++ {
			j := r0 + x0
			w := src[j : j+2*g.iw+3]
			best, at := w[0], 0
			best, at = argGt(w[1], 1, best, at)
			best, at = argGt(w[2], 2, best, at)
			best, at = argGt(w[g.iw], g.iw, best, at)
			best, at = argGt(w[g.iw+1], g.iw+1, best, at)
			best, at = argGt(w[g.iw+2], g.iw+2, best, at)
			best, at = argGt(w[2*g.iw], 2*g.iw, best, at)
			best, at = argGt(w[2*g.iw+1], 2*g.iw+1, best, at)
			_, at = argGt(w[2*g.iw+2], 2*g.iw+2, best, at)
			dx[j+at] += gy[ox]
			x0 += g.sw
		}
		// After the interior: overlapping windows add into the same dx in
		// the general loop's order, so the sums round alike.
		border(oy, oxHi, g.ow)
	}
}

// argGt is one step of maxRow's scan with the position: v at offset j
// replaces the kept value only when strictly greater.
func argGt(v float32, j int, best float32, at int) (float32, int) {
	if v > best {
		return v, j
	}
	return best, at
}

// tapRange returns the kernel taps [lo, hi) whose input coordinate
// start + k·d lies inside [0, n), so the inner loops need no bounds tests.
func tapRange(start, d, k, n int) (lo, hi int) {
	if start < 0 {
		lo = (-start + d - 1) / d
	}
	hi = k
	if last := start + (k-1)*d; last >= n {
		hi = (n-1-start)/d + 1
	}
	return lo, max(hi, lo)
}

// maxPlane max-pools one channel plane. Ties keep the first position in
// scan order (row-major within the window), as PyTorch does; idx, when not
// nil, receives off + the flat offset of each window's maximum.
func maxPlane(src, dst []float32, idx []int64, g geom2, off int64) {
	if idx == nil && g.kh == 3 && g.kw == 3 && g.dh == 1 && g.dw == 1 {
		maxPlane3x3(src, dst, g)
		return
	}
	for oy := 0; oy < g.oh; oy++ {
		var rowIdx []int64
		if idx != nil {
			rowIdx = idx[oy*g.ow : (oy+1)*g.ow]
		}
		maxRow(src, dst[oy*g.ow:(oy+1)*g.ow], rowIdx, g, off, oy, 0, g.ow)
	}
}

// maxPlane3x3 is maxPlane for the common undilated 3×3 window without
// indices: windows that lie wholly inside the image (all but a border of
// outputs) at column stride 1 or 2 are nine unit-stride rows for
// kernel.Max9, with no tap-range arithmetic; the rest take the general
// loop. The scan order, and so the value kept among equal ones or NaN, is
// maxPlane's.
func maxPlane3x3(src, dst []float32, g geom2) {
	oxLo, oxHi := interior3x3(g)
	// The interior goes through kernel.Max9 (stride 1) or Max9Stride2:
	// branch-free, where the compares of the scalar scan mispredict on
	// real images (3–9 % of a ResNet-18 forward pass).
	for oy := 0; oy < g.oh; oy++ {
		y0 := oy*g.sh - g.pt
		out := dst[oy*g.ow : (oy+1)*g.ow]
		if y0 < 0 || y0+2 >= g.ih || oxLo >= oxHi {
			maxRow(src, out, nil, g, 0, oy, 0, g.ow)
			continue
		}
		maxRow(src, out, nil, g, 0, oy, 0, oxLo)
		maxRow(src, out, nil, g, 0, oy, oxHi, g.ow)
		rows := [3][]float32{
			src[y0*g.iw : (y0+1)*g.iw],
			src[(y0+1)*g.iw : (y0+2)*g.iw],
			src[(y0+2)*g.iw : (y0+3)*g.iw],
		}
		switch g.sw {
		case 1:
			x0, n := oxLo-g.pl, oxHi-oxLo
			var taps [9][]float32
			for i, r := range rows {
				for t := 0; t < 3; t++ {
					taps[3*i+t] = r[x0+t : x0+t+n]
				}
			}
			kernel.Max9(out[oxLo:oxHi], &taps)
		case 2:
			x0, n := 2*oxLo-g.pl, oxHi-oxLo
			for i := range rows {
				rows[i] = rows[i][x0 : x0+2*n+1]
			}
			kernel.Max9Stride2(out[oxLo:oxHi], &rows)
		default:
			maxRow(src, out, nil, g, 0, oy, oxLo, oxHi)
		}
	}
}

// interior3x3 returns the output columns [oxLo, oxHi) whose 3×3 window
// lies inside the image's columns: x0 = ox·sw − pl ≥ 0 and x0 + 2 < iw.
func interior3x3(g geom2) (oxLo, oxHi int) {
	oxLo = (g.pl + g.sw - 1) / g.sw
	if g.iw-3+g.pl >= 0 {
		oxHi = min(g.ow, (g.iw-3+g.pl)/g.sw+1)
	}
	return oxLo, max(oxHi, oxLo)
}

// maxRow is maxPlane's general loop for outputs [ox0, ox1) of row oy:
// out and idx (nil for no indices) hold the row's outputs. A window
// entirely in padding gives −Inf at offset 0.
func maxRow(src, out []float32, idx []int64, g geom2, off int64, oy, ox0, ox1 int) {
	y0 := oy*g.sh - g.pt
	kilo, kihi := tapRange(y0, g.dh, g.kh, g.ih)
	for ox := ox0; ox < ox1; ox++ {
		x0 := ox*g.sw - g.pl
		kjlo, kjhi := tapRange(x0, g.dw, g.kw, g.iw)
		best, arg := float32(math.Inf(-1)), -1
		for ki := kilo; ki < kihi; ki++ {
			row := (y0 + ki*g.dh) * g.iw
			for kj := kjlo; kj < kjhi; kj++ {
				j := row + x0 + kj*g.dw
				if v := src[j]; v > best || arg < 0 {
					best, arg = v, j
				}
			}
		}
		out[ox] = best
		if idx != nil {
			idx[ox] = off + int64(max(arg, 0))
		}
	}
}
