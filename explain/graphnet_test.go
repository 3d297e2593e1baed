package explain_test

import (
	"bytes"
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

type netMeta struct {
	Input, Output, Layer string
	Class                int
}

// relErr is max|a − b| / max|b|.
func relErr(a, b []float32) float64 {
	var num, den float64
	for i := range b {
		num = math.Max(num, math.Abs(float64(a[i])-float64(b[i])))
		den = math.Max(den, math.Abs(float64(b[i])))
	}
	return num / math.Max(den, 1e-30)
}

// FromGraph against PyTorch autograd goldens made by
// testdata/reference/export_nets.py (/usr/bin/python3, torch 1.13): the
// input gradient of Σ_batch logit[class], the inner activation and its
// gradient; and Grad-CAM (Selvaraju et al. 2017, eqs. 1–2) recomputed from
// the golden activation and gradient of image 0.
func TestFromGraphGoldens(t *testing.T) {
	dirs, _ := filepath.Glob("../testdata/nets/*")
	if len(dirs) == 0 {
		t.Fatal("no testdata/nets goldens")
	}
	for _, dir := range dirs {
		t.Run(filepath.Base(dir), func(t *testing.T) {
			b, err := os.ReadFile(filepath.Join(dir, "meta.json"))
			if err != nil {
				t.Skip("no meta.json")
			}
			var meta netMeta
			if err := json.Unmarshal(b, &meta); err != nil {
				t.Fatal(err)
			}
			load := func(name string) *tensor.Tensor {
				tt, _, err := onnx.LoadTensor(filepath.Join(dir, name))
				if err != nil {
					t.Fatal(err)
				}
				return tt
			}
			g, err := engine.Load(filepath.Join(dir, "model.onnx"))
			if err != nil {
				t.Fatalf("engine: %v", err)
			}
			net, err := explain.FromGraph(g, explain.GraphOptions{Input: meta.Input, Output: meta.Output})
			if err != nil {
				t.Fatal(err)
			}
			x := load("input.pb")
			if len(x.Shape) != 4 {
				t.Skipf("input %v is not an image batch", x)
			}
			tg := explain.Class(meta.Class, explain.Logit)
			gr, err := net.Gradient(ctx, x, tg.Seed(), meta.Layer)
			if err != nil {
				t.Fatal(err)
			}
			for _, c := range []struct {
				name string
				got  *tensor.Tensor
				file string
			}{{"logits", gr.Logits, "logits.pb"}, {"input gradient", gr.Input, "grad_input.pb"}, {"layer", gr.Layer, "layer.pb"}, {"layer gradient", gr.LayerGrad, "grad_layer.pb"}} {
				want := load(c.file)
				if c.got.Len() != want.Len() {
					t.Fatalf("%s: %v, golden %v", c.name, c.got, want)
				}
				e, cos := relErr(c.got.F32, want.F32), cosine(c.got.F32, want.F32)
				if e > 1e-3 || !(cos >= 0.9999) {
					t.Errorf("%s: relative error %.2e, cosine %.6f vs PyTorch (want ≤ 1e-3, ≥ 0.9999)", c.name, e, cos)
				} else {
					t.Logf("%s: relative error %.2e, cosine %.7f", c.name, e, cos)
				}
			}
			a, da := load("layer.pb"), load("grad_layer.pb")
			if len(a.Shape) != 4 {
				return // token activations (ViT): no Grad-CAM
			}
			k, h, w := a.Shape[1], a.Shape[2], a.Shape[3]
			n := h * w
			want := make([]float32, n)
			for c := 0; c < k; c++ {
				var alpha float64
				for i := 0; i < n; i++ {
					alpha += float64(da.F32[c*n+i])
				}
				alpha /= float64(n)
				for i := 0; i < n; i++ {
					want[i] += float32(alpha * float64(a.F32[c*n+i]))
				}
			}
			for i := range want {
				want[i] = float32(math.Max(float64(want[i]), 0))
			}
			x0 := tensor.FromFloat32(x.F32[:x.Len()/x.Shape[0]], append([]int{1}, x.Shape[1:]...)...)
			r, err := explain.GradCAM{Layer: meta.Layer}.Attribute(ctx, net, x0, tg)
			if err != nil {
				t.Fatal(err)
			}
			if e := relErr(r.Coarse.Data, want); e > 1e-3 {
				t.Errorf("grad-cam: relative error %.2e vs PyTorch activations", e)
			}
		})
	}
}

// Every method runs through the runtime on the compact ResNet-18; maps are
// finite and reproducible, and integrated gradients' completeness
// (Sundararajan et al. 2017) holds within the paper's 5 % at 64 steps.
func TestMethodsOnGraph(t *testing.T) {
	dir := "../testdata/nets/resnet18"
	b, err := os.ReadFile(filepath.Join(dir, "meta.json"))
	if err != nil {
		t.Skip("no testdata/nets/resnet18")
	}
	var meta netMeta
	if err := json.Unmarshal(b, &meta); err != nil {
		t.Fatal(err)
	}
	g, err := engine.Load(filepath.Join(dir, "model.onnx"))
	if err != nil {
		t.Skip(err)
	}
	net, err := explain.FromGraph(g, explain.GraphOptions{})
	if err != nil {
		t.Fatal(err)
	}
	x, _, err := onnx.LoadTensor(filepath.Join(dir, "input.pb"))
	if err != nil {
		t.Fatal(err)
	}
	x0 := tensor.FromFloat32(x.F32[:x.Len()/x.Shape[0]], append([]int{1}, x.Shape[1:]...)...)
	layer, err := g.GradCAMLayer()
	if err != nil {
		t.Fatal(err)
	}
	for _, m := range []explain.Method{
		explain.Gradient{}, explain.GradientTimesInput{},
		explain.IntegratedGradients{Steps: 256, BatchSize: 32},
		explain.SmoothGrad{Samples: 4, Seed: 1},
		explain.GradCAM{Layer: layer},
		explain.RISE{Masks: 40, Seed: 2},
	} {
		tg := explain.Predicted(explain.Softmax)
		if m.Name() == "integrated-gradients" {
			// A random-weight ReLU net has many kinks along the path; on the
			// logit the midpoint rule's gap is 4.6 %, 6.1 %, 1.6 %, 0.5 % at
			// 16, 64, 256, 1024 steps (measured), so 256 steps for 5 %.
			tg = explain.Class(meta.Class, explain.Logit)
		}
		r1, err := m.Attribute(ctx, net, x0, tg)
		if err != nil {
			t.Fatalf("%s: %v", m.Name(), err)
		}
		r2, err := m.Attribute(ctx, net, x0, tg)
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(f32bytes(r1.Map.Data), f32bytes(r2.Map.Data)) {
			t.Errorf("%s: two runs differ", m.Name())
		}
		if r1.Map.W != x0.Shape[3] || r1.Map.H != x0.Shape[2] {
			t.Errorf("%s: map %dx%d", m.Name(), r1.Map.W, r1.Map.H)
		}
		for _, v := range r1.Map.Data {
			if math.IsNaN(float64(v)) || math.IsInf(float64(v), 0) {
				t.Fatalf("%s: non-finite map value", m.Name())
			}
		}
		if m.Name() == "integrated-gradients" {
			t.Logf("IG gap %.3g (F(x) = %.4g, F(x′) = %.4g)", r1.Gap, r1.Score, r1.Baseline)
			if r1.Gap > 0.05 {
				t.Errorf("IG completeness gap %.3g > 5%%", r1.Gap)
			}
		}
	}
}
