package engine

import (
	"context"
	"math"
	"math/rand"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

// TestShapeOpsBackwardThroughRuntime chains many of the elementwise, shape
// and reduction ops into one graph and checks Pass.Backward (which hands
// each op only the forward values its BackwardNeeds declared) against
// central differences of the whole graph, accumulated in float64.
func TestShapeOpsBackwardThroughRuntime(t *testing.T) {
	rng := rand.New(rand.NewSource(60))
	f32 := func(v ...float32) *tensor.Tensor { return tensor.FromFloat32(v, len(v)) }
	ints := func(v ...int64) *tensor.Tensor { return i64s([]int{len(v)}, v...) }
	node := func(op string, in, out []string, attrs ...*onnx.Attr) *onnx.Node {
		n := testNode(op, 0, attrs...)
		n.Name, n.Inputs, n.Outputs = op+"_"+out[0], in, out
		return n
	}
	inits := map[string]*tensor.Tensor{
		"scales": f32(1, 1, 2, 1.5),
		"pads":   ints(0, 0, 1, 2, 0, 0, 2, 1),
		"starts": ints(-1, 1), "ends": ints(-1<<62, 9), "axes": ints(2, 3), "steps": ints(-2, 2),
		"w":     randTensor(rng, 0.5, 1.5, 2, 1, 1),
		"split": ints(1, 1),
		"idx":   ints(2, 0, 2),
		"rax":   ints(-1),
		"unsq":  ints(0),
		"shape": ints(2, 1, 1, 1),
	}
	var order []string
	for k := range inits {
		order = append(order, k)
	}
	g := &onnx.Graph{
		Name: "chain",
		Inputs: []onnx.ValueInfo{{Name: "x", ElemType: 1, DType: tensor.Float32,
			Shape: []onnx.Dim{{Value: 1}, {Value: 2}, {Value: 3}, {Value: 4}}}},
		Outputs:      []onnx.ValueInfo{{Name: "out", ElemType: 1, DType: tensor.Float32}, {Name: "b", ElemType: 1, DType: tensor.Float32}},
		Initializers: inits,
		InitOrder:    order,
		Nodes: []*onnx.Node{
			node("Resize", []string{"x", "", "scales"}, []string{"r"}, attrString("mode", "linear")),
			node("Pad", []string{"r", "pads"}, []string{"p"}, attrString("mode", "reflect")),
			node("Slice", []string{"p", "starts", "ends", "axes", "steps"}, []string{"s"}),
			node("Mul", []string{"s", "w"}, []string{"m"}),
			node("Split", []string{"m", "split"}, []string{"m0", "m1"}, attrInt("axis", 1)),
			node("Concat", []string{"m1", "m0", "m1"}, []string{"c"}, attrInt("axis", 1)),
			node("Transpose", []string{"c"}, []string{"tr"}, attrInts("perm", 0, 2, 3, 1)),
			node("Gather", []string{"tr", "idx"}, []string{"ga"}, attrInt("axis", -1)),
			node("Tanh", []string{"ga"}, []string{"th"}),
			node("ReduceMean", []string{"th"}, []string{"rm"}, attrInts("axes", 1), attrInt("keepdims", 0)),
			node("Unsqueeze", []string{"rm", "unsq"}, []string{"u"}),
			node("Expand", []string{"u", "shape"}, []string{"e"}),
			node("ReduceSum", []string{"e", "rax"}, []string{"out"}, attrInt("keepdims", 0)),
			node("Sigmoid", []string{"x"}, []string{"sg"}),
			node("Sub", []string{"sg", "x"}, []string{"d"}),
			node("Exp", []string{"d"}, []string{"ed"}), // keeps Pow's base positive
			node("Pow", []string{"ed", "w"}, []string{"pw"}),
			node("ReduceMax", []string{"pw"}, []string{"b"}, attrInts("axes", 3), attrInt("keepdims", 1)),
		},
	}
	m := &onnx.Model{IRVersion: 8, Opsets: map[string]int64{"": 17}, Graph: g}
	gr, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	x := randTensor(rng, -1, 1, 1, 2, 3, 4)
	ctx := context.Background()
	run := func(x *tensor.Tensor, backward bool) *Pass {
		p, err := gr.Run(ctx, map[string]*tensor.Tensor{"x": x}, RunOptions{Backward: backward})
		if err != nil {
			t.Fatal(err)
		}
		return p
	}
	p := run(x, true)
	seeds := map[string]*tensor.Tensor{}
	for _, name := range []string{"out", "b"} {
		v, _ := p.Value(name)
		seeds[name] = randTensor(rng, -1, 1, v.Shape...)
	}
	grads, err := p.Backward(ctx, seeds, []string{"x"})
	if err != nil {
		t.Fatal(err)
	}
	score := func(x *tensor.Tensor) float64 {
		q := run(x, false)
		var s float64
		for name, w := range seeds {
			v, _ := q.Value(name)
			for i := range v.F32 {
				s += float64(w.F32[i]) * float64(v.F32[i])
			}
		}
		return s
	}
	const h = 1e-3 // same step and tolerance as gradcheck_test.go
	gx := grads["x"]
	for j := range x.F32 {
		xp, xm := x.Clone(), x.Clone()
		xp.F32[j] += h
		xm.F32[j] -= h
		num := (score(xp) - score(xm)) / float64(xp.F32[j]-xm.F32[j])
		if ana := float64(gx.F32[j]); !(math.Abs(ana-num) <= 1e-3+1e-2*math.Abs(num)) {
			t.Errorf("d score/d x[%d]: runtime backward %.6g, central difference %.6g", j, ana, num)
		}
	}
}
