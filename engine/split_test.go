package engine

import (
	"context"
	"math/rand"
	"slices"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

// TestSplitBatchMatchesWholeBatch runs each committed compact network
// (testdata/reference/export_nets.py, batch 2) forward and backward with
// Run's default, which takes an image-wise graph image by image
// (split.go), and with RunOptions.WholeBatch, and checks: that the
// MobileNetV2 graph is split and the ViT graph (Reshape, attention
// products) is not; that logits, a kept layer and their shapes agree
// within 1e-5 relative (float32 sums in another order); that the input and
// layer gradients agree within cosine 0.99999 and relative L2 1e-5; and
// that each image of a split pass is bit for bit a pass of that image
// alone. The networks tests compare the default path with PyTorch.
func TestSplitBatchMatchesWholeBatch(t *testing.T) {
	splits := map[string]bool{}
	for _, name := range []string{"resnet18", "mobilenet_v2", "mobilenet_v3", "efficientnet_b0", "densenet121", "inception_v3", "convnext_tiny", "vit_b16"} {
		t.Run(name, func(t *testing.T) {
			n := loadCompactNet(t, name)
			n.g.splitFloor = 0 // the compact nets' 64×64 images are below the floor
			run := func(opt RunOptions, x *tensor.Tensor) (*Pass, map[string]*tensor.Tensor) {
				opt.Keep = []string{n.meta.Layer}
				return n.runBackward(t, x, opt, n.meta.Input, n.meta.Layer)
			}
			split, gs := run(RunOptions{}, n.x)
			whole, gw := run(RunOptions{WholeBatch: true}, n.x)
			splits[name] = split.parts != nil
			for _, v := range []string{n.meta.Output, n.meta.Layer} {
				a, ok1 := split.Value(v)
				b, ok2 := whole.Value(v)
				if !ok1 || !ok2 {
					t.Fatalf("%s: value missing (split %v, whole %v)", v, ok1, ok2)
				}
				sa, _ := split.Shape(v)
				if !slices.Equal(a.Shape, b.Shape) || !slices.Equal(sa, b.Shape) {
					t.Fatalf("%s: shape %v (Shape says %v), whole batch %v", v, a.Shape, sa, b.Shape)
				}
				if d := MaxRel(a.F32, b.F32); d > 1e-5 {
					t.Errorf("%s: split and whole batch differ by %.2e (relative)", v, d)
				}
			}
			for _, v := range []string{n.meta.Input, n.meta.Layer} {
				if cos, rel := CompareGrad(gs[v].F32, gw[v].F32); cos < 0.99999 || rel > 1e-5 {
					t.Errorf("gradient of %s: cosine %.7f, relative L2 %.2e between split and whole batch", v, cos, rel)
				}
			}
			if split.parts == nil {
				return
			}
			batch := n.x.Shape[0]
			per := n.x.Len() / batch
			for i := 0; i < batch; i++ {
				x := tensor.FromFloat32(n.x.F32[i*per:(i+1)*per], append([]int{1}, n.x.Shape[1:]...)...)
				one, g1 := run(RunOptions{}, x)
				a, _ := one.Value(n.meta.Output)
				b, _ := split.Value(n.meta.Output)
				k := a.Len()
				if !slices.Equal(a.F32, b.F32[i*k:(i+1)*k]) {
					t.Errorf("image %d: logits of the split batch are not those of the image alone", i)
				}
				if k := g1[n.meta.Input].Len(); !slices.Equal(g1[n.meta.Input].F32, gs[n.meta.Input].F32[i*k:(i+1)*k]) {
					t.Errorf("image %d: input gradient of the split batch is not that of the image alone", i)
				}
			}
		})
	}
	t.Logf("split image by image: %v", splits)
	if !splits["mobilenet_v2"] || splits["vit_b16"] {
		t.Errorf("want MobileNetV2 split and ViT-B/16 not, got %v", splits)
	}
}

// TestSplitRules builds one-layer graphs around a convolution (its few
// weights are outweighed by the activations, so an image-wise graph is
// split) and checks which Run takes image by image: a Relu, a MaxPool or
// a Flatten with axis 1 may follow; a MaxPool with indices (ONNX counts
// them across the batch), a Flatten with axis 2 (which folds the batch
// into its first axis), a Gemm whose C has a row per exported image, and
// an Add of a constant with a batch axis of 2 may not. Each result is
// also compared with the whole batch's.
func TestSplitRules(t *testing.T) {
	rng := rand.New(rand.NewSource(13))
	conv := nnNode("c", "Conv", []string{"x", "w"}, []string{"a"}, nnInts("pads", 1, 1, 1, 1))
	for _, tc := range []struct {
		name  string
		tail  []*onnx.Node
		init  map[string]*tensor.Tensor
		split bool
	}{
		{"relu", []*onnx.Node{nnNode("r", "Relu", []string{"a"}, []string{"y"})}, nil, true},
		{"flatten1", []*onnx.Node{nnNode("f", "Flatten", []string{"a"}, []string{"y"})}, nil, true},
		{"flatten2", []*onnx.Node{nnNode("f", "Flatten", []string{"a"}, []string{"y"}, nnInt("axis", 2))}, nil, false},
		{"maxpool", []*onnx.Node{nnNode("m", "MaxPool", []string{"a"}, []string{"y"}, nnInts("kernel_shape", 2, 2))}, nil, true},
		{"maxpool-indices", []*onnx.Node{nnNode("m", "MaxPool", []string{"a"}, []string{"y", "idx"}, nnInts("kernel_shape", 2, 2))}, nil, false},
		{"gemm-c-rows", []*onnx.Node{nnNode("f", "Flatten", []string{"a"}, []string{"fl"}), nnNode("g", "Gemm", []string{"fl", "gb", "gc"}, []string{"y"})},
			map[string]*tensor.Tensor{"gb": nnRand(rng, 4*16*16, 3), "gc": nnRand(rng, 2, 3)}, false},
		{"add-batch-const", []*onnx.Node{nnNode("p", "Add", []string{"a", "k"}, []string{"y"})},
			map[string]*tensor.Tensor{"k": nnRand(rng, 2, 4, 16, 16)}, false},
	} {
		init := map[string]*tensor.Tensor{"w": nnRand(rng, 4, 4, 3, 3)}
		for k, v := range tc.init {
			init[k] = v
		}
		g, err := Compile(nnGraphModel([]onnx.ValueInfo{nnIn("x", "n", 4, 16, 16)}, []string{"y"}, init, append([]*onnx.Node{conv}, tc.tail...)...))
		if err != nil {
			t.Fatalf("%s: %v", tc.name, err)
		}
		g.splitFloor = 0
		in := map[string]*tensor.Tensor{"x": nnRand(rng, 2, 4, 16, 16)}
		p, err := g.Run(context.Background(), in, RunOptions{})
		if err != nil {
			t.Fatalf("%s: %v", tc.name, err)
		}
		if got := p.parts != nil; got != tc.split {
			t.Errorf("%s: split %v, want %v", tc.name, got, tc.split)
		}
		w, err := g.Run(context.Background(), in, RunOptions{WholeBatch: true})
		if err != nil {
			t.Fatalf("%s: %v", tc.name, err)
		}
		a, _ := p.Value("y")
		b, _ := w.Value("y")
		if !slices.Equal(a.Shape, b.Shape) || MaxRel(a.F32, b.F32) > 1e-5 {
			t.Errorf("%s: %v %v against the whole batch's %v", tc.name, a.Shape, MaxRel(a.F32, b.F32), b.Shape)
		}
	}
}

// TestSplitFloor checks that a graph whose images produce less than
// splitFloorBytes keeps its batches, and takes them image by image once
// the same graph's images are large enough.
func TestSplitFloor(t *testing.T) {
	rng := rand.New(rand.NewSource(14))
	init := map[string]*tensor.Tensor{"w": nnRand(rng, 4, 4, 3, 3)}
	g, err := Compile(nnGraphModel([]onnx.ValueInfo{nnIn("x", "n", 4, "h", "w")}, []string{"y"}, init,
		nnNode("c", "Conv", []string{"x", "w"}, []string{"a"}, nnInts("pads", 1, 1, 1, 1)),
		nnNode("r", "Relu", []string{"a"}, []string{"y"})))
	if err != nil {
		t.Fatal(err)
	}
	// Two 4-channel maps a side: 32·side² bytes produced per image.
	for _, tc := range []struct {
		side  int
		split bool
	}{{16, false}, {400, true}} {
		p, err := g.Run(context.Background(), map[string]*tensor.Tensor{"x": nnRand(rng, 2, 4, tc.side, tc.side)}, RunOptions{})
		if err != nil {
			t.Fatal(err)
		}
		if got := p.parts != nil; got != tc.split {
			t.Errorf("%d×%d images (%d bytes each): split %v, want %v", tc.side, tc.side, 32*tc.side*tc.side, got, tc.split)
		}
	}
}
