package explain_test

import (
	"bytes"
	"path/filepath"
	"testing"

	"heedmap/explain"
	"heedmap/explain/explaintest"
	"heedmap/occlusion"
)

// The defaults the issue states, as each method reports them in
// Result.Params when its options are left at their zero values: occlusion
// P = 16, S = 8 at 224 pixels; integrated gradients 64 steps, black
// baseline; SmoothGrad n = 25, σ = 0.15 of the input range; RISE N = 2000,
// s = 7, p = 0.5; Grad-CAM's automatic layer (the runtime's choice, which
// must be the layer the PyTorch reference hooks, testdata/nets meta.json).
func TestDefaultsReported(t *testing.T) {
	want := func(r *explain.Result, kv ...string) {
		t.Helper()
		for i := 0; i < len(kv); i += 2 {
			if v, ok := r.Param(kv[i]); !ok || v != kv[i+1] {
				t.Errorf("%s: %s = %q (%v), want %q; params %v", r.Method, kv[i], v, ok, kv[i+1], r.Params)
			}
		}
	}
	big := explaintest.NewLinear(3, 224, 224, 2, 1)
	xb := explaintest.RandomInput(3, 224, 224, 2)
	r, err := occlusion.Occlusion{}.Attribute(ctx, big, xb, explain.Class(0, explain.Logit))
	if err != nil {
		t.Fatal(err)
	}
	want(r, "patch", "16", "stride", "8", "windows", "729", "fill", "mean", "fill_note", "black (no mean/std normalisation declared)")

	small := explaintest.NewMLP(3, 8, 8, 8, 3, 3)
	xs := explaintest.RandomInput(3, 8, 8, 4)
	tg := explain.Predicted(explain.Logit)
	if r, err = (explain.IntegratedGradients{}).Attribute(ctx, small, xs, tg); err != nil {
		t.Fatal(err)
	}
	want(r, "steps", "64", "baseline", "black", "quadrature", "midpoint")
	if r, err = (explain.SmoothGrad{}).Attribute(ctx, small, xs, tg); err != nil {
		t.Fatal(err)
	}
	want(r, "samples", "25", "sigma_fraction", "0.15", "over", "gradient")
	if r, err = (explain.RISE{}).Attribute(ctx, small, xs, tg); err != nil {
		t.Fatal(err)
	}
	want(r, "masks", "2000", "grid", "7", "p", "0.5")

	net, x, _, meta := loadNet(t, filepath.Join("../testdata/nets", "resnet18"))
	auto, err := explain.GradCAM{}.Attribute(ctx, net, x, tg)
	if err != nil {
		t.Fatal(err)
	}
	want(auto, "layer", meta.Layer, "layer_choice", "automatic", "layer_size", "2x2")
	named, err := explain.GradCAM{Layer: meta.Layer}.Attribute(ctx, net, x, tg)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(f32bytes(auto.Map.Data), f32bytes(named.Map.Data)) {
		t.Error("automatic layer gives another map than the named layer")
	}
	if _, err := (explain.GradCAM{}).Attribute(ctx, small, xs, tg); err == nil {
		t.Error("automatic layer on a network that cannot choose one: no error")
	}
}

// ReadNPY reads back what WriteNPY writes, bit for bit, and refuses other
// dtypes (NEP 1 header dict).
func TestReadNPYRoundTrip(t *testing.T) {
	m := explain.Map{W: 3, H: 2, Data: []float32{1, -2.5, 3, 0.125, 5e-8, -6}}
	var b bytes.Buffer
	if err := explain.WriteNPY(&b, m); err != nil {
		t.Fatal(err)
	}
	shape, data, err := explain.ReadNPY(bytes.NewReader(b.Bytes()))
	if err != nil || len(shape) != 2 || shape[0] != 2 || shape[1] != 3 || !bytes.Equal(f32bytes(data), f32bytes(m.Data)) {
		t.Fatalf("read back %v %v %v", shape, data, err)
	}
	bad := bytes.Replace(b.Bytes(), []byte("'<f4'"), []byte("'<f8'"), 1)
	if _, _, err := explain.ReadNPY(bytes.NewReader(bad)); err == nil {
		t.Error("float64 .npy accepted")
	}
}
