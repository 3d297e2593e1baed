package engine

import (
	"context"
	"fmt"
	"math/rand"
	mrand "math/rand/v2"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

// TestConvWinogradMatchesReference runs 3×3 convolutions on the Winograd
// path (one block and several per image, the shared-transform phase at
// batch 1, odd map sizes, no padding) with bias, residual and fused
// activations, and their input gradients, against the operator built on
// kernel.Naive (the float64 product over a plain im2col) followed by the
// ONNX definitions of Add, Relu and Clip; the input gradient is checked
// against the same reference and the adjoint identity (checkInputGradient).
func TestConvWinogradMatchesReference(t *testing.T) {
	rng := rand.New(rand.NewSource(6))
	for i, tc := range []struct{ n, c, h, w, m, pad int }{
		{1, 16, 20, 22, 24, 1},
		{2, 32, 56, 56, 32, 1},
		{1, 24, 15, 13, 40, 1},
		{1, 64, 14, 14, 96, 1},
		{3, 16, 17, 18, 16, 0},
	} {
		x := nnRand(rng, tc.n, tc.c, tc.h, tc.w)
		wt := nnRand(rng, tc.m, tc.c, 3, 3)
		bias := nnRand(rng, tc.m)
		p := int64(tc.pad)
		node := nnNode("c", "Conv", []string{"x", "w", "b"}, []string{"y"}, nnInts("pads", p, p, p, p))
		fc, rc := convPair(t, node, newArena())
		fc.constW = true
		s, _ := fc.shape(x, wt)
		if !fc.useWinograd(s.g, s.c, s.m) {
			t.Fatalf("case %d: Winograd path not taken", i)
		}
		in := []*tensor.Tensor{x, wt, bias}
		checkForwardEpilogues(t, i, rng, fc, rc, in)
		// The input gradient: the transposed convolution on the same path.
		tg, ok := transposedGeom(s.g)
		if !ok || !fc.useWinograd(tg, s.m, s.c) {
			t.Fatalf("case %d: input gradient not on the Winograd path", i)
		}
		checkBackwardX(t, i, rng, fc, rc, in[:2], nil)
	}
}

// BenchmarkConvWinograd times ResNet-18's 3×3 unit-stride layer shapes at
// batch 1 (with bias and fused ReLU) on the Winograd path and on the
// im2col paths, side by side in one process; GFLOP/s counts the direct
// convolution's 2·c·m·9 operations per output position for both, so the
// ratio of the two is the speed-up.
func BenchmarkConvWinograd(b *testing.B) {
	rng := rand.New(rand.NewSource(1))
	for _, tc := range []struct{ c, h int }{{64, 56}, {128, 28}, {256, 14}} {
		for _, wino := range []bool{true, false} {
			path := "im2col"
			if wino {
				path = "winograd"
			}
			b.Run(fmt.Sprintf("%dx%dx%d/%s", tc.c, tc.h, tc.h, path), func(b *testing.B) {
				x := nnRand(rng, 1, tc.c, tc.h, tc.h)
				wt := nnRand(rng, tc.c, tc.c, 3, 3)
				bias := nnRand(rng, tc.c)
				node := nnNode("c", "Conv", []string{"x", "w", "b"}, []string{"y"}, nnInts("pads", 1, 1, 1, 1))
				a := newArena()
				f, err := buildConv(node, &Env{GEMM: defaultGEMM(), Opset: 13, arena: a, team: newTeam()})
				if err != nil {
					b.Fatal(err)
				}
				fc := f.(*convOp)
				fc.constW, fc.noWinograd = true, !wino
				in := []*tensor.Tensor{x, wt, bias}
				run := func() {
					y, err := fc.forwardEp(in, nil, actRelu, 0, 0)
					if err != nil {
						b.Fatal(err)
					}
					a.put(y[0].F32)
				}
				run() // filters transformed or packed once, buffers made
				b.ResetTimer()
				for i := 0; i < b.N; i++ {
					run()
				}
				ops := 2 * float64(tc.c*tc.c*9*tc.h*tc.h) * float64(b.N)
				b.ReportMetric(ops/b.Elapsed().Seconds()/1e9, "GFLOP/s")
			})
		}
	}
}

// TestIncrementalOverWinograd checks incremental occlusion against brute
// force on a graph whose 3×3 layers take the Winograd path in full passes
// (the brute force, and the unoccluded pass whose activations the
// incremental evaluator keeps), while the evaluator recomputes patches on
// the im2col path: the two must agree within the incremental tests'
// tolerance (incCompare).
func TestIncrementalOverWinograd(t *testing.T) {
	r := mrand.New(mrand.NewPCG(21, 22))
	init := map[string]*tensor.Tensor{}
	var order []string
	param := func(name string, shape ...int) string {
		p := tensor.New(shape...)
		for i := range p.F32 {
			p.F32[i] = float32(r.NormFloat64() * 0.2)
		}
		init[name], order = p, append(order, name)
		return name
	}
	pads := &onnx.Attr{Name: "pads", Type: onnx.AttrInts, Ints: []int64{1, 1, 1, 1}}
	node := func(op string, ins []string, out string, attrs ...*onnx.Attr) *onnx.Node {
		n := &onnx.Node{Name: out, OpType: op, Inputs: ins, Outputs: []string{out}, Attrs: map[string]*onnx.Attr{}}
		for _, a := range attrs {
			n.Attrs[a.Name] = a
		}
		return n
	}
	nodes := []*onnx.Node{
		node("Conv", []string{"x", param("w1", 16, 3, 3, 3), param("b1", 16)}, "c1", pads),
		node("Relu", []string{"c1"}, "r1"),
		node("Conv", []string{"r1", param("w2", 24, 16, 3, 3), param("b2", 24)}, "c2", pads),
		node("Relu", []string{"c2"}, "r2"),
		node("Conv", []string{"r2", param("w3", 16, 24, 3, 3)}, "c3", pads),
		node("Add", []string{"c3", "r1"}, "add"),
		node("Relu", []string{"add"}, "r3"),
		node("GlobalAveragePool", []string{"r3"}, "gap"),
		node("Flatten", []string{"gap"}, "flat"),
		node("Gemm", []string{"flat", param("fc", 4, 16), param("fcb", 4)}, "y", &onnx.Attr{Name: "transB", Type: onnx.AttrInt, Int: 1}),
	}
	const size = 26
	m := &onnx.Model{Opsets: map[string]int64{"": 13}, Graph: &onnx.Graph{
		Nodes:        nodes,
		Inputs:       []onnx.ValueInfo{{Name: "x", DType: tensor.Float32, Shape: []onnx.Dim{{Param: "N"}, {Value: 3}, {Value: size}, {Value: size}}}},
		Outputs:      []onnx.ValueInfo{{Name: "y", DType: tensor.Float32}},
		Initializers: init, InitOrder: order,
	}}
	g, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	x := incRandom(1, 1, 3, size, size)
	inc, err := NewIncremental(context.Background(), g, "x", "y", x)
	if err != nil {
		t.Fatal(err)
	}
	// The second and third convolutions must have run on the Winograd
	// path: their transformed filters are in the graph's memo.
	for _, nd := range g.nodes {
		if op, ok := nd.op.(*convOp); ok && nd.src.Name != "c1" {
			key := memoKey{init[nd.src.Inputs[1]], winoFilters{op, false}}
			if _, ok := g.arena.memo[key]; !ok {
				t.Fatalf("%s did not take the Winograd path", nd.src.Name)
			}
		}
	}
	fill := incRandom(2, 1, 3, size, size)
	rects := incWindows(size, size, 6, 5)
	for s := 0; s < len(rects); s += 7 {
		part := rects[s:min(s+7, len(rects))]
		got, err := inc.Occlude(context.Background(), fill, part)
		if err != nil {
			t.Fatal(err)
		}
		incCompare(t, fmt.Sprintf("windows %d–%d", s, s+len(part)-1), got, incBruteForce(t, g, "x", "y", x, fill, part))
	}
}
