package engine

import (
	"sync"

	"heedmap/kernel"
	"heedmap/tensor"
)

// depthwiseForwardPlanned computes a depthwise convolution (one input
// channel per group) into y, through the plan when there is one (perr is
// nil) and the direct loops otherwise. It reports whether it also applied
// the epilogue ep (bias and fused activation); when it did not, the caller
// applies it. The planned path always does: the kernel adds the bias and
// clamps as it writes each output row, so the output plane is written
// once instead of twice.
func (op *convOp) depthwiseForwardPlanned(plan *kernel.Im2colPlan, perr error, x, w, y []float32, s convShape, ep *epilogue) (epDone bool, err error) {
	if perr != nil {
		depthwiseForward(x, w, y, s)
		return false, nil
	}
	return true, op.planDepthwise(plan, x, w, y, s, ep)
}

// kernelEpilogue translates ep into the kernel's bias-and-clamp form:
// Relu is max(v, 0) and Clip min(hi, max(lo, v)), exactly as the
// epilogue's own apply (and those ops' forward) computes them.
func kernelEpilogue(ep *epilogue) kernel.DepthwiseEpilogue {
	if ep == nil {
		return kernel.Unclamped(nil)
	}
	k := kernel.Unclamped(ep.bias)
	switch ep.act {
	case actRelu:
		k.Lo = 0
	case actClip:
		k.Lo, k.Hi = ep.lo, ep.hi
	}
	return k
}

// planDepthwise computes a depthwise convolution through the kernel
// package's padded-plane kernels with the epilogue ep fused, splitting
// (image, channel) planes over goroutines (at batch 1 there are still
// 32–960 channel planes per layer to share). Each goroutine takes one
// scratch plane from the convolution's buffer pool for all its planes.
func (op *convOp) planDepthwise(p *kernel.Im2colPlan, x, w, y []float32, s convShape, ep *epilogue) error {
	g := s.g
	ohw, khw := g.oh*g.ow, g.kh*g.kw
	planes := s.n * s.c
	kep := kernelEpilogue(ep)
	var firstErr error
	var mu sync.Mutex
	op.team.split(planes, planes*s.mg*ohw*khw, func(p0, p1 int) {
		buf := op.scr.get(p.DepthwiseScratch())
		defer op.scr.put(buf)
		if err := p.DepthwisePlanes(y, x, w, s.c, s.mg, p0, p1, &kep, *buf); err != nil {
			mu.Lock()
			firstErr = err
			mu.Unlock()
		}
	})
	return firstErr
}

// planDepthwiseBackward computes dx and accumulates dw (either may be
// nil) for the depthwise path. dx is overwritten, every value of it, so
// it need not be zeroed (unlike the direct path, depthwiseBackward, which
// adds). Work is split by input channel so each goroutine owns the dx
// planes and dw rows it writes; images are summed inside. Each goroutine
// hands its whole run of channels to one kernel call with one scratch
// area from the convolution's pool.
func (op *convOp) planDepthwiseBackward(p *kernel.Im2colPlan, x, w, dy, dx, dw []float32, s convShape) error {
	g := s.g
	ohw, khw := g.oh*g.ow, g.kh*g.kw
	var firstErr error
	var mu sync.Mutex
	op.team.split(s.c, s.n*s.m*ohw*khw, func(c0, c1 int) {
		buf := op.scr.get(p.DepthwiseBackwardScratch())
		defer op.scr.put(buf)
		scratch := *buf
		var xs []float32
		if dw != nil { // x is not retained when only dx is wanted
			xs = x
		}
		if err := p.DepthwiseBackwardPlanes(dx, dw, dy, xs, w, s.n, s.c, s.mg, c0, c1, scratch, true); err != nil {
			mu.Lock()
			firstErr = err
			mu.Unlock()
		}
	})
	return firstErr
}

// depthwiseForward computes a convolution with one input channel per group
// (and mg = m/c output channels per group, the channel multiplier) directly.
func depthwiseForward(x, w, y []float32, s convShape) {
	g := s.g
	ihw, ohw, khw := g.ih*g.iw, g.oh*g.ow, g.kh*g.kw
	planes := s.n * s.m
	splitWork(planes, planes*ohw*khw, func(p0, p1 int) {
		for p := p0; p < p1; p++ {
			n, m := p/s.m, p%s.m
			ch := m / s.mg
			src := x[(n*s.c+ch)*ihw : (n*s.c+ch+1)*ihw]
			ker := w[m*khw : (m+1)*khw]
			dst := y[p*ohw : (p+1)*ohw]
			for oy := 0; oy < g.oh; oy++ {
				for ox := 0; ox < g.ow; ox++ {
					var acc float32
					for ki := 0; ki < g.kh; ki++ {
						iy := oy*g.sh - g.pt + ki*g.dh
						if iy < 0 || iy >= g.ih {
							continue
						}
						row := src[iy*g.iw : (iy+1)*g.iw]
						for kj := 0; kj < g.kw; kj++ {
							ix := ox*g.sw - g.pl + kj*g.dw
							if ix >= 0 && ix < g.iw {
								acc += row[ix] * ker[ki*g.kw+kj]
							}
						}
					}
					dst[oy*g.ow+ox] = acc
				}
			}
		}
	})
}

// depthwiseBackward accumulates dX and dW (each skipped when nil) for the
// direct depthwise path. Work is split by input channel so each goroutine
// owns the dX planes and dW rows it writes.
func depthwiseBackward(x, w, dy []float32, dxT, dwT *tensor.Tensor, s convShape) {
	var dx, dw []float32
	if dxT != nil {
		dx = dxT.F32
	}
	if dwT != nil {
		dw = dwT.F32
	}
	g := s.g
	ihw, ohw, khw := g.ih*g.iw, g.oh*g.ow, g.kh*g.kw
	splitWork(s.c, s.n*s.m*ohw*khw, func(c0, c1 int) {
		for ch := c0; ch < c1; ch++ {
			for m := ch * s.mg; m < (ch+1)*s.mg; m++ {
				ker := w[m*khw : (m+1)*khw]
				var dker, src, dsrc []float32
				if dw != nil {
					dker = dw[m*khw : (m+1)*khw]
				}
				for n := 0; n < s.n; n++ {
					if dw != nil {
						src = x[(n*s.c+ch)*ihw : (n*s.c+ch+1)*ihw]
					}
					if dx != nil {
						dsrc = dx[(n*s.c+ch)*ihw : (n*s.c+ch+1)*ihw]
					}
					gy := dy[(n*s.m+m)*ohw : (n*s.m+m+1)*ohw]
					for oy := 0; oy < g.oh; oy++ {
						for ox := 0; ox < g.ow; ox++ {
							gv := gy[oy*g.ow+ox]
							if gv == 0 {
								continue
							}
							for ki := 0; ki < g.kh; ki++ {
								iy := oy*g.sh - g.pt + ki*g.dh
								if iy < 0 || iy >= g.ih {
									continue
								}
								for kj := 0; kj < g.kw; kj++ {
									ix := ox*g.sw - g.pl + kj*g.dw
									if ix >= 0 && ix < g.iw {
										j := iy*g.iw + ix
										if dker != nil {
											dker[ki*g.kw+kj] += gv * src[j]
										}
										if dsrc != nil {
											dsrc[j] += gv * ker[ki*g.kw+kj]
										}
									}
								}
							}
						}
					}
				}
			}
		}
	})
}
