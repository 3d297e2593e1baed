package engine

import (
	"context"
	"fmt"
	"math"
	"math/rand"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

// referenceSweep is reverse-mode differentiation written the plainest way
// (Griewank & Walther, "Evaluating Derivatives", 2nd ed., §3.2: adjoints
// of a value are summed over its readers, visited in reverse order):
// every value kept, no fusion, no arena, every op's ordinary Backward, and
// every gradient a private copy. Pass.Backward's shortcuts (Conv→activation
// fusion in backward runs, in-place ReLU/Clip gradients, gradients shared
// copy-on-write between Add's operands and views, recycling through the
// arena) must reproduce its input gradient bit for bit.
func referenceSweep(t *testing.T, g *Graph, input string, x *tensor.Tensor, output string, seed *tensor.Tensor) *tensor.Tensor {
	t.Helper()
	g.arena, g.fusion = nil, nil
	var all []string
	for v, name := range g.names {
		if g.producer[v] >= 0 {
			all = append(all, name)
		}
	}
	p, err := g.Run(context.Background(), map[string]*tensor.Tensor{input: x}, RunOptions{Keep: all, WholeBatch: true}) // it reads the pass's own values
	if err != nil {
		t.Fatal(err)
	}
	grads := make([]*tensor.Tensor, len(g.names))
	grads[g.index[output]] = seed.Clone()
	for k := len(g.nodes) - 1; k >= 0; k-- {
		nd := g.nodes[k]
		var gradOut []*tensor.Tensor
		any := false
		for _, v := range nd.out {
			var gv *tensor.Tensor
			if v >= 0 {
				gv = grads[v]
			}
			gradOut = append(gradOut, gv)
			any = any || gv != nil
		}
		if !any || !g.nodeVarying(nd) {
			continue
		}
		in := make([]*tensor.Tensor, len(nd.in))
		need := make([]bool, len(nd.in))
		for i, v := range nd.in {
			if v >= 0 {
				in[i] = p.vals[v]
				need[i] = g.varying[v] && p.dtypes[v] == tensor.Float32
			}
		}
		out := make([]*tensor.Tensor, len(nd.out))
		for i, v := range nd.out {
			if v >= 0 {
				out[i] = p.vals[v]
			}
		}
		gin, err := safeBackward(nd.op, nd.op.(Differentiable), in, out, gradOut, need)
		if err != nil {
			t.Fatalf("%s: %v", nd.label(), err)
		}
		for i, v := range nd.in {
			if v < 0 || i >= len(gin) || gin[i] == nil || !need[i] {
				continue
			}
			if grads[v] == nil {
				grads[v] = gin[i].Clone()
				continue
			}
			for j, d := range gin[i].F32 {
				grads[v].F32[j] += d
			}
		}
	}
	return grads[g.index[input]]
}

// TestBackwardMatchesReferenceSweep compares Pass.Backward with
// referenceSweep on the compact torchvision networks (ResNet's residual
// Adds and MaxPool, MobileNetV2's Clip and depthwise layers, DenseNet's
// Concat fan-out, EfficientNet's squeeze-and-excitation Mul), warm and
// released as attribution runs them: bit-identical input gradients.
func TestBackwardMatchesReferenceSweep(t *testing.T) {
	ctx := context.Background()
	for _, name := range []string{"resnet18", "mobilenet_v2", "densenet121", "efficientnet_b0", "inception_v3"} {
		t.Run(name, func(t *testing.T) {
			n := loadCompactNet(t, name)
			meta, x, g := n.meta, n.x, n.g
			in := map[string]*tensor.Tensor{meta.Input: x}
			p, err := g.Run(ctx, in, RunOptions{Backward: true})
			if err != nil {
				t.Fatal(err)
			}
			y, _ := p.Value(meta.Output)
			seed := tensor.New(y.Shape...)
			rng := rand.New(rand.NewSource(7))
			for i := range seed.F32 {
				seed.F32[i] = float32(rng.NormFloat64())
			}
			want := referenceSweep(t, loadCompactNet(t, name).g, meta.Input, x, meta.Output, seed)
			p.Release()
			for pass := 0; pass < 3; pass++ {
				p, err := g.Run(ctx, in, RunOptions{Backward: true})
				if err != nil {
					t.Fatal(err)
				}
				seedCopy := seed.Clone()
				gr, err := p.Backward(ctx, map[string]*tensor.Tensor{meta.Output: seedCopy}, []string{meta.Input})
				if err != nil {
					t.Fatal(err)
				}
				p.Release()
				got := gr[meta.Input]
				for i := range want.F32 {
					if math.Float32bits(got.F32[i]) != math.Float32bits(want.F32[i]) {
						t.Fatalf("pass %d: input gradient %d is %v, reference sweep %v", pass, i, got.F32[i], want.F32[i])
					}
				}
				for i := range seed.F32 {
					if seedCopy.F32[i] != seed.F32[i] {
						t.Fatalf("pass %d: Backward wrote into the seed", pass)
					}
				}
			}
		})
	}
}

// TestBackwardSharedGradients differentiates small graphs where one
// gradient buffer is handed to several values: y = Relu(a + a) (Add of a
// value with itself), z = Relu(Reshape(x)) + x (a view feeding an in-place
// ReLU while the original is still live), a buffer shared by three values
// of which one is accumulated into, and two results of one Add requested
// together. Expected values follow from the chain rule by hand:
// d/da Relu(2a) = 2·[a > 0]; d/dx (Relu(x) + x) = [x > 0] + 1.
func TestBackwardSharedGradients(t *testing.T) {
	xs := []float32{-1.5, -0.25, 0, 0.5, 2, 3}
	t.Run("add-self", func(t *testing.T) {
		g := compileTest(t, []sweepNode{
			{"Identity", []string{"x"}, "a"},
			{"Add", []string{"a", "a"}, "s"},
			{"Relu", []string{"s"}, "y"},
		}, "x", "y", 2, 3)
		gr := backwardOnce(t, g, xs, "y", []string{"x"})
		for i, x := range xs {
			want := float32(0)
			if x > 0 {
				want = 2
			}
			if got := gr["x"].F32[i]; got != want {
				t.Errorf("dx[%d] = %v, want %v", i, got, want)
			}
		}
	})
	t.Run("view-and-original", func(t *testing.T) {
		g := compileTest(t, []sweepNode{
			{"Flatten", []string{"x"}, "f"},
			{"Reshape", []string{"f", "shape"}, "r"},
			{"Relu", []string{"r"}, "q"},
			{"Add", []string{"q", "x"}, "y"},
		}, "x", "y", 2, 3)
		gr := backwardOnce(t, g, xs, "y", []string{"x"})
		for i, x := range xs {
			want := float32(1)
			if x > 0 {
				want = 2
			}
			if got := gr["x"].F32[i]; got != want {
				t.Errorf("dx[%d] = %v, want %v", i, got, want)
			}
		}
	})
	t.Run("shared-then-accumulated", func(t *testing.T) {
		// z = Relu(x) + x + Relu(Relu(x)), y = Relu(z): the Adds hand one
		// buffer to p, q and m; m's ReLU then adds into p's gradient while
		// q still holds the buffer. dy/dx = [z > 0]·(2·[x > 0] + 1), which
		// is 3 for x > 0 and 0 otherwise (z = x ≤ 0 there).
		g := compileTest(t, []sweepNode{
			{"Relu", []string{"x"}, "p"},
			{"Identity", []string{"x"}, "q"},
			{"Relu", []string{"p"}, "m"},
			{"Add", []string{"p", "q"}, "s"},
			{"Add", []string{"s", "m"}, "z"},
			{"Relu", []string{"z"}, "y"},
		}, "x", "y", 2, 3)
		gr := backwardOnce(t, g, xs, "y", []string{"x"})
		for i, x := range xs {
			want := float32(0)
			if x > 0 {
				want = 3
			}
			if got := gr["x"].F32[i]; got != want {
				t.Errorf("dx[%d] = %v, want %v", i, got, want)
			}
		}
	})
	t.Run("two-results-one-buffer", func(t *testing.T) {
		g := compileTest(t, []sweepNode{
			{"Relu", []string{"x"}, "a"},
			{"Identity", []string{"x"}, "b"},
			{"Add", []string{"a", "b"}, "y"},
		}, "x", "y", 2, 3)
		gr := backwardOnce(t, g, xs, "y", []string{"a", "b"})
		if &gr["a"].F32[0] == &gr["b"].F32[0] {
			t.Fatal("two results share one buffer")
		}
		for i := range xs {
			if gr["a"].F32[i] != 1 || gr["b"].F32[i] != 1 {
				t.Fatalf("d/da, d/db at %d = %v, %v, want 1, 1", i, gr["a"].F32[i], gr["b"].F32[i])
			}
		}
		gr["a"].F32[0] = 42 // the caller owns each result
		if gr["b"].F32[0] != 1 {
			t.Fatal("writing one result changed the other")
		}
	})
}

type sweepNode struct {
	op  string
	in  []string
	out string
}

// compileTest builds a float32 graph with input x of the given shape,
// output y and, for Reshape, a constant "shape" equal to x's shape.
func compileTest(t *testing.T, nodes []sweepNode, input, output string, shape ...int) *Graph {
	t.Helper()
	s := make([]int64, len(shape))
	dims := make([]any, len(shape))
	for i, d := range shape {
		s[i], dims[i] = int64(d), d
	}
	init := map[string]*tensor.Tensor{"shape": tensor.FromInt64(s, len(s))}
	var ns []*onnx.Node
	for i, n := range nodes {
		ns = append(ns, nnNode(fmt.Sprint("n", i), n.op, n.in, []string{n.out}))
	}
	g, err := Compile(nnGraphModel([]onnx.ValueInfo{nnIn(input, dims...)}, []string{output}, init, ns...))
	if err != nil {
		t.Fatal(err)
	}
	return g
}

// backwardOnce runs x through g with Backward twice (the second warm, from
// the arena) and returns the second pass's gradient of Σ output.
func backwardOnce(t *testing.T, g *Graph, xs []float32, output string, wrt []string) map[string]*tensor.Tensor {
	t.Helper()
	ctx := context.Background()
	in := g.Inputs()[0]
	shape := make([]int, len(in.Shape))
	for i, d := range in.Shape {
		shape[i] = int(d.Value)
	}
	var res map[string]*tensor.Tensor
	for pass := 0; pass < 2; pass++ {
		x := tensor.FromFloat32(append([]float32(nil), xs...), shape...)
		p, err := g.Run(ctx, map[string]*tensor.Tensor{in.Name: x}, RunOptions{Backward: true})
		if err != nil {
			t.Fatal(err)
		}
		y, _ := p.Value(output)
		seed := tensor.New(y.Shape...)
		for i := range seed.F32 {
			seed.F32[i] = 1
		}
		res, err = p.Backward(ctx, map[string]*tensor.Tensor{output: seed}, wrt)
		if err != nil {
			t.Fatal(err)
		}
		p.Release()
	}
	return res
}

// TestActivationMasksFromOutput checks that ReLU's and Clip's gradients,
// which read the output y, equal the derivative defined on the input x:
// dx = dy where 0 < x (ReLU) or lo < x < hi (Clip), 0 elsewhere, including
// at the kinks (the subgradient 0 at x = 0 and at the bounds, common
// practice), at ±0, ±Inf and NaN, both out of place and in place.
func TestActivationMasksFromOutput(t *testing.T) {
	nan := float32(math.NaN())
	inf := float32(math.Inf(1))
	neg0 := float32(math.Copysign(0, -1))
	xs := []float32{-2, neg0, 0, 1e-30, 0.5, 5.999, 6, 7, inf, -inf, nan, -0.5, 3, 1, -1, 0.75}
	relu, err := buildRelu(nnNode("r", "Relu", []string{"x"}, []string{"y"}), &Env{Opset: 17})
	if err != nil {
		t.Fatal(err)
	}
	clip, err := buildClip(nnNode("c", "Clip", []string{"x", "lo", "hi"}, []string{"y"}), &Env{Opset: 17})
	if err != nil {
		t.Fatal(err)
	}
	b := func(v float32) *tensor.Tensor { return tensor.FromFloat32([]float32{v}) }
	for _, tc := range []struct {
		name   string
		op     Op
		bounds []*tensor.Tensor
		pass   func(x float32) bool
	}{
		{"Relu", relu, nil, func(x float32) bool { return x > 0 }},
		{"Clip[0,6]", clip, []*tensor.Tensor{b(0), b(6)}, func(x float32) bool { return x > 0 && x < 6 }},
		{"Clip[-0,6]", clip, []*tensor.Tensor{b(neg0), b(6)}, func(x float32) bool { return x > 0 && x < 6 }},
		{"Clip[0.5,inf]", clip, []*tensor.Tensor{b(0.5), b(inf)}, func(x float32) bool { return x > 0.5 && x < inf }},
		{"Clip[-1,1]", clip, []*tensor.Tensor{b(-1), b(1)}, func(x float32) bool { return x > -1 && x < 1 }},
		{"Clip[-inf,0]", clip, []*tensor.Tensor{b(-inf), b(0)}, func(x float32) bool { return x > -inf && x < 0 }},
		{"Clip[3,3]", clip, []*tensor.Tensor{b(3), b(3)}, func(x float32) bool { return false }},
	} {
		x := tensor.FromFloat32(append([]float32(nil), xs...), len(xs))
		in := append([]*tensor.Tensor{x}, tc.bounds...)
		y, err := tc.op.Forward(in)
		if err != nil {
			t.Fatal(err)
		}
		dy := tensor.New(len(xs))
		for i := range dy.F32 {
			dy.F32[i] = float32(i + 1)
		}
		// Backward sees x only as a shape: the forward value is not kept.
		shape := append([]*tensor.Tensor{{DType: tensor.Float32, Shape: x.Shape}}, tc.bounds...)
		gin, err := tc.op.(Differentiable).Backward(shape, y, []*tensor.Tensor{dy})
		if err != nil {
			t.Fatal(err)
		}
		g := dy.Clone()
		gip, err := tc.op.(gradInPlace).backwardInPlace(shape, y, g)
		if err != nil || gip == nil || gip[0] != g {
			t.Fatalf("%s: in-place backward declined or returned another tensor (%v)", tc.name, err)
		}
		for i, xv := range xs {
			want := float32(0)
			if tc.pass(xv) {
				want = dy.F32[i]
			}
			if got := gin[0].F32[i]; math.Float32bits(got) != math.Float32bits(want) {
				t.Errorf("%s: dx at x=%v is %v, want %v", tc.name, xv, got, want)
			}
			if got := g.F32[i]; math.Float32bits(got) != math.Float32bits(want) {
				t.Errorf("%s in place: dx at x=%v is %v, want %v", tc.name, xv, got, want)
			}
		}
	}
}

// TestConvBackwardWeightsNotMemoisedWhenVarying: the flipped filters are
// kept across passes only for constant weights. With W a graph input that
// changes between passes, the input gradient must follow it. For a 1×1
// convolution dX[c][p] = Σ_m W[m][c]·dY[m][p] (the chain rule by hand).
func TestConvBackwardWeightsNotMemoisedWhenVarying(t *testing.T) {
	m := nnGraphModel([]onnx.ValueInfo{nnIn("x", 1, 2, 3, 3), nnIn("w", 4, 2, 1, 1)}, []string{"y"}, nil,
		nnNode("c", "Conv", []string{"x", "w"}, []string{"y"}))
	g, err := Compile(m)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	rng := rand.New(rand.NewSource(5))
	x := tensor.New(1, 2, 3, 3)
	for i := range x.F32 {
		x.F32[i] = float32(rng.NormFloat64())
	}
	for pass := 0; pass < 3; pass++ {
		w := tensor.New(4, 2, 1, 1)
		for i := range w.F32 {
			w.F32[i] = float32(rng.NormFloat64())
		}
		p, err := g.Run(ctx, map[string]*tensor.Tensor{"x": x, "w": w}, RunOptions{Backward: true})
		if err != nil {
			t.Fatal(err)
		}
		dy := tensor.New(1, 4, 3, 3)
		for i := range dy.F32 {
			dy.F32[i] = float32(rng.NormFloat64())
		}
		gr, err := p.Backward(ctx, map[string]*tensor.Tensor{"y": dy}, []string{"x"})
		if err != nil {
			t.Fatal(err)
		}
		p.Release()
		for c := 0; c < 2; c++ {
			for q := 0; q < 9; q++ {
				var want float64
				for o := 0; o < 4; o++ {
					want += float64(w.F32[o*2+c]) * float64(dy.F32[o*9+q])
				}
				if got := gr["x"].F32[c*9+q]; math.Abs(float64(got)-want) > 1e-5 {
					t.Fatalf("pass %d: dx[%d][%d] = %v, want %v", pass, c, q, got, want)
				}
			}
		}
	}
}

// TestReleaseKeepsCallerValues: after Release, the graph output and a
// value named in RunOptions.Keep still hold their data while later passes
// reuse the released buffers; values kept only for Backward are gone.
func TestReleaseKeepsCallerValues(t *testing.T) {
	n := loadCompactNet(t, "resnet18")
	meta, x, g := n.meta, n.x, n.g
	ctx := context.Background()
	in := map[string]*tensor.Tensor{meta.Input: x}
	// A ReLU output deep in the net: kept for Backward anyway.
	var layer string
	for _, nd := range g.nodes {
		if nd.src.OpType == "Relu" {
			layer = g.names[nd.out[0]]
		}
	}
	p, err := g.Run(ctx, in, RunOptions{Backward: true, Keep: []string{layer}})
	if err != nil {
		t.Fatal(err)
	}
	y, _ := p.Value(meta.Output)
	a, ok := p.Value(layer)
	if !ok {
		t.Fatalf("kept value %q missing", layer)
	}
	y0, a0 := y.Clone(), a.Clone()
	var bwdOnly string
	for v, only := range p.bwdOnly {
		if only && p.vals[v] != nil && g.producer[v] >= 0 {
			bwdOnly = g.names[v]
			break
		}
	}
	if bwdOnly == "" {
		t.Fatal("no value retained only for Backward")
	}
	p.Release()
	if _, ok := p.Value(bwdOnly); ok {
		t.Errorf("value %q, retained only for Backward, survived Release", bwdOnly)
	}
	for i := 0; i < 3; i++ {
		x2 := x.Clone()
		for j := range x2.F32 {
			x2.F32[j] = -x2.F32[j]
		}
		q, err := g.Run(ctx, map[string]*tensor.Tensor{meta.Input: x2}, RunOptions{Backward: true})
		if err != nil {
			t.Fatal(err)
		}
		q.Release()
	}
	y1, _ := p.Value(meta.Output)
	a1, ok := p.Value(layer)
	if !ok {
		t.Fatalf("kept value %q gone after Release", layer)
	}
	for i := range y0.F32 {
		if y1.F32[i] != y0.F32[i] {
			t.Fatalf("output changed after Release and later passes")
		}
	}
	for i := range a0.F32 {
		if a1.F32[i] != a0.F32[i] {
			t.Fatalf("kept value %q changed after Release and later passes", layer)
		}
	}
}
