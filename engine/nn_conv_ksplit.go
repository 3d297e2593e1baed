package engine

import (
	"fmt"
	"runtime"

	"heedmap/kernel"
	"heedmap/tensor"
)

// packedWeightHalf is the memo owner of one input-channel half of a
// pointwise convolution's weights packed as SgemmKMajor's B operand.
type packedWeightHalf struct {
	op   *convOp
	half int
}

func (packedWeightHalf) Forward([]*tensor.Tensor) ([]*tensor.Tensor, error) {
	return nil, fmt.Errorf("packedWeightHalf is a memo key, not an operator")
}

// useKSplit reports whether a layer that takes the row-panel path
// (useRows) is split by input channels (rowForwardKSplit): a pointwise
// projection, with fewer output channels than input ones. The rule reads
// only the shape, never the number of cores, so a layer's sums do not
// depend on the machine.
func (op *convOp) useKSplit(s convShape, kk int) bool {
	return op.useRows(s) && s.pointwise() && s.mg < kk && kk >= 2*kSplitMinHalf
}

// kSplitMinHalf is the fewest input channels a half may have.
const kSplitMinHalf = 32

// kHalves returns where the two input-channel halves of a kk-deep product
// begin and end.
func kHalves(kk int) [3]int { return [3]int{0, kk / 2, kk} }

// rowWeightHalves returns the weights packed as two SgemmKMajor B
// operands, one per input-channel half, made once per graph.
func (op *convOp) rowWeightHalves(w *tensor.Tensor, m, kk int) [2][]float32 {
	_, nr := op.gemm1.Tile()
	kh := kHalves(kk)
	var out [2][]float32
	for h := range out {
		k0, k1 := kh[h], kh[h+1]
		n := (m + nr - 1) / nr * nr * (k1 - k0)
		out[h] = op.arena.derived(w, packedWeightHalf{op, h}, n, func(dst []float32) {
			op.gemm1.PackColumnPanels(dst, w.F32[k0:], m, k1-k0, kk)
		})
	}
	return out
}

// rowForwardKSplit computes a pointwise projection (mg < kk) on the
// row-panel path by halves of its input channels: each half is multiplied
// into its own partial product (positions × channels), one task per
// half and 32-channel panel, and the partials are then added and
// transposed into y with the epilogue, by blocks of 16 positions.
//
// The tasks run half by half, so on two cores the caller, claiming from
// the front, mostly multiplies the first half of the input channels and
// the helper, from the back, the second: about the halves of the input
// that each wrote in the layer before (a depthwise layer split by
// channels, the same way). Split by output channels instead, as
// rowForward does, each core reads every input channel, half of them
// from the other core's cache, where a line took about 250 ns to come
// over on the AMD machine (DEVELOPERS.md, seventh session). Per node,
// the 7×7 projections of MobileNetV2 took 8–25 µs less each, and the
// whole batch-1 forward pass 0.926–0.935 of the time (alternating runs).
//
// Each output is (Σ over the first half) + (Σ over the second half), both
// sums in the kernel's order, then the epilogue: a different rounding
// from one sum over all channels, but the same on every machine and
// number of cores, since the halves depend only on the shape.
func (op *convOp) rowForwardKSplit(xg []float32, g geom2, halves [2][]float32, mg, kk int, yg []float32, ep *epilogue) error {
	ohw := g.oh * g.ow
	kh := kHalves(kk)
	_, nr := op.gemm1.Tile()
	nq := (mg + nr - 1) / nr
	pb := op.scr.get(2 * ohw * mg)
	defer op.scr.put(pb)
	parts := *pb
	blocks := newTaper((ohw+15)/16, runtime.GOMAXPROCS(0))
	return op.team.run([]int{2 * nq, blocks.tasks}, func(phase, t int) error {
		if phase == 0 {
			h, q := t/nq, t%nq
			k0, k1 := kh[h], kh[h+1]
			m0, m1 := q*nr, min(mg, (q+1)*nr)
			part := parts[h*ohw*mg:]
			if !op.gemm1.SgemmKMajor(ohw, m1-m0, k1-k0, xg[k0*ohw:], ohw, halves[h][q*(k1-k0)*nr:], part[m0:], mg) {
				return fmt.Errorf("engine: the %v GEMM has no k-major kernel", op.gemm1.ISA())
			}
			return nil
		}
		b0, b1 := blocks.bounds(t)
		r0, r1 := b0*16, min(b1*16, ohw)
		p0 := parts[r0*mg : r1*mg]
		kernel.AddTo(p0, parts[(ohw+r0)*mg:(ohw+r1)*mg])
		if ep.empty() {
			kernel.Transpose(yg[r0:], ohw, p0, mg, r1-r0, mg)
			return nil
		}
		bias, noBias, res, lo, hi := ep.channels(0, mg)
		if res != nil {
			res = res[r0:]
		}
		kernel.TransposeEpilogue(yg[r0:], ohw, p0, mg, r1-r0, mg, bias, noBias, res, lo, hi)
		return nil
	})
}
