package engine

import (
	"math/rand"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

func TestConcatSplitGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(20))
	for _, axis := range []int64{0, 1, -1} {
		op := mustOp(t, "Concat", 13, 1, attrInt("axis", axis))
		var ins []*tensor.Tensor
		for k := 1; k <= 3; k++ {
			shape := []int{2, 3, 2}
			ax := int(axis)
			if ax < 0 {
				ax += 3
			}
			shape[ax] = k
			ins = append(ins, randTensor(rng, -1, 1, shape...))
		}
		if err := gradCheck(op, ins, gradOpts{}); err != nil {
			t.Errorf("Concat axis %d: %v", axis, err)
		}
	}
	x := randTensor(rng, -1, 1, 2, 7, 3)
	// Opset 11: sizes as attribute.
	checkGrad(t, mustOp(t, "Split", 11, 2, attrInt("axis", 1), attrInts("split", 3, 4)), []*tensor.Tensor{x}, gradOpts{})
	// Opset 13: sizes as input, including a zero-size piece.
	op13 := mustOp(t, "Split", 13, 3, attrInt("axis", -2))
	checkGrad(t, op13, []*tensor.Tensor{x, i64s([]int{3}, 2, 0, 5)}, gradOpts{})
	// Opset 18: num_outputs with a smaller last piece.
	op18 := mustOp(t, "Split", 18, 3, attrInt("axis", 1), attrInt("num_outputs", 3))
	checkGrad(t, op18, []*tensor.Tensor{x}, gradOpts{})
	outs, err := op18.Forward([]*tensor.Tensor{x})
	if err != nil {
		t.Fatal(err)
	}
	// ONNX Split-18 specification: ceil(7/3) = 3, so pieces 3, 3, 1.
	for i, want := range []int{3, 3, 1} {
		if outs[i].Shape[1] != want {
			t.Errorf("num_outputs piece %d has %d, want %d", i, outs[i].Shape[1], want)
		}
	}
	// Equal split must divide.
	if _, err := mustOp(t, "Split", 13, 2, attrInt("axis", 1)).Forward([]*tensor.Tensor{x}); err == nil {
		t.Error("uneven equal split of 7 into 2 accepted")
	}
}

func TestSliceGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(21))
	x := randTensor(rng, -1, 1, 4, 5, 6)
	op := mustOp(t, "Slice", 13, 1)
	cases := [][4][]int64{
		{{1, 0}, {3, -1}, {0, 2}, nil},
		{{-1}, {-1 << 62}, {1}, {-2}},          // negative step from the end, clamped end
		{{100, 1}, {-100, 5}, {2, 0}, {-1, 2}}, // clamped start with negative step
		{{0, 0, 0}, {1 << 62, 2, 6}, nil, nil}, // default axes
		{{2}, {2}, {-1}, {1}},                  // empty result
		{{-3, 1}, {1 << 62, 4}, {-1, -3}, nil}, // negative axes
	}
	for _, c := range cases {
		in := []*tensor.Tensor{x, i64s([]int{len(c[0])}, c[0]...), i64s([]int{len(c[1])}, c[1]...), nil, nil}
		if c[2] != nil {
			in[3] = i64s([]int{len(c[2])}, c[2]...)
		}
		if c[3] != nil {
			in[4] = i64s([]int{len(c[3])}, c[3]...)
		}
		if err := gradCheck(op, in, gradOpts{}); err != nil {
			t.Errorf("Slice %v: %v", c, err)
		}
	}
	// Worked example: x[:, ::-2] of a 2×5 matrix (ONNX Slice semantics, as numpy).
	m := tensor.FromFloat32([]float32{0, 1, 2, 3, 4, 5, 6, 7, 8, 9}, 2, 5)
	y := forward1(t, op, m, i64s([]int{1}, -1), i64s([]int{1}, -1<<62), i64s([]int{1}, 1), i64s([]int{1}, -2))
	want := []float32{4, 2, 0, 9, 7, 5}
	if !shapeEq(y.Shape, []int{2, 3}) {
		t.Fatalf("shape %v", y.Shape)
	}
	for i := range want {
		if y.F32[i] != want[i] {
			t.Fatalf("x[:, ::-2] = %v, want %v", y.F32, want)
		}
	}
	// Opset 9: attributes.
	op9 := mustOp(t, "Slice", 9, 1, attrInts("starts", 1), attrInts("ends", 1000), attrInts("axes", 2))
	checkGrad(t, op9, []*tensor.Tensor{x}, gradOpts{})
	// Slicing int64 shape tensors (Shape → Slice in exported graphs).
	si := forward1(t, op, i64s([]int{4}, 1, 3, 224, 224), i64s([]int{1}, 2), i64s([]int{1}, 4))
	if si.DType != tensor.Int64 || len(si.I64) != 2 || si.I64[0] != 224 {
		t.Errorf("int Slice = %v", si.I64)
	}
}

func TestGatherGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(22))
	x := randTensor(rng, -1, 1, 3, 4, 3)
	for axis := int64(-3); axis < 3; axis++ {
		op := mustOp(t, "Gather", 13, 1, attrInt("axis", axis))
		ind := i64s([]int{2, 2}, 0, -1, 2, 0) // repeated and negative indices
		if err := gradCheck(op, []*tensor.Tensor{x, ind}, gradOpts{}); err != nil {
			t.Errorf("Gather axis %d: %v", axis, err)
		}
	}
	op := mustOp(t, "Gather", 13, 1, attrInt("axis", 1))
	y := forward1(t, op, x, i64s(nil, -1)) // scalar index drops the axis
	if !shapeEq(y.Shape, []int{3, 3}) || y.F32[0] != x.F32[9] {
		t.Errorf("scalar Gather = %v %v", y.Shape, y.F32)
	}
	if _, err := op.Forward([]*tensor.Tensor{x, i64s([]int{1}, 4)}); err == nil {
		t.Error("out-of-range index accepted")
	}
}

func TestTransposeSqueezeExpandGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(23))
	x := randTensor(rng, -1, 1, 2, 3, 4)
	checkGrad(t, mustOp(t, "Transpose", 13, 1, attrInts("perm", 2, 0, 1)), []*tensor.Tensor{x}, gradOpts{})
	checkGrad(t, mustOp(t, "Transpose", 13, 1), []*tensor.Tensor{x}, gradOpts{})
	y := forward1(t, mustOp(t, "Transpose", 13, 1, attrInts("perm", 1, 2, 0)), x)
	// y[j][k][i] = x[i][j][k]
	if !shapeEq(y.Shape, []int{3, 4, 2}) || y.F32[(1*4+2)*2+1] != x.F32[(1*3+1)*4+2] {
		t.Errorf("Transpose element mismatch")
	}

	s := randTensor(rng, -1, 1, 1, 3, 1, 2)
	checkGrad(t, mustOp(t, "Squeeze", 11, 1, attrInts("axes", 0, -2)), []*tensor.Tensor{s}, gradOpts{})
	checkGrad(t, mustOp(t, "Squeeze", 13, 1), []*tensor.Tensor{s, i64s([]int{1}, 2)}, gradOpts{})
	if y := forward1(t, mustOp(t, "Squeeze", 13, 1), s); !shapeEq(y.Shape, []int{3, 2}) {
		t.Errorf("Squeeze all = %v", y.Shape)
	}
	if _, err := mustOp(t, "Squeeze", 13, 1).Forward([]*tensor.Tensor{s, i64s([]int{1}, 1)}); err == nil {
		t.Error("squeezing a size-3 axis accepted")
	}
	checkGrad(t, mustOp(t, "Unsqueeze", 11, 1, attrInts("axes", 0, 4)), []*tensor.Tensor{x}, gradOpts{})
	u := mustOp(t, "Unsqueeze", 13, 1)
	checkGrad(t, u, []*tensor.Tensor{x, i64s([]int{2}, -1, 1)}, gradOpts{})
	if y := forward1(t, u, x, i64s([]int{2}, -1, 1)); !shapeEq(y.Shape, []int{2, 1, 3, 4, 1}) {
		t.Errorf("Unsqueeze [-1,1] = %v", y.Shape)
	}

	e := mustOp(t, "Expand", 13, 1)
	checkGrad(t, e, []*tensor.Tensor{randTensor(rng, -1, 1, 3, 1), i64s([]int{3}, 2, 1, 4)}, gradOpts{})
	if y := forward1(t, e, randTensor(rng, -1, 1, 3, 1), i64s([]int{1}, 1)); !shapeEq(y.Shape, []int{3, 1}) {
		t.Errorf("Expand to smaller shape = %v (bidirectional broadcast keeps [3 1])", y.Shape)
	}
}

func TestPadGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(24))
	x := randTensor(rng, -1, 1, 2, 3, 4)
	pads := i64s([]int{6}, 0, 2, 3, 1, -1, 2) // includes a negative pad (crop)
	for _, mode := range []string{"constant", "reflect", "edge", "wrap"} {
		op := mustOp(t, "Pad", 13, 1, attrString("mode", mode))
		if err := gradCheck(op, []*tensor.Tensor{x, pads, tensor.FromFloat32([]float32{0.5})}, gradOpts{}); err != nil {
			t.Errorf("Pad %s: %v", mode, err)
		}
	}
	// Reflect on a 1×4 row, pads 3 and 2: numpy.pad(..., 'reflect') gives
	// [3 2 1 | 0 1 2 3 | 2 1].
	row := tensor.FromFloat32([]float32{0, 1, 2, 3}, 1, 4)
	y := forward1(t, mustOp(t, "Pad", 13, 1, attrString("mode", "reflect")), row, i64s([]int{4}, 0, 3, 0, 2))
	want := []float32{3, 2, 1, 0, 1, 2, 3, 2, 1}
	for i := range want {
		if y.F32[i] != want[i] {
			t.Fatalf("reflect pad = %v, want %v", y.F32, want)
		}
	}
	// Opset 2: attributes; opset 18: axes input.
	checkGrad(t, mustOp(t, "Pad", 2, 1, attrInts("pads", 1, 0, 0, 0, 2, 1), attrString("mode", "edge")), []*tensor.Tensor{x}, gradOpts{})
	op18 := mustOp(t, "Pad", 18, 1)
	y = forward1(t, op18, x, i64s([]int{2}, 1, 2), nil, i64s([]int{1}, -1))
	if !shapeEq(y.Shape, []int{2, 3, 7}) {
		t.Errorf("Pad with axes = %v", y.Shape)
	}
	checkGrad(t, op18, []*tensor.Tensor{x, i64s([]int{2}, 1, 2), nil, i64s([]int{1}, -1)}, gradOpts{})
}

func TestShapeAndConstantOfShape(t *testing.T) {
	x := tensor.New(2, 3, 4, 5)
	for _, c := range []struct {
		attrs []*onnx.Attr
		want  []int64
	}{
		{nil, []int64{2, 3, 4, 5}},
		{[]*onnx.Attr{attrInt("start", -3), attrInt("end", -1)}, []int64{3, 4}},
		{[]*onnx.Attr{attrInt("start", 10)}, []int64{}},
	} {
		y := forward1(t, mustOp(t, "Shape", 15, 1, c.attrs...), x)
		if y.DType != tensor.Int64 || len(y.I64) != len(c.want) {
			t.Fatalf("Shape %v = %v", c.attrs, y.I64)
		}
		for i := range c.want {
			if y.I64[i] != c.want[i] {
				t.Fatalf("Shape %v = %v", c.attrs, y.I64)
			}
		}
	}
	val := &onnx.Attr{Name: "value", Type: onnx.AttrTensor, Tensor: i64s([]int{1}, 7)}
	y := forward1(t, mustOp(t, "ConstantOfShape", 9, 1, val), i64s([]int{2}, 2, 3))
	if y.DType != tensor.Int64 || len(y.I64) != 6 || y.I64[5] != 7 {
		t.Errorf("ConstantOfShape = %v %v", y, y.I64)
	}
}

func TestMoreShapeGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(25))
	x := randTensor(rng, -1, 1, 1, 8, 2, 3)
	checkGrad(t, mustOp(t, "Tile", 13, 1), []*tensor.Tensor{x, i64s([]int{4}, 2, 1, 3, 1)}, gradOpts{})
	for _, mode := range []string{"DCR", "CRD"} {
		checkGrad(t, mustOp(t, "DepthToSpace", 13, 1, attrInt("blocksize", 2), attrString("mode", mode)), []*tensor.Tensor{x}, gradOpts{})
	}
	sp := randTensor(rng, -1, 1, 2, 3, 4, 6)
	checkGrad(t, mustOp(t, "SpaceToDepth", 13, 1, attrInt("blocksize", 2)), []*tensor.Tensor{sp}, gradOpts{})
	// SpaceToDepth then DepthToSpace (DCR) is the identity.
	s2d := forward1(t, mustOp(t, "SpaceToDepth", 13, 1, attrInt("blocksize", 2)), sp)
	back := forward1(t, mustOp(t, "DepthToSpace", 13, 1, attrInt("blocksize", 2)), s2d)
	for i := range sp.F32 {
		if back.F32[i] != sp.F32[i] {
			t.Fatalf("DepthToSpace(SpaceToDepth(x)) differs from x at %d", i)
		}
	}
	m := randTensor(rng, -1, 1, 2, 3, 4)
	checkGrad(t, mustOp(t, "Trilu", 14, 1), []*tensor.Tensor{m, i64s(nil, -1)}, gradOpts{})
	checkGrad(t, mustOp(t, "Trilu", 14, 1, attrInt("upper", 0)), []*tensor.Tensor{m}, gradOpts{})
	ge := mustOp(t, "GatherElements", 13, 1, attrInt("axis", 1))
	checkGrad(t, ge, []*tensor.Tensor{m, i64s([]int{2, 2, 4}, 0, 1, 2, -1, 2, 2, 0, 0, 1, 1, 1, 1, 0, 2, 1, 0)}, gradOpts{})
	for _, attrs := range [][]*onnx.Attr{nil, {attrInt("exclusive", 1)}, {attrInt("reverse", 1)}, {attrInt("exclusive", 1), attrInt("reverse", 1)}} {
		checkGrad(t, mustOp(t, "CumSum", 14, 1, attrs...), []*tensor.Tensor{m, i64s(nil, -2)}, gradOpts{})
	}
	checkGrad(t, mustOp(t, "CastLike", 15, 1), []*tensor.Tensor{m, tensor.New(1)}, gradOpts{Wrt: []int{0}})
}
