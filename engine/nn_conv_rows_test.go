package engine

import (
	"context"
	"math"
	"path/filepath"
	"testing"

	"heedmap/kernel"
	"heedmap/tensor"
)

// TestRowPathMatchesPyTorch runs each image of the committed compact
// ResNet-18 and MobileNetV2 (testdata/reference/export_nets.py, batch 2)
// alone, at batch 1, where the small-map convolutions take the row-panel
// path (nn_conv_rows.go), and compares the logits with PyTorch's row for
// that image within the networks tests' 1e-4 relative tolerance (common
// practice for float32), and with the same graph on the pure-Go kernel.Naive
// GEMM (plain im2col path) within 1e-5.
func TestRowPathMatchesPyTorch(t *testing.T) {
	if !kernel.Supported(kernel.ISAAVX512) {
		t.Skip("the row-panel path runs on AVX-512 only")
	}
	for _, name := range []string{"resnet18", "mobilenet_v2"} {
		t.Run(name, func(t *testing.T) {
			n := loadCompactNet(t, name)
			want := n.tensor(t, "logits.pb")
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
				ref := want.F32[i*classes : (i+1)*classes]
				if d := relMax(got[0].F32, ref); d > 1e-4 {
					t.Errorf("image %d: logits differ from PyTorch by %.2e (relative)", i, d)
				}
				if d := relMax(got[0].F32, got[1].F32); d > 1e-5 {
					t.Errorf("image %d: logits differ from the plain im2col path by %.2e (relative)", i, d)
				}
			}
			t.Logf("%d convolutions may take the row-panel path", rows)
		})
	}
}

// relMax is max|a−b| / max|b|.
func relMax(a, b []float32) float64 {
	var num, den float64
	for i := range b {
		num = math.Max(num, math.Abs(float64(a[i])-float64(b[i])))
		den = math.Max(den, math.Abs(float64(b[i])))
	}
	return num / den
}
