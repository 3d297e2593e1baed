package explain_test

import (
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"testing"

	"heedmap/engine"
	"heedmap/explain"
	"heedmap/onnx"
	"heedmap/tensor"
)

// cosine is ⟨a, b⟩ / (‖a‖‖b‖); NaN when either is zero.
func cosine(a, b []float32) float64 {
	var ab, aa, bb float64
	for i := range a {
		ab += float64(a[i]) * float64(b[i])
		aa += float64(a[i]) * float64(a[i])
		bb += float64(b[i]) * float64(b[i])
	}
	return ab / math.Sqrt(aa*bb)
}

// loadNet compiles testdata/nets/<name> and returns the network, image 0 of
// its input.pb as [1, C, H, W], the graph and its meta.json.
func loadNet(t testing.TB, dir string) (explain.Network, *tensor.Tensor, *engine.Graph, netMeta) {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(dir, "meta.json"))
	if err != nil {
		t.Skipf("no %s/meta.json", dir)
	}
	var meta netMeta
	if err := json.Unmarshal(b, &meta); err != nil {
		t.Fatal(err)
	}
	g, err := engine.Load(filepath.Join(dir, "model.onnx"))
	if err != nil {
		t.Fatal(err)
	}
	net, err := explain.FromGraph(g, explain.GraphOptions{Input: meta.Input, Output: meta.Output})
	if err != nil {
		t.Fatal(err)
	}
	x, _, err := onnx.LoadTensor(filepath.Join(dir, "input.pb"))
	if err != nil {
		t.Fatal(err)
	}
	x0 := tensor.FromFloat32(append([]float32(nil), x.F32[:x.Len()/x.Shape[0]]...), append([]int{1}, x.Shape[1:]...)...)
	return net, x0, g, meta
}

// Grad-CAM (Selvaraju et al. 2017, eqs. 1–2) through the runtime against
// PyTorch: goldens made by testdata/reference/gradcam_golden.py
// (/usr/bin/python3, torch 1.13), which rebuilds each compact net of
// testdata/nets, takes the activation and its gradient with forward and
// tensor hooks, forms ReLU(Σ_k mean(∂y/∂A_k)·A_k) and upsamples it with
// F.interpolate(bilinear, align_corners=False). Every class's coarse map
// must match (cosine ≥ 0.9999; a map PyTorch finds all zero must be zero
// here too), and the upsampled map of one class must match at the input
// size. The graph's automatic layer choice must be the reference's layer.
func TestGradCAMTorchGoldens(t *testing.T) {
	dirs, _ := filepath.Glob("../testdata/nets/*/gradcam.json")
	if len(dirs) == 0 {
		t.Fatal("no Grad-CAM goldens: run testdata/reference/gradcam_golden.py")
	}
	gradCAMGoldens(t, dirs)
}

// The same check on full-size networks (e.g. ResNet-18 at 224×224 with a
// 7×7 layer), opt-in: HEEDMAP_FULL_NETS=DIR where DIR was written by
// export_nets.py --full --out DIR and gradcam_golden.py --full DIR.
func TestGradCAMTorchGoldensFull(t *testing.T) {
	root := os.Getenv("HEEDMAP_FULL_NETS")
	if root == "" {
		t.Skip("set HEEDMAP_FULL_NETS to a directory of full-size exports with Grad-CAM goldens")
	}
	dirs, _ := filepath.Glob(filepath.Join(root, "*", "gradcam.json"))
	if len(dirs) == 0 {
		t.Fatalf("no */gradcam.json under %s", root)
	}
	gradCAMGoldens(t, dirs)
}

func gradCAMGoldens(t *testing.T, dirs []string) {
	for _, gj := range dirs {
		dir := filepath.Dir(gj)
		t.Run(filepath.Base(dir), func(t *testing.T) {
			var gm struct{ Class, Classes int }
			b, err := os.ReadFile(gj)
			if err != nil {
				t.Fatal(err)
			}
			if err := json.Unmarshal(b, &gm); err != nil {
				t.Fatal(err)
			}
			net, x, g, meta := loadNet(t, dir)
			if auto, err := g.GradCAMLayer(); err != nil || auto != meta.Layer {
				t.Errorf("automatic layer %q (%v), reference layer %q", auto, err, meta.Layer)
			}
			cshape, coarse, err := explain.LoadNPY(filepath.Join(dir, "gradcam_coarse.npy"))
			if err != nil {
				t.Fatal(err)
			}
			ushape, up, err := explain.LoadNPY(filepath.Join(dir, "gradcam.npy"))
			if err != nil {
				t.Fatal(err)
			}
			if len(cshape) != 3 || cshape[0] != gm.Classes || len(ushape) != 2 || ushape[0] != x.Shape[2] || ushape[1] != x.Shape[3] {
				t.Fatalf("golden shapes %v %v for input %v", cshape, ushape, x.Shape)
			}
			n := cshape[1] * cshape[2]
			var scale float64
			for _, v := range coarse {
				scale = math.Max(scale, float64(v))
			}
			worst := 1.0
			for k := 0; k < gm.Classes; k++ {
				r, err := explain.GradCAM{Layer: meta.Layer}.Attribute(ctx, net, x, explain.Class(k, explain.Logit))
				if err != nil {
					t.Fatal(err)
				}
				if r.Coarse.H != cshape[1] || r.Coarse.W != cshape[2] {
					t.Fatalf("class %d: coarse map %d×%d, golden %v", k, r.Coarse.W, r.Coarse.H, cshape)
				}
				want := coarse[k*n : (k+1)*n]
				var wmax, gmax float64
				for i := range want {
					wmax, gmax = math.Max(wmax, float64(want[i])), math.Max(gmax, float64(r.Coarse.Data[i]))
				}
				if wmax == 0 {
					// ReLU of an all-negative sum: ours must be zero too,
					// up to float32 rounding of a near-zero sum.
					if gmax > 1e-4*scale {
						t.Errorf("class %d: PyTorch map is zero, ours peaks at %.3g (scale %.3g)", k, gmax, scale)
					}
					continue
				}
				c := cosine(r.Coarse.Data, want)
				worst = math.Min(worst, c)
				if c < 0.9999 {
					t.Errorf("class %d: coarse cosine %.6f < 0.9999", k, c)
				}
				if k == gm.Class {
					if c := cosine(r.Map.Data, up); c < 0.9999 {
						t.Errorf("class %d: upsampled cosine %.6f < 0.9999", k, c)
					} else {
						t.Logf("class %d: upsampled %d×%d cosine %.7f, relative error %.2e", k, r.Map.W, r.Map.H, c, relErr(r.Map.Data, up))
					}
				}
			}
			t.Logf("worst coarse cosine over %d classes: %.7f", gm.Classes, worst)
		})
	}
}
