package engine

import (
	"context"
	"math/rand"
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

// TestConvRowSplitMatchesReference runs small-map convolutions whose few
// output-channel blocks rowForward splits into position halves on two
// cores (96 and 160 channels: 3 and 5 blocks of 32), pointwise (the
// k-major product) and 3×3 (the lowered row panels), with bias, residual
// and fused activations, against the operator built on kernel.Naive (the
// float64 product over a plain im2col) followed by the ONNX definitions of
// Add, Relu and Clip.
func TestConvRowSplitMatchesReference(t *testing.T) {
	if !kernel.Supported(kernel.ISAAVX512) {
		t.Skip("the row-panel path runs on AVX-512 only")
	}
	rng := rand.New(rand.NewSource(8))
	for i, tc := range []struct{ c, h, w, m, k int }{
		{64, 14, 14, 96, 1}, // pointwise with mg ≥ kk: not split by input channels
		{96, 7, 7, 160, 1},
		{64, 14, 14, 96, 3},
		{48, 7, 7, 160, 3},
		{40, 9, 11, 96, 1}, // 99 positions: a cut of 48, then 51 with an edge panel
	} {
		x := nnRand(rng, 1, tc.c, tc.h, tc.w)
		wt := nnRand(rng, tc.m, tc.c, tc.k, tc.k)
		bias := nnRand(rng, tc.m)
		p := int64(tc.k / 2)
		node := nnNode("c", "Conv", []string{"x", "w", "b"}, []string{"y"}, nnInts("pads", p, p, p, p))
		fc, rc := convPair(t, node, newArena())
		fc.constW, fc.noWinograd = true, true
		s, _ := fc.shape(x, wt)
		if !fc.useRows(s) || fc.useSlabs(s.cg*tc.k*tc.k, tc.h*tc.w) || fc.useKSplit(s, s.cg*tc.k*tc.k) {
			t.Fatalf("case %d: row-panel path not taken", i)
		}
		mr, _, _ := fc.gemm1.RowPanels(tc.h * tc.w)
		_, nr := fc.gemm1.Tile()
		if parts, _ := rowParts((tc.m+nr-1)/nr, 2, tc.h*tc.w, mr); parts != 2 {
			t.Fatalf("case %d: %d position parts on two cores, want 2", i, parts)
		}
		in := []*tensor.Tensor{x, wt, bias}
		checkForwardEpilogues(t, i, rng, fc, rc, in)
	}
}

// TestRowParts checks the split rule: only block counts that leave a core
// idle are split, and the cut falls on a row-panel boundary.
func TestRowParts(t *testing.T) {
	for _, tc := range []struct{ nq, procs, ohw, mr, parts, cut int }{
		{3, 2, 196, 12, 2, 96},
		{5, 2, 49, 12, 2, 24},
		{2, 2, 196, 12, 1, 196},
		{8, 2, 49, 12, 1, 49},
		{9, 2, 49, 12, 1, 49}, // 9 blocks share out within one block in 9
		{3, 2, 20, 12, 1, 20}, // no full panel below the middle
		{3, 1, 196, 12, 1, 196},
	} {
		if p, c := rowParts(tc.nq, tc.procs, tc.ohw, tc.mr); p != tc.parts || c != tc.cut {
			t.Errorf("rowParts(%d, %d, %d, %d) = %d, %d; want %d, %d", tc.nq, tc.procs, tc.ohw, tc.mr, p, c, tc.parts, tc.cut)
		}
	}
}
