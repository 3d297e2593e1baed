package engine

import (
	"fmt"
	"runtime"

	"heedmap/kernel"
	"heedmap/tensor"
)

// The row-panel path computes a convolution with few output positions
// transposed: Yᵀ (positions × channels) = colᵀ · Wᵀ, through
// kernel.Packed.SgemmRowPanels. A late layer at batch 1 has 49 (7×7) or
// 196 (14×14) positions; as the columns of Y = W·col they fill 49 of 64
// and 196 of 224 columns of the 32-wide tiles, as rows they fill 12-row
// tiles and one 4-row edge tile (52 and 196 rows computed). The weights
// become the packed B operand, packed once per graph (they must be a
// graph constant) and streamed as contiguous panels. Measured on the
// kernel alone (kernel.SgemmRowPanels' doc): the 7×7 and 14×14 ResNet
// products 16 % faster. The im2col of the input is lowered straight into
// 12-row (and edge-row) panels, and the output is transposed back block by
// block while the epilogue is applied.

// packedWeights is the memo owner of a convolution's weights packed as
// SgemmRowPanels' B operand; a distinct type, so the memo entry never
// collides with the Conv's own (the backward's flipped filters).
type packedWeights struct{ op *convOp }

func (packedWeights) Forward([]*tensor.Tensor) ([]*tensor.Tensor, error) {
	return nil, fmt.Errorf("packedWeights is a memo key, not an operator")
}

// useRows reports whether one image and group of this shape goes through
// the row-panel path: constant weights with an arena to keep their packed
// form, the AVX-512 tiles it was measured on, and a map small enough that
// panelForward (not the slab path) would take it.
func (op *convOp) useRows(s convShape) bool {
	return op.constW && op.arena != nil && op.gemm1 != nil && op.group == 1 &&
		op.gemm1.ISA() == kernel.ISAAVX512
}

// rowWeights returns the weights w (m×kk) packed as SgemmRowPanels' B,
// made once per graph.
func (op *convOp) rowWeights(w *tensor.Tensor, m, kk int) []float32 {
	_, nr := op.gemm1.Tile()
	n := (m + nr - 1) / nr * nr * kk
	return op.arena.derived(w, packedWeights{op}, n, func(dst []float32) {
		op.gemm1.PackColumnPanels(dst, w.F32, m, kk, kk)
	})
}

// rowForward computes one image, Y (mg×ohw) = W·col, on the row-panel
// path: pad, lower col into row panels split over the cores, then split
// the output channels by B panels; each block is multiplied into a
// scratch block (positions × channels) and transposed into Y with the
// epilogue.
//
// A pointwise layer skips the padding and the lowering: its input is
// already the k-major A operand (Packed.SgemmKMajor reads it in place).
func (op *convOp) rowForward(plan *kernel.Im2colPlan, xg []float32, cg int, g geom2, wp []float32, mg, kk int, yg []float32, ep *epilogue) error {
	ohw := g.oh * g.ow
	mr, full, edge := op.gemm1.RowPanels(ohw)
	_, nr := op.gemm1.Tile()
	procs := runtime.GOMAXPROCS(0)
	nq := (mg + nr - 1) / nr
	blocks := newTaper(nq, procs)
	parts, cut := rowParts(nq, procs, ohw, mr)
	var a []float32
	var padded paddedInput
	padTasks, fills, npan := 0, 0, full
	if edge > 0 {
		npan++
	}
	// useRows holds only on the AVX-512 path, which has the k-major kernels.
	inPlace := g.pointwise() && op.gemm1.ISA() == kernel.ISAAVX512
	if !inPlace {
		abuf := op.scr.get(op.gemm1.RowPanelsLen(ohw, kk))
		defer op.scr.put(abuf)
		a = *abuf
		var release func()
		padded, padTasks, release = op.padPlan(plan, xg, cg, false)
		defer release()
		fills = min(npan, 2*procs)
	}
	return op.team.run([]int{padTasks, fills, blocks.tasks * parts}, func(phase, t int) error {
		switch phase {
		case 0:
			return padded.pad(t, padTasks, xg, cg)
		case 1:
			p0, p1 := npan*t/fills, npan*(t+1)/fills
			if f1 := min(p1, full); p0 < f1 {
				if err := padded.lower(a[p0*kk*mr:f1*kk*mr], 1, cg, p0*mr, f1*mr, mr); err != nil {
					return err
				}
			}
			if p1 > full {
				return padded.lower(a[full*kk*mr:full*kk*mr+kk*edge], 1, cg, full*mr, ohw, edge)
			}
			return nil
		}
		b, part := t/parts, t%parts
		q0, q1 := blocks.bounds(b)
		m0, m1 := q0*nr, min(q1*nr, mg)
		r0, r1 := 0, ohw
		if parts == 2 {
			r0, r1 = part*cut, cut+part*(ohw-cut)
		}
		if m0 >= m1 {
			return nil
		}
		w, rows := m1-m0, r1-r0
		cb := op.scr.get(rows * w)
		defer op.scr.put(cb)
		c := *cb
		if !inPlace {
			op.gemm1.SgemmRowPanels(rows, w, kk, a[r0*kk:], wp[q0*kk*nr:], c, w)
		} else if !op.gemm1.SgemmKMajor(rows, w, kk, xg[r0:], ohw, wp[q0*kk*nr:], c, w) {
			return fmt.Errorf("engine: the %v GEMM has no k-major kernel", op.gemm1.ISA())
		}
		dst := yg[m0*ohw+r0:]
		if ep.empty() {
			kernel.Transpose(dst, ohw, c, w, rows, w)
			return nil
		}
		// The epilogue as each transposed row is stored, rounded as
		// epilogue.apply rounds.
		bias, noBias, res, lo, hi := ep.channels(m0, m1)
		if res != nil {
			res = res[m0*ohw+r0:]
		}
		kernel.TransposeEpilogue(dst, ohw, c, w, rows, w, bias, noBias, res, lo, hi)
		return nil
	})
}

// rowParts says into how many position ranges rowForward splits each of
// its nq channel blocks, and where the first range ends. Few blocks that
// do not divide evenly over the cores (3 for 96 channels, 5 for 160 on two
// cores) would leave a core idle for a block's time; then each block is
// split into two position halves, cut on a row-panel boundary, so every
// core gets the same share. Splitting every layer this way was measured
// slower (DEVELOPERS.md): each range re-reads the block's weights.
func rowParts(nq, procs, ohw, mr int) (parts, cut int) {
	cut = ohw / 2 / mr * mr
	if nq < 4*procs && nq%procs != 0 && cut > 0 {
		return 2, cut
	}
	return 1, ohw
}

// packedFlipped is the memo owner of the flipped filters (flipFilters)
// packed as SgemmRowPanels' B operand, for the input gradient.
type packedFlipped struct{ op *convOp }

func (packedFlipped) Forward([]*tensor.Tensor) ([]*tensor.Tensor, error) {
	return nil, fmt.Errorf("packedFlipped is a memo key, not an operator")
}

// rowFlippedWeights returns the flipped filters (c×kk, the weights of the
// transposed convolution that gives the input gradient, written by flip
// into a temporary) packed as SgemmRowPanels' B, made once per graph and
// keyed by the weights w.
func (op *convOp) rowFlippedWeights(w *tensor.Tensor, c, kk int, flip func([]float32)) []float32 {
	_, nr := op.gemm1.Tile()
	n := (c + nr - 1) / nr * nr * kk
	return op.arena.derived(w, packedFlipped{op}, n, func(dst []float32) {
		f := make([]float32, c*kk)
		flip(f)
		op.gemm1.PackColumnPanels(dst, f, c, kk, kk)
	})
}
