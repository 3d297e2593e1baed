package engine

import (
	"context"
	"errors"
	"math/rand"
	"strings"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

// noGradTestOp is an identity with no gradient, to observe which nodes
// Backward visits.
type noGradTestOp struct{}

func (noGradTestOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return []*tensor.Tensor{in[0]}, nil
}

func init() {
	register("HeedmapTestNoGrad", func(*onnx.Node, *Env) (Op, error) { return noGradTestOp{}, nil })
}

func nnNode(name, op string, in, out []string, as ...*onnx.Attr) *onnx.Node {
	return &onnx.Node{Name: name, OpType: op, Inputs: in, Outputs: out, Attrs: nnAttrs(as...)}
}

func nnDims(d ...any) []onnx.Dim {
	var out []onnx.Dim
	for _, v := range d {
		switch v := v.(type) {
		case int:
			out = append(out, onnx.Dim{Value: int64(v)})
		case string:
			out = append(out, onnx.Dim{Value: -1, Param: v})
		}
	}
	return out
}

func nnGraphModel(inputs []onnx.ValueInfo, outputs []string, init map[string]*tensor.Tensor, nodes ...*onnx.Node) *onnx.Model {
	g := &onnx.Graph{Nodes: nodes, Inputs: inputs, Initializers: init}
	if g.Initializers == nil {
		g.Initializers = map[string]*tensor.Tensor{}
	}
	for _, o := range outputs {
		g.Outputs = append(g.Outputs, onnx.ValueInfo{Name: o})
	}
	return &onnx.Model{Opsets: map[string]int64{"": 17}, Graph: g}
}

func nnIn(name string, shape ...any) onnx.ValueInfo {
	return onnx.ValueInfo{Name: name, DType: tensor.Float32, Shape: nnDims(shape...)}
}

func TestCompileListsEveryUnsupportedNode(t *testing.T) {
	m := nnGraphModel([]onnx.ValueInfo{nnIn("x", 1, 2)}, []string{"z"}, nil,
		nnNode("a", "FancyOp", []string{"x"}, []string{"y"}),
		&onnx.Node{Name: "b", OpType: "Identity", Domain: "com.example", Inputs: []string{"y"}, Outputs: []string{"y2"}},
		nnNode("c", "OtherOp", []string{"y2"}, []string{"z"}))
	_, err := Compile(m)
	if err == nil {
		t.Fatal("compiled a model with unsupported nodes")
	}
	for _, want := range []string{`"a" (FancyOp)`, `"b" (Identity, domain com.example)`, `"c" (OtherOp)`, "3 unsupported"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("error %q does not mention %s", err, want)
		}
	}
	s := Describe(m)
	if len(s.Unsupported) != 3 {
		t.Errorf("Describe lists %d unsupported nodes, want 3", len(s.Unsupported))
	}
}

func TestCompileTopology(t *testing.T) {
	in := []onnx.ValueInfo{nnIn("x", 2)}
	_, err := Compile(nnGraphModel(in, []string{"y"}, nil, nnNode("reader", "Identity", []string{"nowhere"}, []string{"y"})))
	if err == nil || !strings.Contains(err.Error(), `"reader"`) || !strings.Contains(err.Error(), `"nowhere"`) {
		t.Errorf("dangling input: got %v", err)
	}
	_, err = Compile(nnGraphModel(in, []string{"b"}, nil,
		nnNode("n1", "Identity", []string{"b"}, []string{"a"}),
		nnNode("n2", "Identity", []string{"a"}, []string{"b"})))
	if err == nil || !strings.Contains(err.Error(), "cycle") || !strings.Contains(err.Error(), `"n1"`) {
		t.Errorf("cycle: got %v", err)
	}
	_, err = Compile(nnGraphModel(in, []string{"a"}, nil,
		nnNode("n1", "Identity", []string{"x"}, []string{"a"}),
		nnNode("n2", "Identity", []string{"x"}, []string{"a"})))
	if err == nil || !strings.Contains(err.Error(), "both produce") {
		t.Errorf("duplicate output: got %v", err)
	}
	// Out-of-order nodes are sorted, not rejected.
	g, err := Compile(nnGraphModel(in, []string{"b"}, nil,
		nnNode("second", "Identity", []string{"a"}, []string{"b"}),
		nnNode("first", "Identity", []string{"x"}, []string{"a"})))
	if err != nil {
		t.Fatal(err)
	}
	p, err := g.Run(context.Background(), map[string]*tensor.Tensor{"x": tensor.FromFloat32([]float32{3, 4}, 2)}, RunOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if b, _ := p.Value("b"); b == nil || b.F32[1] != 4 {
		t.Errorf("out-of-order graph gave %v", b)
	}
}

func TestConstantNodesAreFolded(t *testing.T) {
	c := tensor.FromFloat32([]float32{1, 2, 3, 4, 5, 6}, 2, 3)
	m := nnGraphModel([]onnx.ValueInfo{nnIn("x", 1, 3)}, []string{"y"}, nil,
		nnNode("k", "Constant", nil, []string{"w"}, &onnx.Attr{Name: "value", Type: onnx.AttrTensor, Tensor: c}),
		nnNode("kt", "Identity", []string{"w"}, []string{"w2"}),
		nnNode("mm", "Gemm", []string{"x", "w2"}, []string{"y"}, nnInt("transB", 1)))
	g, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	if len(g.nodes) != 1 || g.nodes[0].src.Name != "mm" {
		t.Errorf("executed nodes %d, want only the Gemm (Constant and its Identity folded)", len(g.nodes))
	}
	p, err := g.Run(context.Background(), map[string]*tensor.Tensor{"x": tensor.FromFloat32([]float32{1, 0, -1}, 1, 3)}, RunOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if _, err := g.Run(context.Background(), map[string]*tensor.Tensor{"x": tensor.New(1, 3), "w": tensor.New(2, 3)}, RunOptions{}); err == nil || !strings.Contains(err.Error(), `"w" is an initializer`) {
		t.Errorf("feeding a folded constant: %v", err)
	}
	// [1 0 -1]·[[1 2 3],[4 5 6]]ᵀ = [1−3, 4−6]
	if y, _ := p.Value("y"); y.F32[0] != -2 || y.F32[1] != -2 {
		t.Errorf("y = %v, want [-2 -2]", y.F32)
	}
}

func TestRunChecksDeclaredShapes(t *testing.T) {
	m := nnGraphModel([]onnx.ValueInfo{nnIn("img", "batch", 2, 3), nnIn("aux", "batch", 1)}, []string{"o"}, nil,
		nnNode("id", "Identity", []string{"img"}, []string{"o"}))
	g, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	for _, n := range []int{1, 5} {
		_, err := g.Run(ctx, map[string]*tensor.Tensor{"img": tensor.New(n, 2, 3), "aux": tensor.New(n, 1)}, RunOptions{})
		if err != nil {
			t.Errorf("batch %d: %v", n, err)
		}
	}
	for _, tc := range []struct {
		img, aux *tensor.Tensor
		want     string
	}{
		{tensor.New(1, 3, 3), tensor.New(1, 1), `input "img" has shape [1 3 3], model declares [batch 2 3]`},
		{tensor.New(1, 2), tensor.New(1, 1), `input "img" has shape [1 2]`},
		{tensor.New(2, 2, 3), tensor.New(3, 1), `input "aux" dimension 0 (batch) is 3, but input "img" gave batch=2`},
		{tensor.New(1, 2, 3), nil, `input "aux" not given`},
		{tensor.NewInt64(1, 2, 3), tensor.New(1, 1), `input "img" is int64`},
	} {
		_, err := g.Run(ctx, map[string]*tensor.Tensor{"img": tc.img, "aux": tc.aux}, RunOptions{})
		if err == nil || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("got %v, want an error containing %q", err, tc.want)
		}
	}
}

// chain builds x → Softmax → s1 → ... → sN; every Softmax allocates its
// output and its backward needs that output.
func nnSoftmaxChain(n int) *onnx.Model {
	var nodes []*onnx.Node
	prev := "x"
	for i := 1; i <= n; i++ {
		out := "s" + string(rune('0'+i))
		nodes = append(nodes, nnNode(out, "Softmax", []string{prev}, []string{out}))
		prev = out
	}
	return nnGraphModel([]onnx.ValueInfo{nnIn("x", "batch", 4)}, []string{prev}, nil, nodes...)
}

func nnLiveActivations(p *Pass) int {
	n := 0
	for v, t := range p.vals {
		if t != nil && p.g.producer[v] >= 0 {
			n++
		}
	}
	return n
}

func TestPlanFreesActivations(t *testing.T) {
	g, err := Compile(nnSoftmaxChain(8))
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	in := map[string]*tensor.Tensor{"x": tensor.FromFloat32([]float32{1, 2, 3, 4}, 1, 4)}
	p, err := g.Run(ctx, in, RunOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if p.peakLive > 2 {
		t.Errorf("peak live activations %d in a chain, want ≤ 2 (input of the running node and its output)", p.peakLive)
	}
	if n := nnLiveActivations(p); n != 1 {
		t.Errorf("%d activations held after the run, want only the output", n)
	}
	if _, ok := p.Value("s3"); ok {
		t.Error("s3 retained without Keep")
	}
	if s, ok := p.Shape("s3"); !ok || !shapeEq(s, []int{1, 4}) {
		t.Errorf("Shape(s3) = %v, %v", s, ok)
	}

	p, err = g.Run(ctx, in, RunOptions{Keep: []string{"s3"}})
	if err != nil {
		t.Fatal(err)
	}
	if _, ok := p.Value("s3"); !ok || nnLiveActivations(p) != 2 {
		t.Errorf("Keep s3: retained %v, %d live", ok, nnLiveActivations(p))
	}
	if _, err := g.Run(ctx, in, RunOptions{Keep: []string{"nope"}}); err == nil {
		t.Error("Keep of an unknown value accepted")
	}

	// Softmax's backward reads its output, so Backward keeps all 8.
	p, err = g.Run(ctx, in, RunOptions{Backward: true})
	if err != nil {
		t.Fatal(err)
	}
	if n := nnLiveActivations(p); n != 8 {
		t.Errorf("Backward run holds %d activations, want 8", n)
	}
}

func TestPlanBackwardKeepsOnlyWhatIsNeeded(t *testing.T) {
	// Flatten's backward needs only shapes; Gemm's dW reads its input f and
	// its df reads W. With W an initializer no gradient flows to it, so f
	// need not be kept; with W a graph input f must be kept. The Gemm
	// output y is read by no backward in either case.
	w := tensor.FromFloat32([]float32{1, 2, 3, 4, 5, 6}, 3, 2)
	nodes := []*onnx.Node{
		nnNode("f", "Flatten", []string{"x"}, []string{"f"}),
		nnNode("mm", "Gemm", []string{"f", "w"}, []string{"y"}),
		nnNode("id", "Flatten", []string{"y"}, []string{"z"}),
	}
	for _, wIsInput := range []bool{false, true} {
		in := []onnx.ValueInfo{nnIn("x", 1, 3, 1)}
		init := map[string]*tensor.Tensor{"w": w}
		feed := map[string]*tensor.Tensor{"x": tensor.New(1, 3, 1)}
		if wIsInput {
			in = append(in, nnIn("w", 3, 2))
			init = nil
			feed["w"] = w
		}
		g, err := Compile(nnGraphModel(in, []string{"z"}, init, nodes...))
		if err != nil {
			t.Fatal(err)
		}
		p, err := g.Run(context.Background(), feed, RunOptions{Backward: true})
		if err != nil {
			t.Fatal(err)
		}
		if _, kept := p.Value("f"); kept != wIsInput {
			t.Errorf("W a graph input: %v; Gemm operand f kept: %v", wIsInput, kept)
		}
		if _, ok := p.Value("y"); ok {
			t.Error("y retained although no backward reads it")
		}
		wrt := []string{"x"}
		if wIsInput {
			wrt = append(wrt, "w")
		}
		grads, err := p.Backward(context.Background(), map[string]*tensor.Tensor{"z": tensor.FromFloat32([]float32{1, 1}, 1, 2)}, wrt)
		if err != nil {
			t.Fatal(err)
		}
		// ∂Σz/∂x = W·[1 1]ᵀ = [3 7 11]
		if gx := grads["x"].F32; gx[0] != 3 || gx[1] != 7 || gx[2] != 11 {
			t.Errorf("∂/∂x = %v, want [3 7 11]", gx)
		}
	}
}

// TestBackwardGemmClosedForm checks ∂(w·(A x + b))/∂x = Aᵀw.
func TestBackwardGemmClosedForm(t *testing.T) {
	a := tensor.FromFloat32([]float32{1, 2, 3, 4, 5, 6}, 2, 3)
	b := tensor.FromFloat32([]float32{10, -10}, 2)
	m := nnGraphModel([]onnx.ValueInfo{nnIn("x", 1, 3)}, []string{"y"}, map[string]*tensor.Tensor{"A": a, "b": b},
		nnNode("fc", "Gemm", []string{"x", "A", "b"}, []string{"y"}, nnInt("transB", 1)))
	g, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	p, err := g.Run(ctx, map[string]*tensor.Tensor{"x": tensor.FromFloat32([]float32{0.5, -1, 2}, 1, 3)}, RunOptions{Backward: true})
	if err != nil {
		t.Fatal(err)
	}
	seed := tensor.FromFloat32([]float32{1, -1}, 1, 2)
	grads, err := p.Backward(ctx, map[string]*tensor.Tensor{"y": seed}, []string{"x"})
	if err != nil {
		t.Fatal(err)
	}
	// Aᵀw = [1−4, 2−5, 3−6]
	want := []float32{-3, -3, -3}
	for i, v := range grads["x"].F32 {
		if v != want[i] {
			t.Fatalf("∂/∂x = %v, want Aᵀw = %v", grads["x"].F32, want)
		}
	}
	// The caller's seed is not modified and can be reused.
	if seed.F32[0] != 1 || seed.F32[1] != -1 {
		t.Error("Backward modified the seed")
	}
	if _, err := p.Backward(ctx, map[string]*tensor.Tensor{"y": tensor.New(1, 3)}, []string{"x"}); err == nil {
		t.Error("seed of the wrong shape accepted")
	}
	q, _ := g.Run(ctx, map[string]*tensor.Tensor{"x": tensor.New(1, 3)}, RunOptions{})
	if _, err := q.Backward(ctx, map[string]*tensor.Tensor{"y": seed}, []string{"x"}); err == nil {
		t.Error("Backward on a pass run without RunOptions.Backward succeeded")
	}
}

// TestBackwardFanOutAndIntermediate: x feeds two branches, h = A1·x and the
// outputs y1 = A2·h and y2 = A3·x, seeded with w1 and w2. In closed form
// ∂/∂h = A2ᵀw1 and ∂/∂x = A1ᵀA2ᵀw1 + A3ᵀw2, both from one sweep.
func TestBackwardFanOutAndIntermediate(t *testing.T) {
	a1 := tensor.FromFloat32([]float32{1, 0, 2, -1}, 2, 2)
	a2 := tensor.FromFloat32([]float32{3, 1}, 1, 2)
	a3 := tensor.FromFloat32([]float32{0, 1, 1, 1, 2, 0}, 3, 2)
	m := nnGraphModel([]onnx.ValueInfo{nnIn("x", 1, 2)}, []string{"y1", "y2"}, map[string]*tensor.Tensor{"A1": a1, "A2": a2, "A3": a3},
		nnNode("g1", "Gemm", []string{"x", "A1"}, []string{"h"}, nnInt("transB", 1)),
		nnNode("g2", "Gemm", []string{"h", "A2"}, []string{"y1"}, nnInt("transB", 1)),
		nnNode("g3", "Gemm", []string{"x", "A3"}, []string{"y2"}, nnInt("transB", 1)))
	g, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	p, err := g.Run(ctx, map[string]*tensor.Tensor{"x": tensor.FromFloat32([]float32{1, 1}, 1, 2)}, RunOptions{Backward: true})
	if err != nil {
		t.Fatal(err)
	}
	w1 := tensor.FromFloat32([]float32{2}, 1, 1)
	w2 := tensor.FromFloat32([]float32{1, -1, 1}, 1, 3)
	grads, err := p.Backward(ctx, map[string]*tensor.Tensor{"y1": w1, "y2": w2}, []string{"x", "h"})
	if err != nil {
		t.Fatal(err)
	}
	// A2ᵀw1 = [6, 2]; A1ᵀ[6 2] = [6+4, −2] = [10, −2]; A3ᵀw2 = [0−1+2, 1−1+0] = [1, 0].
	wantH, wantX := []float32{6, 2}, []float32{11, -2}
	for i := range wantH {
		if grads["h"].F32[i] != wantH[i] || grads["x"].F32[i] != wantX[i] {
			t.Fatalf("∂/∂h = %v, ∂/∂x = %v; want %v, %v", grads["h"].F32, grads["x"].F32, wantH, wantX)
		}
	}
	// Seeding only y2: h does not lead to it, its gradient is zero.
	grads, err = p.Backward(ctx, map[string]*tensor.Tensor{"y2": w2}, []string{"h"})
	if err != nil || grads["h"].F32[0] != 0 || grads["h"].F32[1] != 0 {
		t.Errorf("∂y2/∂h = %v (%v), want zeros", grads["h"], err)
	}
}

func TestBackwardSkipsNodesAboveWrt(t *testing.T) {
	a := tensor.FromFloat32([]float32{1, 2}, 1, 2)
	m := nnGraphModel([]onnx.ValueInfo{nnIn("x", 1, 2)}, []string{"y"}, map[string]*tensor.Tensor{"A": a},
		nnNode("opaque", "HeedmapTestNoGrad", []string{"x"}, []string{"h"}),
		nnNode("fc", "Gemm", []string{"h", "A"}, []string{"y"}, nnInt("transB", 1)))
	g, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	p, err := g.Run(ctx, map[string]*tensor.Tensor{"x": tensor.New(1, 2)}, RunOptions{Backward: true})
	if err != nil {
		t.Fatal(err)
	}
	seed := map[string]*tensor.Tensor{"y": tensor.FromFloat32([]float32{1}, 1, 1)}
	grads, err := p.Backward(ctx, seed, []string{"h"})
	if err != nil {
		t.Fatalf("wrt h visited the node above it: %v", err)
	}
	if grads["h"].F32[0] != 1 || grads["h"].F32[1] != 2 {
		t.Errorf("∂y/∂h = %v, want [1 2]", grads["h"].F32)
	}
	_, err = p.Backward(ctx, seed, []string{"x"})
	if err == nil || !strings.Contains(err.Error(), `"opaque"`) {
		t.Errorf("wrt x through a node without gradient: %v", err)
	}
}

func TestRunHonoursContext(t *testing.T) {
	g, err := Compile(nnSoftmaxChain(3))
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	_, err = g.Run(ctx, map[string]*tensor.Tensor{"x": tensor.New(1, 4)}, RunOptions{})
	if !errors.Is(err, context.Canceled) {
		t.Errorf("cancelled run returned %v", err)
	}
}

func TestGradCAMLayerAndDescribe(t *testing.T) {
	w := tensor.New(4, 3, 3, 3)
	fc := tensor.New(2, 4)
	m := nnGraphModel([]onnx.ValueInfo{nnIn("img", "N", 3, 8, 8)}, []string{"logits"}, map[string]*tensor.Tensor{"w": w, "fc": fc},
		nnNode("conv", "Conv", []string{"img", "w"}, []string{"c"}, nnInts("pads", 1, 1, 1, 1)),
		nnNode("act", "Identity", []string{"c"}, []string{"feat"}),
		nnNode("gap", "GlobalAveragePool", []string{"feat"}, []string{"pooled"}),
		nnNode("flat", "Flatten", []string{"pooled"}, []string{"f"}),
		nnNode("head", "Gemm", []string{"f", "fc"}, []string{"logits"}, nnInt("transB", 1)))
	g, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	if name, err := g.GradCAMLayer(); err != nil || name != "feat" {
		t.Errorf("GradCAMLayer = %q, %v; want feat", name, err)
	}
	s := Describe(m)
	if s.Parameters != 4*3*3*3+2*4 {
		t.Errorf("Parameters = %d, want %d", s.Parameters, 4*3*3*3+2*4)
	}
	if len(s.Inputs) != 1 || s.Inputs[0].Name != "img" || s.Nodes != 5 || len(s.Unsupported) != 0 {
		t.Errorf("summary %+v", s)
	}
	if s.Opsets[""] != 17 || len(s.OpHistogram) != 5 {
		t.Errorf("opsets %v, histogram %v", s.Opsets, s.OpHistogram)
	}

	if _, ok := lookup("ReduceMean"); ok {
		m2 := nnGraphModel([]onnx.ValueInfo{nnIn("img", 1, 3, 8, 8)}, []string{"p"}, map[string]*tensor.Tensor{"w": w},
			nnNode("conv", "Conv", []string{"img", "w"}, []string{"c"}),
			nnNode("rm", "ReduceMean", []string{"c"}, []string{"p"}, nnInts("axes", -2, -1)))
		m2.Opsets[""] = 13
		g2, err := Compile(m2)
		if err != nil {
			t.Fatal(err)
		}
		if name, err := g2.GradCAMLayer(); err != nil || name != "c" {
			t.Errorf("ReduceMean: GradCAMLayer = %q, %v; want c", name, err)
		}
	}
	m3 := nnGraphModel([]onnx.ValueInfo{nnIn("x", 1, 4)}, []string{"y"}, nil, nnNode("id", "Identity", []string{"x"}, []string{"y"}))
	g3, _ := Compile(m3)
	if _, err := g3.GradCAMLayer(); err == nil {
		t.Error("GradCAMLayer found a layer in a graph without pooling")
	}
}

// TestConcurrentRuns: a Graph is shared by goroutines (batch workers); each
// Run must give the single-threaded result. Run with -race to check the
// operators hold no shared mutable state.
func TestConcurrentRuns(t *testing.T) {
	rng := rand.New(rand.NewSource(3))
	w := nnRand(rng, 4, 2, 3, 3)
	m := nnGraphModel([]onnx.ValueInfo{nnIn("x", "N", 2, 6, 6)}, []string{"y"}, map[string]*tensor.Tensor{"w": w},
		nnNode("c", "Conv", []string{"x", "w"}, []string{"h"}, nnInts("pads", 1, 1, 1, 1)),
		nnNode("p", "MaxPool", []string{"h"}, []string{"y"}, nnInts("kernel_shape", 2, 2), nnInts("strides", 2, 2)))
	g, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	x := nnRand(rng, 2, 2, 6, 6)
	ctx := context.Background()
	ref, err := g.Run(ctx, map[string]*tensor.Tensor{"x": x}, RunOptions{})
	if err != nil {
		t.Fatal(err)
	}
	want, _ := ref.Value("y")
	errs := make(chan error, 8)
	for i := 0; i < 8; i++ {
		go func() {
			p, err := g.Run(ctx, map[string]*tensor.Tensor{"x": x}, RunOptions{Backward: true})
			if err == nil {
				y, _ := p.Value("y")
				for j := range y.F32 {
					if y.F32[j] != want.F32[j] {
						err = errors.New("concurrent run differs from the sequential one")
						break
					}
				}
				if err == nil {
					_, err = p.Backward(ctx, map[string]*tensor.Tensor{"y": y}, []string{"x"})
				}
			}
			errs <- err
		}()
	}
	for i := 0; i < 8; i++ {
		if err := <-errs; err != nil {
			t.Error(err)
		}
	}
}
