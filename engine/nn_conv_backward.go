package engine

import (
	"runtime"

	"heedmap/kernel"
	"heedmap/tensor"
)

// BackwardNeeds implements BackwardNeeder: the output is not needed.
func (op *convOp) BackwardNeeds() (in, out []int) { return []int{0, 1}, nil }

// BackwardNeedsFor implements SelectiveBackward: dX reads W, dW reads X.
func (op *convOp) BackwardNeedsFor(need []bool) (in, out []int) {
	if need[0] {
		in = append(in, 1)
	}
	if len(need) > 1 && need[1] {
		in = append(in, 0)
	}
	return in, nil
}

func (op *convOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return op.BackwardFor(in, out, gradOut, []bool{true, true, true})
}

// BackwardFor implements SelectiveBackward. With constant weights (every
// attribution) only dX is computed: for unit-stride layers, 1×1 included,
// as the forward convolution of dY with flipped filters (see
// transposedBackwardX; 1.2–2× faster than the GEMM below on ResNet-18 and
// MobileNetV2 layers, measured); for strided ones as col2im(Wᵀ·dY).
func (op *convOp) BackwardFor(in, out, gradOut []*tensor.Tensor, need []bool) ([]*tensor.Tensor, error) {
	return op.backwardFor(in, out, gradOut, need, nil)
}

// backwardMemo implements memoBackward: with constant weights the flipped
// filters are made once per graph instead of once per pass. Flipping is a
// scatter over every weight (11 M for ResNet-18) and took a fifth of a
// forward+backward pass at batch 1 when redone per call.
func (op *convOp) backwardMemo(in, out, gradOut []*tensor.Tensor, need []bool, memo memoFunc) ([]*tensor.Tensor, error) {
	return op.backwardFor(in, out, gradOut, need, memo)
}

func (op *convOp) backwardFor(in, out, gradOut []*tensor.Tensor, need []bool, memo memoFunc) ([]*tensor.Tensor, error) {
	x, w, dy := in[0], in[1], gradOut[0]
	s, err := op.shape(x, w)
	if err != nil {
		return nil, err
	}
	g := s.g
	ihw, ohw := g.ih*g.iw, g.oh*g.ow
	needX, needW := need[0], len(need) > 1 && need[1]
	var dx, dw *tensor.Tensor
	plan, perr := op.plans.plan(g)
	// The input gradient of a unit-stride layer is a forward convolution
	// of dY with the flipped filters, which overwrites dX, as the planned
	// depthwise path does; col2im and the direct depthwise loop accumulate
	// into a zeroed one.
	var flipped []float32
	tg, transposed := transposedGeom(g)
	transposed = transposed && needX && !s.depthwise() && op.gemm1 != nil
	if transposed {
		if _, err := op.tplans.plan(tg); err != nil {
			transposed = false
		}
	}
	// 3×3 layers: the transposed convolution on the Winograd path
	// (nn_conv_winograd.go), for all images at once.
	winoX := transposed && op.useWinograd(tg, s.m, s.c)
	if needX {
		if transposed || (op.gemm1 != nil && !s.depthwise()) || (s.depthwise() && perr == nil) {
			// Overwritten, or (col2im) cleared image by image just
			// before it is scattered into, while that part is cached.
			dx = op.arena.tensor(x.Shape...)
		} else {
			dx = op.arena.zeroed(x.Shape...)
		}
	}
	// wt holds each group's Wᵀ (kk×mg) for the strided input gradient's
	// Wᵀ·dY, made once per graph through the memo: the GEMM then reads it
	// in place (its direct kernels) instead of packing a transposed A on
	// every call. It is one value longer than W, so the memo, keyed by
	// the weight tensor, never hands it out as the flipped filters (a
	// length mismatch rebuilds).
	var wt []float32
	if needX && !transposed && !s.depthwise() && op.gemm1 != nil && memo != nil {
		wt = memo(1, len(w.F32)+1, func(f []float32) { transposeGroups(f, w.F32, op.group, s.mg, s.cg*g.kh*g.kw) })
	}
	// Small maps at batch 1 with constant weights: the transposed
	// convolution on the row-panel path (nn_conv_rows.go), with the
	// flipped filters packed once per graph; the plain flipped filters
	// are then not kept as well.
	var rowFlipped []float32
	var tplan *kernel.Im2colPlan
	rowsX := false
	if needX && transposed && !winoX && s.n == 1 && memo != nil && op.useRows(s) {
		tkk := s.m * g.kh * g.kw
		if p, err := op.tplans.plan(tg); err == nil && !op.useSlabs(tkk, tg.oh*tg.ow) {
			tplan, rowsX = p, true
			rowFlipped = op.rowFlippedWeights(w, s.c, tkk, func(f []float32) {
				flipFilters(f, w.F32, op.group, s.mg, s.cg, g.kh*g.kw)
			})
		}
	}
	if transposed && !rowsX && !winoX {
		build := func(f []float32) { flipFilters(f, w.F32, op.group, s.mg, s.cg, g.kh*g.kw) }
		if memo != nil {
			flipped = memo(1, len(w.F32), build)
		}
		if flipped == nil {
			// Once per call, not once per image.
			flipped = op.arena.floats(len(w.F32))
			defer op.arena.put(flipped)
			build(flipped)
		}
	}
	if needW {
		dw = tensor.New(w.Shape...)
	}
	if s.depthwise() {
		if perr != nil {
			depthwiseBackward(x.F32, w.F32, dy.F32, dx, dw, s)
		} else {
			var dxs, dws []float32
			if dx != nil {
				dxs = dx.F32
			}
			if dw != nil {
				dws = dw.F32
			}
			if err := op.planDepthwiseBackward(plan, x.F32, w.F32, dy.F32, dxs, dws, s); err != nil {
				return nil, err
			}
		}
	} else if needX || needW {
		kk := s.cg * g.kh * g.kw
		pw := s.pointwise()
		// Column buffers only for the paths that use them: the weight
		// gradient's im2col and the strided input gradient's col2im.
		var col, dcol []float32
		if !pw && needW {
			b := op.scr.get(kk * ohw)
			defer op.scr.put(b)
			col = *b
		}
		// A large strided input gradient goes band by band
		// (bandedInputGrad) and needs no whole column matrix.
		banded := !pw && needX && !transposed && perr == nil && wt != nil && op.gemm1 != nil && kk*ohw >= bandedMin
		if !pw && needX && !transposed && !banded {
			b := op.scr.get(kk * ohw)
			defer op.scr.put(b)
			dcol = *b
		}
		batchedX := false
		if winoX {
			if err := op.winogradForward(dy.F32, s.n, s.m, tg, op.winoFilter(w, s.c, s.m, true), s.c, dx.F32, nil); err != nil {
				return nil, err
			}
			batchedX = true
		}
		if needX && transposed && !winoX && op.group == 1 && s.n > 1 && op.gemm1 != nil {
			// Several images with small maps: their input gradients as one
			// batched transposed convolution (see batchForward).
			tkk := s.m * tg.kh * tg.kw
			if tplan, err := op.tplans.plan(tg); err == nil && !op.useSlabs(tkk, tg.oh*tg.ow) {
				if err := op.batchForward(tplan, dy.F32, s.n, s.m, tg, flipped, s.c, tkk, dx.F32, nil); err != nil {
					return nil, err
				}
				batchedX = true
			}
		}
		for n := 0; n < s.n; n++ {
			for gi := 0; gi < op.group; gi++ {
				off := (n*s.c + gi*s.cg) * ihw
				dyg := dy.F32[(n*s.m+gi*s.mg)*ohw : (n*s.m+(gi+1)*s.mg)*ohw]
				if needW {
					xg := x.F32[off : off+s.cg*ihw]
					src := xg
					if !pw {
						if perr != nil {
							im2col(xg, s.cg, g, col)
						} else if err := planIm2col(plan, xg, s.cg, g, col); err != nil {
							return nil, err
						}
						src = col
					}
					// dW_g += dY_g · colᵀ
					dwg := dw.F32[gi*s.mg*kk : (gi+1)*s.mg*kk]
					op.gemm.Sgemm(false, true, s.mg, kk, ohw, 1, dyg, ohw, src, ohw, 1, dwg, kk)
				}
				if !needX || batchedX {
					continue
				}
				dxg := dx.F32[off : off+s.cg*ihw]
				if rowsX {
					if err := op.rowForward(tplan, dyg, s.mg, tg, rowFlipped, s.cg, s.mg*tg.kh*tg.kw, dxg, nil); err != nil {
						return nil, err
					}
					continue
				}
				if transposed {
					if err := op.transposedBackwardX(tg, flipped[gi*s.mg*kk:(gi+1)*s.mg*kk], s.cg, s.mg, dyg, dxg); err != nil {
						return nil, err
					}
					continue
				}
				if banded {
					if err := op.bandedInputGrad(plan, wt[gi*s.mg*kk:(gi+1)*s.mg*kk], dyg, s.cg, s.mg, kk, g, dxg); err != nil {
						return nil, err
					}
					continue
				}
				// dcol = W_gᵀ · dY_g, scattered back onto dX. (Handing the
				// GEMM a transposed copy of W measured no faster.)
				wg := w.F32[gi*s.mg*kk : (gi+1)*s.mg*kk]
				dst := dcol
				if pw {
					dst = dxg
				}
				if wt != nil {
					op.gemm.Sgemm(false, false, kk, ohw, s.mg, 1, wt[gi*s.mg*kk:(gi+1)*s.mg*kk], s.mg, dyg, ohw, 0, dst, ohw)
				} else {
					op.gemm.Sgemm(true, false, kk, ohw, s.mg, 1, wg, kk, dyg, ohw, 0, dst, ohw)
				}
				if pw {
					continue
				}
				switch {
				case perr != nil:
					if op.gemm1 != nil {
						clearParallel(dxg)
					}
					col2im(dcol, s.cg, g, dxg)
				default:
					// dX was zeroed when allocated unless the packed
					// path took an unzeroed buffer (see above).
					if err := planCol2im(op.team, plan, dcol, s.cg, g, dxg, op.gemm1 != nil); err != nil {
						return nil, err
					}
				}
			}
		}
	}
	res := []*tensor.Tensor{dx, dw, nil}
	if len(in) > 2 && in[2] != nil && need[2] {
		db := tensor.New(in[2].Shape...)
		for n := 0; n < s.n; n++ {
			for m := 0; m < s.m; m++ {
				var acc float32
				for _, v := range dy.F32[(n*s.m+m)*ohw : (n*s.m+m+1)*ohw] {
					acc += v
				}
				db.F32[m] += acc
			}
		}
		res[2] = db
	}
	return res[:len(in)], nil
}

// bandedMin is the column-matrix size (floats) from which a strided
// input gradient is formed band by band: 1 MiB, about an L2's worth.
const bandedMin = 1 << 18

// bandedInputGrad computes one image and group's strided input gradient,
// dX = col2im(Wᵀ·dY) with wtg = Wᵀ (kk×mg), by bands of output rows: each
// band's columns are multiplied into a cache-sized buffer and scattered
// onto dX at once (kernel.Col2imOutRows), instead of writing the whole
// column matrix (7 MiB for ResNet-18's first layer) and reading it back.
// Bands two apart share no row of dX, so the even bands run concurrently,
// then the odd ones; the band height depends only on the shapes, so the
// sums, whose order differs from one whole col2im where bands overlap,
// are the same on any number of cores.
func (op *convOp) bandedInputGrad(plan *kernel.Im2colPlan, wtg, dyg []float32, cg, mg, kk int, g geom2, dxg []float32) error {
	ohw, ihw, khw := g.oh*g.ow, g.ih*g.iw, g.kh*g.kw
	rows := max(1, (g.kh-1)*g.dh/g.sh, slabFloats/(kk*g.ow))
	bands := (g.oh + rows - 1) / rows
	clears := min(g.ih, 2*runtime.GOMAXPROCS(0))
	return op.team.run([]int{clears, (bands + 1) / 2, bands / 2}, func(phase, t int) error {
		if phase == 0 {
			y0, y1 := g.ih*t/clears, g.ih*(t+1)/clears
			for ch := 0; ch < cg; ch++ {
				clear(dxg[ch*ihw+y0*g.iw : ch*ihw+y1*g.iw])
			}
			return nil
		}
		b := 2*t + phase - 1
		oh0, oh1 := b*rows, min((b+1)*rows, g.oh)
		cols := (oh1 - oh0) * g.ow
		buf := op.scr.get(kk * cols)
		defer op.scr.put(buf)
		op.gemm1.Sgemm(false, false, kk, cols, mg, 1, wtg, mg, dyg[oh0*g.ow:], ohw, 0, *buf, cols)
		for ch := 0; ch < cg; ch++ {
			if err := plan.Col2imOutRows(dxg[ch*ihw:(ch+1)*ihw], (*buf)[ch*khw*cols:(ch+1)*khw*cols], oh0, oh1); err != nil {
				return err
			}
		}
		return nil
	})
}

// transposedGeom returns the geometry of the input gradient of a
// unit-stride, undilated convolution written as a convolution of dY: with
// the filters flipped in space and the channel axes swapped, dX is dY
// convolved with pads k−1−p on each side (the "full" correlation), whose
// output size is exactly the input's. ok is false when the convolution is
// strided or dilated, or a pad exceeds k−1.
func transposedGeom(g geom2) (t geom2, ok bool) {
	if g.sh != 1 || g.sw != 1 || g.dh != 1 || g.dw != 1 {
		return t, false
	}
	t = geom2{
		ih: g.oh, iw: g.ow, kh: g.kh, kw: g.kw, sh: 1, sw: 1, dh: 1, dw: 1,
		pt: g.kh - 1 - g.pt, pl: g.kw - 1 - g.pl, pb: g.kh - 1 - g.pb, pr: g.kw - 1 - g.pr,
		oh: g.ih, ow: g.iw,
	}
	if t.pt < 0 || t.pl < 0 || t.pb < 0 || t.pr < 0 || t.ih+t.pt+t.pb-t.kh+1 != t.oh || t.iw+t.pl+t.pr-t.kw+1 != t.ow {
		return t, false
	}
	return t, true
}

// flipFilters writes, for each of the groups, the filters of the
// transposed convolution that gives the input gradient: with the spatial
// taps reversed and the channel axes swapped,
// F[c][m][ki][kj] = W[m][c][kh−1−ki][kw−1−kj] (cg×mg filters per group).
// It goes by 16×16 tiles of (m, c), so reads and writes both run along
// rows of 16·kh·kw floats instead of one side striding a whole row per
// filter.
func flipFilters(f, w []float32, groups, mg, cg, khw int) {
	const tile = 16
	for gi := 0; gi < groups; gi++ {
		wg := w[gi*mg*cg*khw : (gi+1)*mg*cg*khw]
		fg := f[gi*mg*cg*khw : (gi+1)*mg*cg*khw]
		for c0 := 0; c0 < cg; c0 += tile {
			for m0 := 0; m0 < mg; m0 += tile {
				for c := c0; c < min(c0+tile, cg); c++ {
					for m := m0; m < min(m0+tile, mg); m++ {
						src := wg[(m*cg+c)*khw : (m*cg+c+1)*khw]
						dst := fg[(c*mg+m)*khw : (c*mg+m+1)*khw]
						for t, v := range src {
							dst[khw-1-t] = v
						}
					}
				}
			}
		}
	}
}

// transposedBackwardX computes one image and group's input gradient dxg
// (cg×ih·iw, overwritten) of a unit-stride convolution as the forward
// convolution of dyg (mg×oh·ow) with the flipped, channel-swapped filters
// fg (see flipFilters), instead of the K×N matrix Wᵀ·dY followed by a
// col2im scatter: the same multiply-adds, without the column matrix going
// through memory, and through the forward's packed-panel paths with both
// cores busy: slab by slab for large maps, one shared panel matrix split
// by output channels for small ones (7×7 and 14×14 layers, which the
// Wᵀ·dY GEMM and its col2im served before).
func (op *convOp) transposedBackwardX(tg geom2, fg []float32, cg, mg int, dyg, dxg []float32) error {
	plan, err := op.tplans.plan(tg)
	if err != nil {
		return err
	}
	kk := mg * tg.kh * tg.kw
	if op.useSlabs(kk, tg.oh*tg.ow) {
		return op.slabForward(plan, dyg, mg, tg, fg, cg, kk, dxg, nil, 0)
	}
	return op.panelForward(plan, dyg, mg, tg, fg, cg, kk, dxg, nil, 0)
}

// transposeGroups writes each group's weight matrix transposed:
// wt[g][r][m] = w[g][m][r] for the mg×kk matrix of group g, by 16×16 tiles
// so reads and writes both stay within a few cache lines.
func transposeGroups(wt, w []float32, groups, mg, kk int) {
	const tile = 16
	for gi := 0; gi < groups; gi++ {
		src := w[gi*mg*kk : (gi+1)*mg*kk]
		dst := wt[gi*mg*kk : (gi+1)*mg*kk]
		for m0 := 0; m0 < mg; m0 += tile {
			for r0 := 0; r0 < kk; r0 += tile {
				for m := m0; m < min(m0+tile, mg); m++ {
					for r := r0; r < min(r0+tile, kk); r++ {
						dst[r*mg+m] = src[m*kk+r]
					}
				}
			}
		}
	}
}
