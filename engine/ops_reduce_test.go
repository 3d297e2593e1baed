package engine

import (
	"math/rand"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

func TestReduceGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(30))
	x := randTensor(rng, -1, 1, 2, 3, 4)
	for _, mean := range []bool{false, true} {
		opType := "ReduceSum"
		if mean {
			opType = "ReduceMean"
		}
		for _, keep := range []int64{0, 1} {
			for _, axes := range [][]int64{{1}, {0, -1}, nil} {
				// Attribute form (ReduceSum < 13, ReduceMean < 18).
				attrs := []*onnx.Attr{attrInt("keepdims", keep)}
				if axes != nil {
					attrs = append(attrs, attrInts("axes", axes...))
				}
				op := mustOp(t, opType, 11, 1, attrs...)
				if err := gradCheck(op, []*tensor.Tensor{x}, gradOpts{}); err != nil {
					t.Errorf("%s axes=%v keepdims=%d (attr): %v", opType, axes, keep, err)
				}
				// Input form (ReduceSum 13+, ReduceMean 18+).
				op = mustOp(t, opType, 18, 1, attrInt("keepdims", keep))
				var ax *tensor.Tensor
				if axes != nil {
					ax = i64s([]int{len(axes)}, axes...)
				}
				if err := gradCheck(op, []*tensor.Tensor{x, ax}, gradOpts{}); err != nil {
					t.Errorf("%s axes=%v keepdims=%d (input): %v", opType, axes, keep, err)
				}
			}
		}
		// noop_with_empty_axes: identity.
		op := mustOp(t, opType, 18, 1, attrInt("noop_with_empty_axes", 1))
		checkGrad(t, op, []*tensor.Tensor{x, i64s([]int{0})}, gradOpts{})
		if y := forward1(t, op, x, i64s([]int{0})); !shapeEq(y.Shape, x.Shape) || y.F32[5] != x.F32[5] {
			t.Errorf("%s noop = %v", opType, y.Shape)
		}
	}
	// Worked example: mean over axis 1 of [[1,2],[3,5]] is [1.5, 4].
	m := tensor.FromFloat32([]float32{1, 2, 3, 5}, 2, 2)
	y := forward1(t, mustOp(t, "ReduceMean", 13, 1, attrInts("axes", 1), attrInt("keepdims", 0)), m)
	if !shapeEq(y.Shape, []int{2}) || y.F32[0] != 1.5 || y.F32[1] != 4 {
		t.Errorf("ReduceMean = %v %v", y.Shape, y.F32)
	}
	// Integer sums for shape arithmetic.
	yi := forward1(t, mustOp(t, "ReduceSum", 13, 1, attrInt("keepdims", 0)), i64s([]int{3}, 2, 3, 4), nil)
	if yi.DType != tensor.Int64 || len(yi.Shape) != 0 || yi.I64[0] != 9 {
		t.Errorf("int ReduceSum = %v %v", yi, yi.I64)
	}
	if _, err := lookupBuild("ReduceSum", 13, attrInts("axes", 1)); err == nil {
		t.Error("ReduceSum-13 accepted axes as an attribute")
	}
}

func lookupBuild(opType string, opset int64, attrs ...*onnx.Attr) (Op, error) {
	b, _ := lookup(opType)
	return b(testNode(opType, 1, attrs...), &Env{Opset: opset})
}

func TestOtherReductionGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(31))
	for _, k := range []redKind{redMax, redMin, redProd, redL1, redL2, redSumSquare, redLogSum, redLogSumExp} {
		name := redNames[k]
		lo, hi := -2.0, 2.0
		if k == redLogSum || k == redProd {
			lo, hi = 0.5, 1.5 // LogSum needs a positive sum; keeps Prod O(1)
		}
		// Max/Min: distinct random values keep the arg-extreme unique; L1
		// keeps away from its kink at 0.
		x := randAwayFrom(rng, lo, hi, 0.02, []float64{0}, 2, 3, 4)
		for _, axes := range [][]int64{{1}, {0, 2}, nil} {
			attrs := []*onnx.Attr{attrInt("keepdims", 0)}
			if axes != nil {
				attrs = append(attrs, attrInts("axes", axes...))
			}
			if err := gradCheck(mustOp(t, name, 13, 1, attrs...), []*tensor.Tensor{x}, gradOpts{}); err != nil {
				t.Errorf("%s axes=%v: %v", name, axes, err)
			}
		}
		ax := i64s([]int{1}, -1)
		if err := gradCheck(mustOp(t, name, 18, 1), []*tensor.Tensor{x, ax}, gradOpts{}); err != nil {
			t.Errorf("%s opset 18: %v", name, err)
		}
	}
	// Prod with zeros: the gradient at a lone zero is the product of the
	// others, and every gradient vanishes with two zeros.
	x := tensor.FromFloat32([]float32{2, 0, 3, 0, 0, 5}, 2, 3)
	op := mustOp(t, "ReduceProd", 13, 1, attrInts("axes", 1))
	y := forward1(t, op, x)
	g, err := op.(Differentiable).Backward([]*tensor.Tensor{x}, []*tensor.Tensor{y}, []*tensor.Tensor{tensor.FromFloat32([]float32{1, 1}, 2, 1)})
	if err != nil {
		t.Fatal(err)
	}
	for i, w := range []float32{0, 6, 0, 0, 0, 0} {
		if g[0].F32[i] != w {
			t.Fatalf("ReduceProd gradient with zeros = %v", g[0].F32)
		}
	}
}
