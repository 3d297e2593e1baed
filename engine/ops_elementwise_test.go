package engine

import (
	"math/rand"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

// Forward results of these ops are checked against the ONNX conformance
// data in conformance_test.go; the tests here check gradients (against
// central differences, gradcheck_test.go) and the cases the conformance
// data does not cover.

func testNode(opType string, nOut int, attrs ...*onnx.Attr) *onnx.Node {
	n := &onnx.Node{Name: "t_" + opType, OpType: opType, Attrs: map[string]*onnx.Attr{}}
	for i := 0; i < nOut; i++ {
		n.Outputs = append(n.Outputs, "y")
	}
	for _, a := range attrs {
		n.Attrs[a.Name] = a
	}
	return n
}

func attrInt(name string, v int64) *onnx.Attr {
	return &onnx.Attr{Name: name, Type: onnx.AttrInt, Int: v}
}
func attrFloat(name string, v float32) *onnx.Attr {
	return &onnx.Attr{Name: name, Type: onnx.AttrFloat, Float: v}
}
func attrInts(name string, v ...int64) *onnx.Attr {
	return &onnx.Attr{Name: name, Type: onnx.AttrInts, Ints: v}
}
func attrString(name, v string) *onnx.Attr {
	return &onnx.Attr{Name: name, Type: onnx.AttrString, String: v}
}

// mustOp builds op type opType through the registry at the given opset.
func mustOp(t *testing.T, opType string, opset int64, nOut int, attrs ...*onnx.Attr) Op {
	t.Helper()
	b, ok := lookup(opType)
	if !ok {
		t.Fatalf("%s is not registered", opType)
	}
	op, err := b(testNode(opType, nOut, attrs...), &Env{Opset: opset})
	if err != nil {
		t.Fatalf("build %s: %v", opType, err)
	}
	return op
}

func i64s(shape []int, v ...int64) *tensor.Tensor { return tensor.FromInt64(v, shape...) }

func forward1(t *testing.T, op Op, in ...*tensor.Tensor) *tensor.Tensor {
	t.Helper()
	out, err := op.Forward(in)
	if err != nil {
		t.Fatal(err)
	}
	return out[0]
}

func TestUnaryGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(7))
	cases := []struct {
		op     string
		attrs  []*onnx.Attr
		lo, hi float64
		kinks  []float64
	}{
		{"Relu", nil, -2, 2, []float64{0}},
		{"LeakyRelu", []*onnx.Attr{attrFloat("alpha", 0.1)}, -2, 2, []float64{0}},
		{"Sigmoid", nil, -4, 4, nil},
		{"Tanh", nil, -2, 2, nil},
		{"HardSigmoid", []*onnx.Attr{attrFloat("alpha", 0.3), attrFloat("beta", 0.4)}, -4, 4, []float64{-0.4 / 0.3, 0.6 / 0.3}},
		{"HardSwish", nil, -5, 5, []float64{-3, 3}},
		{"Erf", nil, -2, 2, nil},
		{"Exp", nil, -2, 2, nil},
		{"Sqrt", nil, 0.3, 3, nil},
	}
	for _, c := range cases {
		for _, shape := range [][]int{{}, {7}, {2, 1, 3, 5}} {
			op := mustOp(t, c.op, 17, 1, c.attrs...)
			x := randAwayFrom(rng, c.lo, c.hi, 0.02, c.kinks, shape...)
			if err := gradCheck(op, []*tensor.Tensor{x}, gradOpts{}); err != nil {
				t.Errorf("%s %v: %v", c.op, shape, err)
			}
		}
	}
}

func TestClip(t *testing.T) {
	rng := rand.New(rand.NewSource(8))
	x := randAwayFrom(rng, -2, 2, 0.02, []float64{-0.5, 0.7}, 3, 4)
	lo, hi := tensor.FromFloat32([]float32{-0.5}), tensor.FromFloat32([]float32{0.7})
	// Opset 13: bounds as inputs, each optional.
	op := mustOp(t, "Clip", 13, 1)
	checkGrad(t, op, []*tensor.Tensor{x, lo, hi}, gradOpts{Wrt: []int{0}})
	checkGrad(t, op, []*tensor.Tensor{x, nil, hi}, gradOpts{Wrt: []int{0}})
	checkGrad(t, op, []*tensor.Tensor{x, lo}, gradOpts{Wrt: []int{0}})
	y := forward1(t, op, x, nil, hi)
	for i, v := range x.F32 {
		if want := min(v, 0.7); y.F32[i] != want {
			t.Fatalf("Clip(max only)[%d] = %g, want %g", i, y.F32[i], want)
		}
	}
	// Opset 6: bounds as attributes.
	op6 := mustOp(t, "Clip", 6, 1, attrFloat("min", -0.5), attrFloat("max", 0.7))
	checkGrad(t, op6, []*tensor.Tensor{x}, gradOpts{})
	// Integer clip (the conformance int8 cases are decoded to int64).
	yi := forward1(t, op, i64s([]int{4}, -9, -1, 3, 9), i64s(nil, -2), i64s(nil, 5))
	want := []int64{-2, -1, 3, 5}
	for i := range want {
		if yi.I64[i] != want[i] {
			t.Fatalf("integer Clip = %v, want %v", yi.I64, want)
		}
	}
}

// binShapes are broadcasting pairs including scalars, size-1 axes on both
// sides and rank differences.
var binShapes = [][2][]int{
	{{2, 3}, {2, 3}},
	{{2, 3, 4}, {4}},
	{{4}, {2, 3, 4}},
	{{2, 1, 4}, {3, 1}},
	{{}, {2, 3}},
	{{2, 3}, {}},
	{{1}, {2, 3, 1}},
	{{3, 1, 5}, {1, 2, 1}},
}

func TestBinaryGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(9))
	for _, opType := range []string{"Add", "Sub", "Mul", "Div", "Pow"} {
		op := mustOp(t, opType, 14, 1)
		for _, s := range binShapes {
			var a, b *tensor.Tensor
			switch opType {
			case "Div":
				a = randTensor(rng, -2, 2, s[0]...)
				b = randAwayFrom(rng, -2, 2, 0.5, []float64{0}, s[1]...)
			case "Pow":
				a = randTensor(rng, 0.5, 2, s[0]...)
				b = randTensor(rng, -2, 2, s[1]...)
			default:
				a, b = randTensor(rng, -2, 2, s[0]...), randTensor(rng, -2, 2, s[1]...)
			}
			if err := gradCheck(op, []*tensor.Tensor{a, b}, gradOpts{}); err != nil {
				t.Errorf("%s %v %v: %v", opType, s[0], s[1], err)
			}
		}
	}
	// Pow with an integer exponent: the exponent gets no gradient.
	op := mustOp(t, "Pow", 15, 1)
	a := randTensor(rng, -2, 2, 2, 3)
	checkGrad(t, op, []*tensor.Tensor{a, i64s([]int{3}, 1, 2, 3)}, gradOpts{})
}

func TestLegacyBroadcastGradients(t *testing.T) {
	// Opset 6 broadcast=1, axis=1: B of shape [3] lines up with A's axis 1.
	rng := rand.New(rand.NewSource(13))
	for _, opType := range []string{"Add", "Mul"} {
		op := mustOp(t, opType, 6, 1, attrInt("broadcast", 1), attrInt("axis", 1))
		a, b := randTensor(rng, -1, 1, 2, 3, 4), randTensor(rng, -1, 1, 3)
		checkGrad(t, op, []*tensor.Tensor{a, b}, gradOpts{})
		y := forward1(t, op, a, b)
		if opType == "Add" && y.F32[1*12+2*4+3] != a.F32[1*12+2*4+3]+b.F32[2] {
			t.Errorf("legacy Add aligned B at the wrong axis")
		}
	}
}

func TestIntegerArithmetic(t *testing.T) {
	// Shape arithmetic as exported graphs do it: [N,C,H,W] / 2 etc.
	div := mustOp(t, "Div", 14, 1)
	got := forward1(t, div, i64s([]int{3}, 7, -7, 8), i64s(nil, 2))
	for i, w := range []int64{3, -3, 4} { // truncation toward zero (C semantics)
		if got.I64[i] != w {
			t.Fatalf("int Div = %v", got.I64)
		}
	}
	if _, err := div.Forward([]*tensor.Tensor{i64s([]int{1}, 1), i64s([]int{1}, 0)}); err == nil {
		t.Error("integer division by zero returned no error")
	}
	mul := mustOp(t, "Mul", 14, 1)
	got = forward1(t, mul, i64s([]int{2, 1}, 2, 3), i64s([]int{2}, 10, 100))
	for i, w := range []int64{20, 200, 30, 300} {
		if got.I64[i] != w {
			t.Fatalf("int Mul broadcast = %v", got.I64)
		}
	}
	if _, err := mul.Forward([]*tensor.Tensor{i64s([]int{1}, 1), tensor.FromFloat32([]float32{1}, 1)}); err == nil {
		t.Error("mixed int/float Mul returned no error")
	}
}

func TestPReluGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(10))
	op := mustOp(t, "PRelu", 16, 1)
	for _, s := range [][2][]int{{{2, 3, 4, 5}, {3, 1, 1}}, {{3, 4, 5}, {5}}, {{2, 3}, {}}, {{2, 3}, {2, 3}}} {
		x := randAwayFrom(rng, -2, 2, 0.02, []float64{0}, s[0]...)
		sl := randTensor(rng, -0.5, 0.5, s[1]...)
		if err := gradCheck(op, []*tensor.Tensor{x, sl}, gradOpts{}); err != nil {
			t.Errorf("PRelu %v %v: %v", s[0], s[1], err)
		}
	}
	// Opset 6 per-channel slope of shape [C] on NCHW.
	op6 := mustOp(t, "PRelu", 6, 1)
	x := randAwayFrom(rng, -2, 2, 0.02, []float64{0}, 2, 3, 2, 2)
	sl := tensor.FromFloat32([]float32{0.1, 0.2, 0.3}, 3)
	checkGrad(t, op6, []*tensor.Tensor{x, sl}, gradOpts{})
	y := forward1(t, op6, x, sl)
	for i, v := range x.F32 {
		c := (i / 4) % 3
		want := v
		if v < 0 {
			want = v * sl.F32[c]
		}
		if y.F32[i] != want {
			t.Fatalf("opset-6 PRelu[%d] = %g, want %g", i, y.F32[i], want)
		}
	}
	if _, err := op.Forward([]*tensor.Tensor{x, tensor.New(4)}); err == nil {
		t.Error("slope that does not broadcast to X accepted")
	}
}

func TestWhereGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(11))
	op := mustOp(t, "Where", 16, 1)
	cond := &tensor.Tensor{DType: tensor.Bool, Shape: []int{2, 1, 4}, I64: []int64{1, 0, 0, 1, 0, 1, 1, 0}}
	x, y := randTensor(rng, -1, 1, 3, 1), randTensor(rng, -1, 1, 2, 3, 4)
	checkGrad(t, op, []*tensor.Tensor{cond, x, y}, gradOpts{})
}

func TestEqualAndCast(t *testing.T) {
	eq := mustOp(t, "Equal", 13, 1)
	got := forward1(t, eq, tensor.FromFloat32([]float32{1, 2, 3}, 3), tensor.FromFloat32([]float32{2}, 1))
	if got.DType != tensor.Bool || got.I64[0] != 0 || got.I64[1] != 1 || got.I64[2] != 0 {
		t.Fatalf("Equal = %v %v", got, got.I64)
	}
	toInt := mustOp(t, "Cast", 13, 1, attrInt("to", onnxInt64))
	ci := forward1(t, toInt, tensor.FromFloat32([]float32{-1.7, 2.9, 0}, 3))
	if ci.DType != tensor.Int64 || ci.I64[0] != -1 || ci.I64[1] != 2 || ci.I64[2] != 0 {
		t.Fatalf("Cast to int64 = %v", ci.I64)
	}
	toBool := mustOp(t, "Cast", 13, 1, attrInt("to", onnxBool))
	cb := forward1(t, toBool, tensor.FromFloat32([]float32{-0.5, 0, 3}, 3))
	if cb.DType != tensor.Bool || cb.I64[0] != 1 || cb.I64[1] != 0 || cb.I64[2] != 1 {
		t.Fatalf("Cast to bool = %v", cb.I64)
	}
	toFloat := mustOp(t, "Cast", 13, 1, attrInt("to", onnxFloat))
	rng := rand.New(rand.NewSource(12))
	checkGrad(t, toFloat, []*tensor.Tensor{randTensor(rng, -1, 1, 2, 2)}, gradOpts{})
	if cf := forward1(t, toFloat, i64s([]int{2}, 3, -4)); cf.DType != tensor.Float32 || cf.F32[1] != -4 {
		t.Fatalf("Cast int to float = %v", cf.F32)
	}
	b, _ := lookup("Cast")
	if _, err := b(testNode("Cast", 1, attrInt("to", onnxFloat16)), &Env{Opset: 13}); err == nil {
		t.Error("Cast to float16 accepted")
	}
}

func TestBroadcastPlanCoalesces(t *testing.T) {
	// [2,3,4] with [3,1]: the walk must visit every element once and pick
	// the right operand offsets.
	p, err := newBcastPlan([]int{2, 3, 4}, []int{2, 3, 4}, []int{3, 1})
	if err != nil {
		t.Fatal(err)
	}
	seen := make([]int, 24)
	p.rows(func(o int, offs, steps []int, n int) {
		for i := 0; i < n; i++ {
			seen[o+i]++
			if offs[0]+i*steps[0] != o+i {
				t.Fatalf("operand 0 offset %d for output %d", offs[0]+i*steps[0], o+i)
			}
			if want := ((o + i) / 4) % 3; offs[1]+i*steps[1] != want {
				t.Fatalf("operand 1 offset %d for output %d, want %d", offs[1]+i*steps[1], o+i, want)
			}
		}
	})
	for i, c := range seen {
		if c != 1 {
			t.Fatalf("element %d visited %d times", i, c)
		}
	}
	if _, err := broadcastShapes([]int{2, 3}, []int{4}); err == nil {
		t.Error("incompatible shapes broadcast")
	}
	if s, _ := broadcastShapes([]int{0, 3}, []int{1}); s[0] != 0 {
		t.Errorf("empty broadcast = %v", s)
	}
}
