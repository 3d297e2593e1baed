package engine

import (
	"math/rand"
	"testing"

	"heedmap/tensor"
)

func TestIndexOpGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(70))
	// Values spaced 0.02 apart in random order, so ±h never reorders TopK.
	x := tensor.New(3, 4, 5)
	for i, p := range rng.Perm(x.Len()) {
		x.F32[i] = float32(p)*0.02 - 0.6
	}
	for _, largest := range []int64{0, 1} {
		op := mustOp(t, "TopK", 11, 2, attrInt("axis", 1), attrInt("largest", largest))
		checkGrad(t, op, []*tensor.Tensor{x, i64s([]int{1}, 2)}, gradOpts{})
	}
	checkGrad(t, mustOp(t, "Compress", 11, 1, attrInt("axis", 2)),
		[]*tensor.Tensor{x, &tensor.Tensor{DType: tensor.Bool, Shape: []int{4}, I64: []int64{1, 0, 1, 1}}}, gradOpts{})
	checkGrad(t, mustOp(t, "Compress", 11, 1),
		[]*tensor.Tensor{x, &tensor.Tensor{DType: tensor.Bool, Shape: []int{5}, I64: []int64{0, 1, 1, 0, 1}}}, gradOpts{})
	checkGrad(t, mustOp(t, "GatherND", 13, 1), []*tensor.Tensor{x, i64s([]int{2, 2}, 0, 1, 2, -1)}, gradOpts{})
	checkGrad(t, mustOp(t, "GatherND", 13, 1, attrInt("batch_dims", 1)), []*tensor.Tensor{x, i64s([]int{3, 1}, 1, 0, 3)}, gradOpts{})
	upd := randTensor(rng, -1, 1, 3, 2, 5)
	ind := i64s([]int{3, 2, 5}, 0, 1, 2, 3, 0, 3, 2, 1, 0, 3, 1, 1, 1, 1, 1, 2, 0, 0, 2, 2, 0, 1, 2, 3, 3, 3, 2, 1, 0, 1)
	for _, red := range []string{"none", "add"} {
		op := mustOp(t, "ScatterElements", 16, 1, attrInt("axis", 1), attrString("reduction", red))
		checkGrad(t, op, []*tensor.Tensor{x, ind, upd}, gradOpts{})
	}
	nd := mustOp(t, "ScatterND", 16, 1, attrString("reduction", "add"))
	checkGrad(t, nd, []*tensor.Tensor{x, i64s([]int{2, 2}, 0, 1, 2, 3), randTensor(rng, -1, 1, 2, 5)}, gradOpts{})
	checkGrad(t, mustOp(t, "Shrink", 9, 1, attrFloat("lambd", 0.3), attrFloat("bias", 0.1)),
		[]*tensor.Tensor{randAwayFrom(rng, -1, 1, 0.02, []float64{-0.3, 0.3}, 2, 3)}, gradOpts{})
}
