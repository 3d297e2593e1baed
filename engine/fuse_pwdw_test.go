package engine

import (
	"context"
	"fmt"
	"math"
	"math/rand"
	"testing"

	"heedmap/kernel"
	"heedmap/onnx"
	"heedmap/tensor"
)

// TestPointwiseDepthwiseExact runs small pointwise→depthwise graphs (the
// inverted residual block's expansion and depthwise layer, Sandler et al.
// 2018) with the pair computed block by block of channels (fuse_pwdw.go)
// and with the expansion kept (so each layer runs on its own), and
// requires bit-identical outputs: with and without biases, Clip and Relu
// activations or none, stride 1 and 2, a channel count that leaves a
// partial block (13 = 12 + 1) and several blocks per core (40), at batch
// 1 and 3; and it checks the pair was taken. The committed compact
// MobileNetV2 is checked the same way, and against PyTorch, by
// TestFusionMatchesUnfused.
func TestPointwiseDepthwiseExact(t *testing.T) {
	if !kernel.Supported(kernel.ISAAVX512) {
		t.Skip("the pair is taken on the AVX-512 path only")
	}
	rng := rand.New(rand.NewSource(11))
	const c = 16
	for _, tc := range []struct {
		name        string
		m           int
		bias, pwAct bool
		dwAct       string
		stride, hw  int
	}{
		{"clip-clip-s1", 40, true, true, "Clip", 1, 20},
		{"clip-clip-s2", 13, true, true, "Clip", 2, 23},
		{"nobias-noact-relu-s2", 13, false, false, "Relu", 2, 20},
		{"bias-relu-none-s1", 24, true, true, "", 1, 17},
		{"residual-s1", 24, true, true, "Add", 1, 17},
	} {
		pwIn := []string{"x", "wp"}
		dwIn := []string{"e", "wd"}
		if tc.bias {
			pwIn, dwIn = append(pwIn, "bp"), append(dwIn, "bd")
		}
		nodes := []*onnx.Node{nnNode("pw", "Conv", pwIn, []string{"z"})}
		e := "z"
		if tc.pwAct {
			nodes = append(nodes, nnNode("a1", "Clip", []string{"z", "lo", "hi"}, []string{"e"}))
			e = "e"
		}
		dwIn[0] = e
		s := int64(tc.stride)
		nodes = append(nodes, nnNode("dw", "Conv", dwIn, []string{"d"}, nnInts("pads", 1, 1, 1, 1), nnInts("strides", s, s), nnInt("group", int64(tc.m))))
		switch tc.dwAct {
		case "Clip":
			nodes = append(nodes, nnNode("a2", "Clip", []string{"d", "lo", "hi"}, []string{"y"}))
		case "Relu":
			nodes = append(nodes, nnNode("a2", "Relu", []string{"d"}, []string{"y"}))
		case "Add": // a residual chain on the depthwise layer: the pair is not taken
			nodes = append(nodes, nnNode("a2", "Add", []string{"d", "r"}, []string{"y"}))
		default:
			nodes = append(nodes, nnNode("a2", "Identity", []string{"d"}, []string{"y"}))
		}
		init := map[string]*tensor.Tensor{
			"wp": nnRand(rng, tc.m, c, 1, 1), "bp": nnRand(rng, tc.m), "wd": nnRand(rng, tc.m, 1, 3, 3), "bd": nnRand(rng, tc.m),
			"lo": tensor.FromFloat32([]float32{0}), "hi": tensor.FromFloat32([]float32{1.5}),
			"r": nnRand(rng, 1, tc.m, (tc.hw-1)/tc.stride+1, (tc.hw-1)/tc.stride+1),
		}
		g, err := Compile(nnGraphModel([]onnx.ValueInfo{nnIn("x", "n", c, tc.hw, tc.hw)}, []string{"y"}, init, nodes...))
		if err != nil {
			t.Fatal(err)
		}
		for _, batch := range []int{1, 3} {
			checkPairExact(t, fmt.Sprintf("%s batch %d", tc.name, batch), g, nnRand(rng, batch, c, tc.hw, tc.hw), []string{"z", e}, tc.dwAct != "Add")
		}
	}
}

// checkPairExact runs g on x ("x" → "y") with nothing kept, where a pair
// of layers may be computed together, and keeping the values in keep, so
// that each layer runs on its own, twice each way (the second pass reuses
// pooled buffers). It requires the pair taken (p.pairs > 0) exactly when
// pair says and only in the first way, and y bit for bit the same.
func checkPairExact(t *testing.T, what string, g *Graph, x *tensor.Tensor, keep []string, pair bool) {
	t.Helper()
	in := map[string]*tensor.Tensor{"x": x}
	var outs [2]*tensor.Tensor
	for i, kept := range [][]string{nil, keep} {
		for rep := 0; rep < 2; rep++ {
			p, err := g.Run(context.Background(), in, RunOptions{Keep: kept, WholeBatch: true})
			if err != nil {
				t.Fatalf("%s: %v", what, err)
			}
			if want := i == 0 && pair; (p.pairs > 0) != want {
				t.Fatalf("%s: %d pairs computed together, want them %v", what, p.pairs, want)
			}
			outs[i], _ = p.Value("y")
		}
	}
	for i := range outs[0].F32 {
		if math.Float32bits(outs[0].F32[i]) != math.Float32bits(outs[1].F32[i]) {
			t.Fatalf("%s: y[%d] %v as a pair, %v layer by layer", what, i, outs[0].F32[i], outs[1].F32[i])
		}
	}
}
