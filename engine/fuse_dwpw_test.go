package engine

import (
	"fmt"
	"math/rand"
	"testing"

	"heedmap/kernel"
	"heedmap/onnx"
	"heedmap/tensor"
)

// TestDepthwisePointwiseExact runs small depthwise→pointwise graphs (the
// depthwise layer and projection of an inverted residual block without
// expansion, Sandler et al. 2018) with the pair computed band by band of
// rows (fuse_dwpw.go) and with the depthwise output kept (so each layer
// runs on its own), and requires bit-identical outputs: with and without
// biases, Clip, Relu or no activation on either layer, stride 1 and 2,
// maps whose bands end in a partial panel, at batch 1 and 3 (at least
// eight channels: the slab path's floor); it checks
// the pair was taken, and not taken when the projection heads a residual
// Add. The separate layers are checked against the ONNX definition by
// the convolution tests (TestDepthwiseRowsMatchesPlanes,
// TestSgemmUnpacked and the slab-path tests).
func TestDepthwisePointwiseExact(t *testing.T) {
	if !kernel.Supported(kernel.ISAAVX512) {
		t.Skip("the pair is taken on the AVX-512 path only")
	}
	rng := rand.New(rand.NewSource(12))
	for _, tc := range []struct {
		name         string
		c, m         int
		bias         bool
		dwAct, pwAct string
		stride, hw   int
	}{
		{"clip-none-s1", 8, 13, true, "Clip", "", 1, 20},
		{"relu-clip-s2", 9, 16, true, "Relu", "Clip", 2, 35},
		{"none-relu-s1", 10, 9, false, "", "Relu", 1, 17},
		{"residual", 8, 8, true, "Clip", "Add", 1, 18},
	} {
		dwIn := []string{"x", "wd"}
		pwIn := []string{"d", "wp"}
		if tc.bias {
			dwIn, pwIn = append(dwIn, "bd"), append(pwIn, "bp")
		}
		s := int64(tc.stride)
		nodes := []*onnx.Node{nnNode("dw", "Conv", dwIn, []string{"z"}, nnInts("pads", 1, 1, 1, 1), nnInts("strides", s, s), nnInt("group", int64(tc.c)))}
		switch tc.dwAct {
		case "Clip":
			nodes = append(nodes, nnNode("a1", "Clip", []string{"z", "lo", "hi"}, []string{"d"}))
		case "Relu":
			nodes = append(nodes, nnNode("a1", "Relu", []string{"z"}, []string{"d"}))
		default:
			pwIn[0] = "z"
		}
		d := pwIn[0]
		nodes = append(nodes, nnNode("pw", "Conv", pwIn, []string{"p"}))
		switch tc.pwAct {
		case "Clip":
			nodes = append(nodes, nnNode("a2", "Clip", []string{"p", "lo", "hi"}, []string{"y"}))
		case "Relu":
			nodes = append(nodes, nnNode("a2", "Relu", []string{"p"}, []string{"y"}))
		case "Add":
			nodes = append(nodes, nnNode("a2", "Add", []string{"p", "r"}, []string{"y"}))
		default:
			nodes = append(nodes, nnNode("a2", "Identity", []string{"p"}, []string{"y"}))
		}
		oh := (tc.hw-1)/tc.stride + 1
		init := map[string]*tensor.Tensor{
			"wd": nnRand(rng, tc.c, 1, 3, 3), "bd": nnRand(rng, tc.c), "wp": nnRand(rng, tc.m, tc.c, 1, 1), "bp": nnRand(rng, tc.m),
			"lo": tensor.FromFloat32([]float32{0}), "hi": tensor.FromFloat32([]float32{1.5}),
			"r": nnRand(rng, 1, tc.m, oh, oh),
		}
		g, err := Compile(nnGraphModel([]onnx.ValueInfo{nnIn("x", "n", tc.c, tc.hw, tc.hw)}, []string{"y"}, init, nodes...))
		if err != nil {
			t.Fatal(err)
		}
		keepD := []string{"z"}
		if d != "z" {
			keepD = append(keepD, d)
		}
		for _, batch := range []int{1, 3} {
			checkPairExact(t, fmt.Sprintf("%s batch %d", tc.name, batch), g, nnRand(rng, batch, tc.c, tc.hw, tc.hw), keepD, tc.pwAct != "Add")
		}
	}
}
