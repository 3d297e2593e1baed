package engine

import (
	"context"
	"path/filepath"
	"testing"

	"heedmap/kernel"
	"heedmap/tensor"
)

// TestRowPathMatchesPyTorch runs each image of the committed compact
// ResNet-18 and MobileNetV2 (testdata/reference/export_nets.py, batch 2)
// alone, at batch 1, where the small-map convolutions take the row-panel
// path (nn_conv_rows.go) forward and for the input gradient, and compares
// the logits with PyTorch's row for that image within the networks
// tests' 1e-4 relative tolerance (common practice for float32), and with
// the same graph on the pure-Go kernel.Naive GEMM (plain im2col path)
// within 1e-5; and the gradient of the image's logit[class] with respect
// to the input with PyTorch's (grad_input.pb: images are independent, so
// each image's slice of the batch gradient is its own) within the
// networks tests' cosine and relative L2 bounds.
func TestRowPathMatchesPyTorch(t *testing.T) {
	if !kernel.Supported(kernel.ISAAVX512) {
		t.Skip("the row-panel path runs on AVX-512 only")
	}
	for _, name := range []string{"resnet18", "mobilenet_v2"} {
		t.Run(name, func(t *testing.T) {
			n := loadCompactNet(t, name)
			want := n.tensor(t, "logits.pb")
			gradWant := n.tensor(t, "grad_input.pb")
			rows := 0
			for _, nd := range n.g.nodes {
				if c, ok := nd.op.(*convOp); ok && c.useRows(convShape{}) {
					rows++
				}
			}
			if rows == 0 {
				t.Fatal("no convolution can take the row-panel path")
			}
			naive, err := Load(filepath.Join(n.dir, "model.onnx"), WithGEMM(kernel.Naive{}))
			if err != nil {
				t.Fatal(err)
			}
			batch, classes := n.x.Shape[0], want.Shape[1]
			per := n.x.Len() / batch
			for i := 0; i < batch; i++ {
				shape := append([]int{1}, n.x.Shape[1:]...)
				x := tensor.FromFloat32(append([]float32(nil), n.x.F32[i*per:(i+1)*per]...), shape...)
				in := map[string]*tensor.Tensor{n.meta.Input: x}
				var got [2]*tensor.Tensor
				for j, g := range []*Graph{n.g, naive} {
					for rep := 0; rep < 2; rep++ { // the second run reuses the arena and the packed weights
						p, err := g.Run(context.Background(), in, RunOptions{})
						if err != nil {
							t.Fatal(err)
						}
						got[j], _ = p.Value(n.meta.Output)
					}
				}
				p, err := n.g.Run(context.Background(), in, RunOptions{Backward: true})
				if err != nil {
					t.Fatal(err)
				}
				logits, _ := p.Value(n.meta.Output)
				seed := tensor.New(logits.Shape...)
				seed.F32[n.meta.Class] = 1
				grads, err := p.Backward(context.Background(), map[string]*tensor.Tensor{n.meta.Output: seed}, []string{n.meta.Input})
				if err != nil {
					t.Fatal(err)
				}
				p.Release()
				// The networks tests' bounds: cosine ≥ 0.9999, relative
				// L2 ≤ 1e-3 (networks_test.go).
				if cos, rel := CompareGrad(grads[n.meta.Input].F32, gradWant.F32[i*per:(i+1)*per]); cos < 0.9999 || rel > 1e-3 {
					t.Errorf("image %d: input gradient cosine %.6f, relative L2 %.2e against PyTorch", i, cos, rel)
				}
				ref := want.F32[i*classes : (i+1)*classes]
				if d := MaxRel(got[0].F32, ref); d > 1e-4 {
					t.Errorf("image %d: logits differ from PyTorch by %.2e (relative)", i, d)
				}
				if d := MaxRel(got[0].F32, got[1].F32); d > 1e-5 {
					t.Errorf("image %d: logits differ from the plain im2col path by %.2e (relative)", i, d)
				}
			}
			t.Logf("%d convolutions may take the row-panel path", rows)
		})
	}
}
