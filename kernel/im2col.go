package kernel

import (
	"fmt"
	"sync"
)

// Conv2D is the geometry of a 2-D convolution of one image and one group of
// channels, in the terms of the ONNX Conv operator: the input is C×H×W
// (the group's slice of an NCHW tensor), the kernel KH×KW, and zero padding
// is added before (PadTop, PadLeft) and after (PadBottom, PadRight) each
// spatial axis. Zero strides and dilations mean 1.
type Conv2D struct {
	C, H, W                              int
	KH, KW                               int
	StrideH, StrideW                     int
	DilationH, DilationW                 int
	PadTop, PadLeft, PadBottom, PadRight int
}

// Im2colPlan lowers a convolution to a matrix product (Chellapilla, Puri &
// Simard, "High performance convolutional neural networks for document
// processing", IWFHR 2006). Its column matrix is row-major with
// K = C·KH·KW rows ordered (c, kh, kw) and N = OH·OW columns ordered
// (oh, ow), so for a group's weights Wg (Mg×K, ONNX's M×C/group×KH×KW
// layout as is) the group's output in NCHW layout is the GEMM
//
//	Yg (Mg×N) = Wg (Mg×K) · col (K×N)
//
// with no transposes. The valid output ranges of every kernel tap are
// computed once when the plan is made, so the copy loops hold no
// bounds tests on the padding.
type Im2colPlan struct {
	g      Conv2D
	oh, ow int
	// For kernel column kw: output columns [owLo, owHi) read inside the
	// image; likewise per kernel row kh for output rows.
	owLo, owHi []int
	ohLo, ohHi []int
	// portable makes Depthwise use only the pure-Go loops (see
	// PortableLoops).
	portable bool
	// taps caches the tap-offset tables of Im2colPanelsPadded and
	// Im2colPanelsPhased (tapKey → []int32); shared by PortableLoops
	// copies, whose tables are the same.
	taps *sync.Map
}

// PortableLoops returns a copy of the plan whose depthwise loops use no
// SIMD assembly, so tests can check the pure-Go path on any CPU.
func (p *Im2colPlan) PortableLoops() *Im2colPlan {
	q := *p
	q.portable = true
	return &q
}

// NewIm2col validates g and precomputes the plan.
func NewIm2col(g Conv2D) (*Im2colPlan, error) {
	if g.StrideH == 0 {
		g.StrideH = 1
	}
	if g.StrideW == 0 {
		g.StrideW = 1
	}
	if g.DilationH == 0 {
		g.DilationH = 1
	}
	if g.DilationW == 0 {
		g.DilationW = 1
	}
	if g.C <= 0 || g.H <= 0 || g.W <= 0 || g.KH <= 0 || g.KW <= 0 {
		return nil, fmt.Errorf("kernel: im2col needs positive sizes, got C=%d H=%d W=%d KH=%d KW=%d", g.C, g.H, g.W, g.KH, g.KW)
	}
	if g.StrideH < 0 || g.StrideW < 0 || g.DilationH < 0 || g.DilationW < 0 {
		return nil, fmt.Errorf("kernel: im2col strides %dx%d and dilations %dx%d must be positive", g.StrideH, g.StrideW, g.DilationH, g.DilationW)
	}
	if g.PadTop < 0 || g.PadLeft < 0 || g.PadBottom < 0 || g.PadRight < 0 {
		return nil, fmt.Errorf("kernel: im2col pads %d,%d,%d,%d must be non-negative", g.PadTop, g.PadLeft, g.PadBottom, g.PadRight)
	}
	// Output size as the ONNX Conv operator defines it (floor mode).
	spanH := (g.KH-1)*g.DilationH + 1
	spanW := (g.KW-1)*g.DilationW + 1
	inH := g.H + g.PadTop + g.PadBottom
	inW := g.W + g.PadLeft + g.PadRight
	if inH < spanH || inW < spanW {
		return nil, fmt.Errorf("kernel: im2col kernel span %dx%d exceeds padded input %dx%d", spanH, spanW, inH, inW)
	}
	p := &Im2colPlan{
		g:    g,
		taps: new(sync.Map),
		oh:   (inH-spanH)/g.StrideH + 1,
		ow:   (inW-spanW)/g.StrideW + 1,
	}
	p.ohLo, p.ohHi = validRange(g.KH, p.oh, g.StrideH, g.DilationH, g.PadTop, g.H)
	p.owLo, p.owHi = validRange(g.KW, p.ow, g.StrideW, g.DilationW, g.PadLeft, g.W)
	return p, nil
}

// validRange returns, for each kernel tap t, the outputs o whose input
// coordinate o·stride − pad + t·dilation lies in [0, size).
func validRange(taps, out, stride, dil, pad, size int) (lo, hi []int) {
	lo, hi = make([]int, taps), make([]int, taps)
	for t := 0; t < taps; t++ {
		off := t*dil - pad // input coordinate of output 0
		// smallest o with o·stride + off >= 0
		l := 0
		if off < 0 {
			l = (-off + stride - 1) / stride
		}
		// largest o with o·stride + off <= size-1, plus one
		h := 0
		if size-1-off >= 0 {
			h = (size-1-off)/stride + 1
		}
		lo[t], hi[t] = min(l, out), max(min(h, out), min(l, out))
	}
	return lo, hi
}

// Geometry returns the validated geometry (zero strides and dilations
// replaced by 1).
func (p *Im2colPlan) Geometry() Conv2D { return p.g }

// Out returns the output height and width.
func (p *Im2colPlan) Out() (oh, ow int) { return p.oh, p.ow }

// Shape returns the column matrix's rows (C·KH·KW) and columns (OH·OW).
func (p *Im2colPlan) Shape() (rows, cols int) {
	return p.g.C * p.g.KH * p.g.KW, p.oh * p.ow
}

// Pointwise reports whether the column matrix equals the input (1×1
// kernel, unit stride, no padding), so callers can skip the copy.
func (p *Im2colPlan) Pointwise() bool {
	g := p.g
	return g.KH == 1 && g.KW == 1 && g.StrideH == 1 && g.StrideW == 1 &&
		g.PadTop == 0 && g.PadLeft == 0 && g.PadBottom == 0 && g.PadRight == 0
}

func (p *Im2colPlan) check(col, img []float32, op string) error {
	rows, cols := p.Shape()
	if len(col) < rows*cols {
		return fmt.Errorf("kernel: %s column buffer has %d values, want %d (%d×%d)", op, len(col), rows*cols, rows, cols)
	}
	return p.checkImage(img, op)
}

func (p *Im2colPlan) checkImage(img []float32, op string) error {
	if n := p.g.C * p.g.H * p.g.W; len(img) < n {
		return fmt.Errorf("kernel: %s image has %d values, want %d (%d×%d×%d)", op, len(img), n, p.g.C, p.g.H, p.g.W)
	}
	return nil
}

// srcRow is the input row that output row oh reads at kernel row kh.
func (p *Im2colPlan) srcRow(oh, kh int) int {
	return oh*p.g.StrideH - p.g.PadTop + kh*p.g.DilationH
}

// srcCol is the input column that output column ow reads at kernel
// column kw.
func (p *Im2colPlan) srcCol(ow, kw int) int {
	return ow*p.g.StrideW - p.g.PadLeft + kw*p.g.DilationW
}

// gather fills out with the input row values in[iw0], in[iw0+StrideW], …
// (one kernel tap over consecutive output columns); unit stride is a
// plain copy.
func (p *Im2colPlan) gather(out, in []float32, iw0 int) {
	if p.g.StrideW == 1 {
		copy(out, in[iw0:iw0+len(out)])
		return
	}
	iw := iw0
	for k := range out {
		out[k] = in[iw]
		iw += p.g.StrideW
	}
}

// Im2col writes the column matrix of src (C×H×W) into dst (K×N, see
// Im2colPlan); padded positions are written as zero.
func (p *Im2colPlan) Im2col(dst, src []float32) error {
	if err := p.check(dst, src, "im2col"); err != nil {
		return err
	}
	g := p.g
	ohw := p.oh * p.ow
	row := 0
	for c := 0; c < g.C; c++ {
		plane := src[c*g.H*g.W : (c+1)*g.H*g.W]
		for kh := 0; kh < g.KH; kh++ {
			for kw := 0; kw < g.KW; kw++ {
				d := dst[row*ohw : (row+1)*ohw]
				row++
				ohLo, ohHi := p.ohLo[kh], p.ohHi[kh]
				owLo, owHi := p.owLo[kw], p.owHi[kw]
				clear(d[:ohLo*p.ow])
				clear(d[ohHi*p.ow:])
				for oh := ohLo; oh < ohHi; oh++ {
					out := d[oh*p.ow : (oh+1)*p.ow]
					clear(out[:owLo])
					clear(out[owHi:])
					if owLo == owHi {
						continue
					}
					p.gather(out[owLo:owHi], plane[p.srcRow(oh, kh)*g.W:], p.srcCol(owLo, kw))
				}
			}
		}
	}
	return nil
}

// Col2im adds the adjoint of Im2col: every column-matrix entry of src is
// added onto the image position it was copied from in dst (C×H×W);
// entries that came from padding are dropped. Because it is the exact
// transpose of Im2col, the input gradient of a convolution is
// Col2im(Wgᵀ·dYg).
func (p *Im2colPlan) Col2im(dst, src []float32) error {
	return p.Col2imRows(dst, src, 0, p.g.H)
}

// Col2imRows is Col2im for the image rows [y0, y1) of every channel: the
// rest of dst is not touched, so disjoint row ranges may run
// concurrently. Each position receives its entries in the same order as
// from Col2im (by kernel tap), so the sums are bit-identical however the
// rows are divided.
func (p *Im2colPlan) Col2imRows(dst, src []float32, y0, y1 int) error {
	if err := p.check(src, dst, "col2im"); err != nil {
		return err
	}
	g := p.g
	if y0 < 0 || y1 > g.H || y0 > y1 {
		return fmt.Errorf("kernel: col2im rows [%d, %d) outside [0, %d)", y0, y1, g.H)
	}
	p.col2im(dst, src, y0, y1, 0, p.oh)
	return nil
}

// Col2imOutRows is Col2im for the columns of output rows [oh0, oh1) alone:
// src holds just those columns, as a K×((oh1−oh0)·OW) matrix, and their
// entries are added onto dst. A convolution's input gradient can then be
// formed band by band of output rows, each band's columns computed and
// scattered while they are in cache. Bands whose image rows overlap must
// not run concurrently; their order decides the order of the sums where
// they overlap.
func (p *Im2colPlan) Col2imOutRows(dst, src []float32, oh0, oh1 int) error {
	rows, _ := p.Shape()
	if oh0 < 0 || oh1 > p.oh || oh0 > oh1 {
		return fmt.Errorf("kernel: col2im output rows [%d, %d) outside [0, %d)", oh0, oh1, p.oh)
	}
	if n := rows * (oh1 - oh0) * p.ow; len(src) < n {
		return fmt.Errorf("kernel: col2im band has %d values, want %d (%d×%d)", len(src), n, rows, (oh1-oh0)*p.ow)
	}
	if err := p.checkImage(dst, "col2im"); err != nil {
		return err
	}
	p.col2im(dst, src, 0, p.g.H, oh0, oh1)
	return nil
}

// col2im adds the entries of src, the columns of output rows [oh0, oh1),
// that land in image rows [y0, y1) onto dst, tap by tap.
func (p *Im2colPlan) col2im(dst, src []float32, y0, y1, oh0, oh1 int) {
	g := p.g
	cols := (oh1 - oh0) * p.ow
	row := 0
	for c := 0; c < g.C; c++ {
		plane := dst[c*g.H*g.W : (c+1)*g.H*g.W]
		for kh := 0; kh < g.KH; kh++ {
			// Output rows oh whose tap kh lands in [y0, y1).
			ohLo, ohHi := max(p.ohLo[kh], oh0), min(p.ohHi[kh], oh1)
			if base := kh*g.DilationH - g.PadTop; y0 > 0 || y1 < g.H {
				ohLo = max(ohLo, ceilDiv(y0-base, g.StrideH))
				ohHi = min(ohHi, ceilDiv(y1-base, g.StrideH))
			}
			for kw := 0; kw < g.KW; kw++ {
				s := src[row*cols : (row+1)*cols]
				row++
				owLo, owHi := p.owLo[kw], p.owHi[kw]
				for oh := ohLo; oh < ohHi; oh++ {
					in := s[(oh-oh0)*p.ow : (oh-oh0+1)*p.ow]
					out := plane[p.srcRow(oh, kh)*g.W:]
					iw := p.srcCol(owLo, kw)
					if g.StrideW == 2 && !p.portable {
						AddStride2(out[iw:], in[owLo:owHi])
						continue
					}
					for ow := owLo; ow < owHi; ow++ {
						out[iw] += in[ow]
						iw += g.StrideW
					}
				}
			}
		}
	}
}

// ceilDiv is ⌈a/b⌉ for b > 0 and any sign of a.
func ceilDiv(a, b int) int {
	if a <= 0 {
		return -(-a / b)
	}
	return (a + b - 1) / b
}

// Im2col is NewIm2col(g) followed by its Im2col, for one-off use; build
// the plan once when the same geometry is lowered repeatedly.
func Im2col(dst, src []float32, g Conv2D) error {
	p, err := NewIm2col(g)
	if err != nil {
		return err
	}
	return p.Im2col(dst, src)
}

// Im2colCols writes columns [j0, j1) of the column matrix (output
// positions j0 … j1−1 in (oh, ow) order) into dst as a K×(j1−j0)
// row-major block. Lowering a convolution one such slab at a time lets
// the slab stay in cache between the copy and the matrix product, and lets
// slabs run on different cores, instead of writing and re-reading the
// whole K×OH·OW matrix through memory.
func (p *Im2colPlan) Im2colCols(dst, src []float32, j0, j1 int) error {
	rows, cols := p.Shape()
	if j0 < 0 || j1 > cols || j0 > j1 {
		return fmt.Errorf("kernel: im2col columns [%d, %d) outside [0, %d)", j0, j1, cols)
	}
	w := j1 - j0
	if len(dst) < rows*w {
		return fmt.Errorf("kernel: im2col column block has %d values, want %d (%d×%d)", len(dst), rows*w, rows, w)
	}
	if err := p.checkImage(src, "im2col"); err != nil {
		return err
	}
	g := p.g
	row := 0
	for c := 0; c < g.C; c++ {
		plane := src[c*g.H*g.W : (c+1)*g.H*g.W]
		for kh := 0; kh < g.KH; kh++ {
			for kw := 0; kw < g.KW; kw++ {
				d := dst[row*w : (row+1)*w]
				row++
				ohLo, ohHi := p.ohLo[kh], p.ohHi[kh]
				owLo, owHi := p.owLo[kw], p.owHi[kw]
				for j := j0; j < j1; {
					oh, ow0 := j/p.ow, j%p.ow
					end := min(j1, (oh+1)*p.ow)
					ow1 := ow0 + end - j
					seg := d[j-j0 : end-j0]
					j = end
					if oh < ohLo || oh >= ohHi {
						clear(seg)
						continue
					}
					lo := min(max(owLo, ow0), ow1)
					hi := max(min(owHi, ow1), lo)
					clear(seg[:lo-ow0])
					clear(seg[hi-ow0:])
					if lo == hi {
						continue
					}
					p.gather(seg[lo-ow0:hi-ow0], plane[p.srcRow(oh, kh)*g.W:], p.srcCol(lo, kw))
				}
			}
		}
	}
	return nil
}
