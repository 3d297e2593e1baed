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
	g := p.g
	if multiplier <= 0 {
		return fmt.Errorf("kernel: depthwise multiplier %d must be positive", multiplier)
	}
	m := g.C * multiplier
	ohw := p.oh * p.ow
	taps := g.KH * g.KW
	switch {
	case len(src) < g.C*g.H*g.W:
		return fmt.Errorf("kernel: depthwise input has %d values, want %d (%d×%d×%d)", len(src), g.C*g.H*g.W, g.C, g.H, g.W)
	case len(w) < m*taps:
		return fmt.Errorf("kernel: depthwise weights have %d values, want %d (%d×%d×%d)", len(w), m*taps, m, g.KH, g.KW)
	case len(dst) < m*ohw:
		return fmt.Errorf("kernel: depthwise output has %d values, want %d (%d×%d×%d)", len(dst), m*ohw, m, p.oh, p.ow)
	}
	for mo := 0; mo < m; mo++ {
		plane := src[(mo/multiplier)*g.H*g.W : (mo/multiplier+1)*g.H*g.W]
		out := dst[mo*ohw : (mo+1)*ohw]
		clear(out)
		filt := w[mo*taps : (mo+1)*taps]
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
