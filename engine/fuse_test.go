package engine

import (
	"context"
	"math"
	"math/rand"
	"testing"

	"heedmap/kernel"
	"heedmap/onnx"
	"heedmap/tensor"
)

// TestFusionMatchesUnfused checks that the committed compact ResNet-18
// (Conv→Relu, Conv→Add→Relu) and MobileNetV2 (Conv→Clip, Conv→Add) have
// fusable chains, that a forward-only (fused) run reproduces PyTorch's
// logits, and that it is bit identical to a run that keeps every
// intermediate value of every chain (so nothing is fused).
func TestFusionMatchesUnfused(t *testing.T) {
	for _, name := range []string{"resnet18", "mobilenet_v2"} {
		t.Run(name, func(t *testing.T) {
			n := loadCompactNet(t, name)
			meta, x, g := n.meta, n.x, n.g
			want := n.tensor(t, "logits.pb")
			if len(g.fusion.head) == 0 {
				t.Fatal("no Conv→activation pair found")
			}
			if len(g.fusion.resid) == 0 {
				t.Fatal("no Conv→Add chain found")
			}
			var heads []string
			for _, m := range []map[int]*fusedConvAct{g.fusion.head, g.fusion.resid} {
				for _, f := range m {
					for _, v := range f.inner {
						heads = append(heads, g.names[v])
					}
				}
			}
			ctx := context.Background()
			in := map[string]*tensor.Tensor{meta.Input: x}
			fused, err := g.Run(ctx, in, RunOptions{})
			if err != nil {
				t.Fatal(err)
			}
			plain, err := g.Run(ctx, in, RunOptions{Keep: heads})
			if err != nil {
				t.Fatal(err)
			}
			yf, _ := fused.Value(meta.Output)
			yp, _ := plain.Value(meta.Output)
			var num, den float64
			for i := range want.F32 {
				if yf.F32[i] != yp.F32[i] {
					t.Fatalf("logit %d: fused %v, unfused %v", i, yf.F32[i], yp.F32[i])
				}
				num = math.Max(num, math.Abs(float64(yf.F32[i])-float64(want.F32[i])))
				den = math.Max(den, math.Abs(float64(want.F32[i])))
			}
			// 1e-4: the float32 tolerance networks_test.go uses (common practice).
			if num/den > 1e-4 {
				t.Fatalf("fused logits differ from PyTorch by %.2e (relative)", num/den)
			}
			t.Logf("%d fused pairs, %d residual chains", len(g.fusion.head), len(g.fusion.resid))
		})
	}
}

// TestResidualFusionCases runs small Conv→Add(→activation) graphs fused
// and unfused (every intermediate kept) and requires bit-identical
// outputs: a convolution without bias (whose signed zeros the fused
// epilogue must keep), the residual as Add's first or second operand,
// Relu and Clip tails, a depthwise convolution, the graph input itself as
// the residual, and a residual that broadcasts (run unfused inside the
// fused operator). Each runs on the packed panel path and on the plain
// im2col path of a non-packed GEMM (kernel.Naive), at batch 1 and 3.
func TestResidualFusionCases(t *testing.T) {
	rng := rand.New(rand.NewSource(7))
	randT := func(shape ...int) *tensor.Tensor {
		x := tensor.New(shape...)
		for i := range x.F32 {
			x.F32[i] = float32(rng.NormFloat64())
			if i%13 == 0 {
				x.F32[i] = 0
			}
		}
		return x
	}
	const c = 8
	conv := func(in, w string, bias bool, group int64, out string) *onnx.Node {
		ins := []string{in, w}
		if bias {
			ins = append(ins, w+"_b")
		}
		return nnNode(out, "Conv", ins, []string{out}, nnInts("pads", 1, 1, 1, 1), nnInt("group", group))
	}
	cases := []struct {
		name  string
		nodes []*onnx.Node
		chain bool // a residual chain is expected
	}{
		{"nobias-resfirst-relu", []*onnx.Node{
			conv("x", "w1", true, 1, "a"), nnNode("r1", "Relu", []string{"a"}, []string{"h"}),
			conv("h", "w2", false, 1, "z"), nnNode("add", "Add", []string{"h", "z"}, []string{"s"}),
			nnNode("r2", "Relu", []string{"s"}, []string{"y"})}, true},
		{"bias-reslast-clip", []*onnx.Node{
			conv("x", "w1", true, 1, "z"), nnNode("add", "Add", []string{"z", "x"}, []string{"s"}),
			nnNode("clip", "Clip", []string{"s", "lo", "hi"}, []string{"y"})}, true},
		{"depthwise-noact", []*onnx.Node{
			conv("x", "wd", true, c, "z"), nnNode("add", "Add", []string{"z", "x"}, []string{"y"})}, true},
		{"broadcast", []*onnx.Node{
			conv("x", "w1", true, 1, "z"), nnNode("add", "Add", []string{"z", "cb"}, []string{"s"}),
			nnNode("r", "Relu", []string{"s"}, []string{"y"})}, true},
	}
	init := map[string]*tensor.Tensor{
		"w1": randT(c, c, 3, 3), "w1_b": randT(c), "w2": randT(c, c, 3, 3),
		"wd": randT(c, 1, 3, 3), "wd_b": randT(c), "cb": randT(1, c, 1, 1),
		"lo": tensor.FromFloat32([]float32{0}), "hi": tensor.FromFloat32([]float32{1.5}),
	}
	for _, tc := range cases {
		for _, gemm := range []kernel.GEMM{nil, kernel.Naive{}} {
			for _, batch := range []int{1, 3} {
				var opts []Option
				if gemm != nil {
					opts = append(opts, WithGEMM(gemm))
				}
				g, err := Compile(nnGraphModel([]onnx.ValueInfo{nnIn("x", "n", c, 20, 20)}, []string{"y"}, init, tc.nodes...), opts...)
				if err != nil {
					t.Fatal(err)
				}
				if got := len(g.fusion.resid) > 0; got != tc.chain {
					t.Fatalf("%s: residual chain found %v, want %v", tc.name, got, tc.chain)
				}
				var inner []string
				for _, f := range g.fusion.resid {
					for _, v := range f.inner {
						inner = append(inner, g.names[v])
					}
				}
				x := randT(batch, c, 20, 20)
				ctx := context.Background()
				in := map[string]*tensor.Tensor{"x": x}
				var outs [2]*tensor.Tensor
				for i, keep := range [][]string{nil, inner} {
					for rep := 0; rep < 2; rep++ { // the second pass reuses arena buffers
						p, err := g.Run(ctx, in, RunOptions{Keep: keep})
						if err != nil {
							t.Fatalf("%s: %v", tc.name, err)
						}
						outs[i], _ = p.Value("y")
					}
				}
				for i := range outs[0].F32 {
					if math.Float32bits(outs[0].F32[i]) != math.Float32bits(outs[1].F32[i]) {
						t.Fatalf("%s (gemm %T, batch %d): y[%d] fused %v, unfused %v", tc.name, gemm, batch, i, outs[0].F32[i], outs[1].F32[i])
					}
				}
			}
		}
	}
}
