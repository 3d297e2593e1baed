package explain_test

import (
	"math"
	"testing"

	"heedmap/engine"
	"heedmap/explain"
	"heedmap/explain/explaintest"
	"heedmap/explain/preprocess"
	"heedmap/onnx"
	"heedmap/tensor"
)

// A channels-last model end to end: ONNX Flatten + Gemm on an NHWC input
// [N, 5, 4, 3] (operator semantics from the ONNX operator specification:
// Flatten(axis 1) keeps the row-major element order, Gemm with transB
// computes x·Wᵀ + b). The preprocessing config must detect NHWC from the
// declared shape, and through FromGraph(NHWC) the methods, which work in
// NCHW, must see logits and gradients of the same function: the gradient of
// class k at NCHW position (c, y, x) is W[k, (y·4 + x)·3 + c], exactly.
func TestNHWCModel(t *testing.T) {
	const h, w, c, k = 5, 4, 3, 2
	d := h * w * c
	lin := explaintest.NewLinear(c, h, w, k, 101) // reused only for its random weights
	W := tensor.FromFloat32(append([]float32(nil), lin.W...), k, d)
	B := tensor.FromFloat32(append([]float32(nil), lin.B...), k)
	g := gemmGraph(t, []int64{h, w, c}, W, B)
	var shape []int
	for _, dd := range g.Inputs()[0].Shape {
		shape = append(shape, int(dd.Value))
	}
	cfg, err := preprocess.Config{}.Resolve(shape)
	if err != nil || cfg.Layout != "NHWC" || cfg.Width != w || cfg.Height != h {
		t.Fatalf("resolved %+v, %v: want NHWC %d×%d", cfg, err, w, h)
	}
	net, err := explain.FromGraph(g, explain.GraphOptions{NHWC: cfg.Layout == "NHWC"})
	if err != nil {
		t.Fatal(err)
	}
	if s := net.InputShape(); s[1] != c || s[2] != h || s[3] != w {
		t.Fatalf("network input shape %v, want [N %d %d %d]", s, c, h, w)
	}
	x := explaintest.RandomInput(c, h, w, 102) // NCHW
	nhwc := func(ch, y, xx int) int { return (y*w+xx)*c + ch }
	logits, err := explain.Logits(ctx, net, x)
	if err != nil {
		t.Fatal(err)
	}
	for j := 0; j < k; j++ {
		want := float64(B.F32[j])
		for ch := 0; ch < c; ch++ {
			for y := 0; y < h; y++ {
				for xx := 0; xx < w; xx++ {
					want += float64(W.F32[j*d+nhwc(ch, y, xx)]) * float64(x.F32[(ch*h+y)*w+xx])
				}
			}
		}
		if math.Abs(float64(logits[j])-want) > 1e-5*math.Max(1, math.Abs(want)) {
			t.Errorf("logit %d = %v, want %v", j, logits[j], want)
		}
	}
	r, err := explain.Gradient{}.Attribute(ctx, net, x, explain.Class(1, explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	for ch := 0; ch < c; ch++ {
		for y := 0; y < h; y++ {
			for xx := 0; xx < w; xx++ {
				if got, want := r.Channels.F32[(ch*h+y)*w+xx], W.F32[d+nhwc(ch, y, xx)]; got != want {
					t.Fatalf("∂logit₁/∂x[c=%d, y=%d, x=%d] = %v, want weight %v", ch, y, xx, got, want)
				}
			}
		}
	}
}

// gemmGraph compiles the ONNX model Flatten(axis 1) → Gemm(transB = 1) with
// weights W [K, D] and bias B [K] on an input "img" of shape [batch, dims...];
// the Gemm output is "logits". With softmax, a Softmax node follows and the
// graph's only output is its "probs".
func gemmGraph(t *testing.T, dims []int64, W, B *tensor.Tensor, softmax ...bool) *engine.Graph {
	t.Helper()
	k, d := int64(W.Shape[0]), int64(W.Shape[1])
	f32 := func(name string, dims ...int64) onnx.ValueInfo {
		vi := onnx.ValueInfo{Name: name, ElemType: 1, DType: tensor.Float32}
		for _, v := range dims {
			vi.Shape = append(vi.Shape, onnx.Dim{Value: v})
		}
		return vi
	}
	in := f32("img", append([]int64{-1}, dims...)...)
	in.Shape[0] = onnx.Dim{Value: -1, Param: "batch"}
	out := f32("logits", -1, k)
	out.Shape[0] = onnx.Dim{Value: -1, Param: "batch"}
	m := &onnx.Model{IRVersion: 7, Opsets: map[string]int64{"": 13}, Graph: &onnx.Graph{
		Name: "flatten-gemm",
		Nodes: []*onnx.Node{
			{Name: "flat", OpType: "Flatten", Inputs: []string{"img"}, Outputs: []string{"f"}, Attrs: map[string]*onnx.Attr{"axis": {Name: "axis", Type: onnx.AttrInt, Int: 1}}},
			{Name: "fc", OpType: "Gemm", Inputs: []string{"f", "W", "B"}, Outputs: []string{"logits"}, Attrs: map[string]*onnx.Attr{"transB": {Name: "transB", Type: onnx.AttrInt, Int: 1}}},
		},
		Inputs:       []onnx.ValueInfo{in, f32("W", k, d), f32("B", k)},
		Outputs:      []onnx.ValueInfo{out},
		Initializers: map[string]*tensor.Tensor{"W": W, "B": B},
		InitOrder:    []string{"W", "B"},
	}}
	if len(softmax) > 0 && softmax[0] {
		m.Graph.Nodes = append(m.Graph.Nodes, &onnx.Node{Name: "sm", OpType: "Softmax", Inputs: []string{"logits"}, Outputs: []string{"probs"},
			Attrs: map[string]*onnx.Attr{"axis": {Name: "axis", Type: onnx.AttrInt, Int: 1}}})
		out.Name = "probs"
		m.Graph.Outputs = []onnx.ValueInfo{out}
	}
	g, err := engine.Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	return g
}
