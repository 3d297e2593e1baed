package kernel

import "fmt"

// Depthwise computes a depthwise convolution (ONNX Conv with group equal
// to the input channel count C): each input channel c is convolved with
// its own multiplier filters, giving output channels c·multiplier …
// (c+1)·multiplier−1. src is C×H×W, w is (C·multiplier)×KH×KW (ONNX's
// M×1×KH×KW weight layout as is), dst is (C·multiplier)×OH×OW and is
// overwritten.
//
// A depthwise filter has K = KH·KW ≤ 49 taps, so lowering it to a GEMM
// gives matrices too thin for the packed kernels to pay back the im2col
// copy. Instead each tap adds a scaled, shifted input row onto the output
// row (unit-stride rows are contiguous loops the compiler keeps free of
// bounds checks), using the plan's precomputed valid ranges for padding.
func (p *Im2colPlan) Depthwise(dst, src, w []float32, multiplier int) error {
	return p.DepthwiseRange(dst, src, w, multiplier, 0, p.g.C*multiplier)
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

// DepthwiseRange is Depthwise restricted to output channels [m0, m1), so
// callers can split the channels over goroutines; the other output
// channels are not touched.
func (p *Im2colPlan) DepthwiseRange(dst, src, w []float32, multiplier, m0, m1 int) error {
	if err := p.checkDepthwise(dst, src, w, multiplier, m0, m1, true); err != nil {
		return err
	}
	g := p.g
	ohw := p.oh * p.ow
	taps := g.KH * g.KW
	for mo := m0; mo < m1; mo++ {
		plane := src[(mo/multiplier)*g.H*g.W : (mo/multiplier+1)*g.H*g.W]
		out := dst[mo*ohw : (mo+1)*ohw]
		clear(out)
		filt := w[mo*taps : (mo+1)*taps]
		if g.KW == 3 {
			p.depthwiseRow3(out, plane, filt)
			continue
		}
		for kh := 0; kh < g.KH; kh++ {
			for kw := 0; kw < g.KW; kw++ {
				wv := filt[kh*g.KW+kw]
				owLo, owHi := p.owLo[kw], p.owHi[kw]
				if owLo == owHi {
					continue
				}
				for oh := p.ohLo[kh]; oh < p.ohHi[kh]; oh++ {
					ih := oh*g.StrideH - g.PadTop + kh*g.DilationH
					iw0 := owLo*g.StrideW - g.PadLeft + kw*g.DilationW
					o := out[oh*p.ow+owLo : oh*p.ow+owHi]
					if g.StrideW == 1 {
						in := plane[ih*g.W+iw0 : ih*g.W+iw0+len(o)]
						for j := range o {
							o[j] += wv * in[j]
						}
						continue
					}
					in := plane[ih*g.W:]
					iw := iw0
					for j := range o {
						o[j] += wv * in[iw]
						iw += g.StrideW
					}
				}
			}
		}
	}
	return nil
}

// DepthwiseBackward accumulates the gradients of a depthwise convolution
// for input channels [c0, c1) (and their output channels): dsrc += the
// input gradient and dw += the filter gradient, given the output gradient
// dy. Either of dsrc and dw may be nil to skip it; src is read only for
// dw. It is the adjoint of
// DepthwiseRange tap by tap: every forward row update o += w·in becomes
// din += w·dout and dw += dout·in over the same valid ranges, so the
// padding logic is shared with the forward pass.
func (p *Im2colPlan) DepthwiseBackward(dsrc, dw, dy, src, w []float32, multiplier, c0, c1 int) error {
	if c0 < 0 || c1 > p.g.C || c0 > c1 {
		return fmt.Errorf("kernel: depthwise backward channel range [%d, %d) outside [0, %d)", c0, c1, p.g.C)
	}
	if err := p.checkDepthwise(dy, src, w, multiplier, c0*multiplier, c1*multiplier, dw != nil); err != nil {
		return err
	}
	g := p.g
	ohw := p.oh * p.ow
	taps := g.KH * g.KW
	if dsrc != nil && len(dsrc) < g.C*g.H*g.W {
		return fmt.Errorf("kernel: depthwise input gradient has %d values, want %d", len(dsrc), g.C*g.H*g.W)
	}
	if dw != nil && len(dw) < g.C*multiplier*taps {
		return fmt.Errorf("kernel: depthwise filter gradient has %d values, want %d", len(dw), g.C*multiplier*taps)
	}
	for mo := c0 * multiplier; mo < c1*multiplier; mo++ {
		ch := mo / multiplier
		gy := dy[mo*ohw : (mo+1)*ohw]
		filt := w[mo*taps : (mo+1)*taps]
		var plane, dplane, dfilt []float32
		if dw != nil {
			plane = src[ch*g.H*g.W : (ch+1)*g.H*g.W]
			dfilt = dw[mo*taps : (mo+1)*taps]
		}
		if dsrc != nil {
			dplane = dsrc[ch*g.H*g.W : (ch+1)*g.H*g.W]
		}
		for kh := 0; kh < g.KH; kh++ {
			for kw := 0; kw < g.KW; kw++ {
				wv := filt[kh*g.KW+kw]
				owLo, owHi := p.owLo[kw], p.owHi[kw]
				if owLo == owHi {
					continue
				}
				var acc float32
				for oh := p.ohLo[kh]; oh < p.ohHi[kh]; oh++ {
					ih := oh*g.StrideH - g.PadTop + kh*g.DilationH
					iw0 := owLo*g.StrideW - g.PadLeft + kw*g.DilationW
					o := gy[oh*p.ow+owLo : oh*p.ow+owHi]
					if g.StrideW == 1 {
						if dplane != nil {
							d := dplane[ih*g.W+iw0 : ih*g.W+iw0+len(o)]
							for j, v := range o {
								d[j] += wv * v
							}
						}
						if plane != nil {
							in := plane[ih*g.W+iw0 : ih*g.W+iw0+len(o)]
							for j, v := range o {
								acc += v * in[j]
							}
						}
						continue
					}
					iw := iw0
					row := ih * g.W
					for _, v := range o {
						if dplane != nil {
							dplane[row+iw] += wv * v
						}
						if plane != nil {
							acc += v * plane[row+iw]
						}
						iw += g.StrideW
					}
				}
				if dfilt != nil {
					dfilt[kh*g.KW+kw] += acc
				}
			}
		}
	}
	return nil
}

// depthwiseRow3 is the forward loop for three-tap-wide filters (3×3, the
// depthwise shape of MobileNet-style networks): on the output columns
// where all three taps of a filter row fall inside the image, the three
// products are summed before the output is updated, so each output value
// is loaded and stored once per filter row instead of once per tap. The
// few border columns take the tap-by-tap path.
func (p *Im2colPlan) depthwiseRow3(out, plane, filt []float32) {
	g := p.g
	a := max(p.owLo[0], p.owLo[1], p.owLo[2])
	b := min(p.owHi[0], p.owHi[1], p.owHi[2])
	if a > b {
		a, b = 0, 0 // no common interior: every column takes the tap path
	}
	sw, dw := g.StrideW, g.DilationW
	for kh := 0; kh < g.KH; kh++ {
		w0, w1, w2 := filt[kh*3], filt[kh*3+1], filt[kh*3+2]
		for oh := p.ohLo[kh]; oh < p.ohHi[kh]; oh++ {
			ih := oh*g.StrideH - g.PadTop + kh*g.DilationH
			row := plane[ih*g.W : (ih+1)*g.W]
			o := out[oh*p.ow : (oh+1)*p.ow]
			for kw := 0; kw < 3; kw++ {
				wv := filt[kh*3+kw]
				for _, r := range [2][2]int{{p.owLo[kw], min(a, p.owHi[kw])}, {max(b, p.owLo[kw]), p.owHi[kw]}} {
					iw := r[0]*sw - g.PadLeft + kw*dw
					for ow := r[0]; ow < r[1]; ow++ {
						o[ow] += wv * row[iw]
						iw += sw
					}
				}
			}
			if a == b {
				continue
			}
			iw := a*sw - g.PadLeft
			if sw == 1 && dw == 1 {
				oi := o[a:b]
				in := row[iw : iw+len(oi)+2]
				if p.portable {
					row3Go(oi, in, w0, w1, w2)
					continue
				}
				done := row3SIMD(oi, in, w0, w1, w2)
				row3Go(oi[done:], in[done:], w0, w1, w2)
				continue
			}
			for ow := a; ow < b; ow++ {
				o[ow] += w0*row[iw] + w1*row[iw+dw] + w2*row[iw+2*dw]
				iw += sw
			}
		}
	}
}

// row3Go is the portable unit-stride three-tap row loop; in holds
// len(o)+2 values.
func row3Go(o, in []float32, w0, w1, w2 float32) {
	in = in[:len(o)+2]
	for j := range o {
		o[j] += w0*in[j] + w1*in[j+1] + w2*in[j+2]
	}
}
