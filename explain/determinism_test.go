package explain_test

import (
	"bytes"
	"path/filepath"
	"testing"

	"heedmap/engine"
	"heedmap/explain"
	"heedmap/kernel"
	"heedmap/occlusion"
)

// The reproducibility requirement: the same seed and inputs give
// byte-identical maps, whatever the batch size a method uses and however
// many goroutines the GEMM kernel splits work across. Every method runs
// through the runtime on the compact ResNet-18 with a one-thread kernel and
// batch size 1, and again with a four-thread kernel and batches of 16 (and
// 7, which leaves a ragged last batch); the NPY bytes must be equal.
func TestMethodsByteIdentical(t *testing.T) {
	dir := filepath.Join("../testdata/nets", "resnet18")
	_, x, _, meta := loadNet(t, dir)
	nets := map[string]explain.Network{}
	for _, threads := range []int{1, 4} {
		k, err := kernel.New(kernel.Options{Threads: threads})
		if err != nil {
			t.Fatal(err)
		}
		g, err := engine.Load(filepath.Join(dir, "model.onnx"), engine.WithGEMM(k))
		if err != nil {
			t.Fatal(err)
		}
		n, err := explain.FromGraph(g, explain.GraphOptions{})
		if err != nil {
			t.Fatal(err)
		}
		nets[map[int]string{1: "1 thread", 4: "4 threads"}[threads]] = n
	}
	methods := func(batch int) []explain.Method {
		return []explain.Method{
			explain.Gradient{},
			explain.GradientTimesInput{},
			explain.IntegratedGradients{Steps: 24, BatchSize: batch},
			explain.IntegratedGradients{Steps: 10, Baseline: explain.BaselineNoise, Seed: 7, BatchSize: batch},
			explain.SmoothGrad{Samples: 10, Seed: 3, BatchSize: batch},
			explain.SmoothGrad{Samples: 2, Seed: 3, BatchSize: batch, OverIG: &explain.IntegratedGradients{Steps: 6, BatchSize: batch}},
			explain.GradCAM{Layer: meta.Layer},
			explain.RISE{Masks: 40, Seed: 5, BatchSize: batch},
			occlusion.Occlusion{Patch: 16, Stride: 12, BatchSize: batch},
		}
	}
	npy := func(m explain.Map) []byte {
		var b bytes.Buffer
		if err := explain.WriteNPY(&b, m); err != nil {
			t.Fatal(err)
		}
		return b.Bytes()
	}
	ref := methods(1)
	for i, m := range ref {
		r0, err := m.Attribute(ctx, nets["1 thread"], x, explain.Predicted(explain.Softmax))
		if err != nil {
			t.Fatalf("%s: %v", m.Name(), err)
		}
		want := npy(r0.Map)
		for _, batch := range []int{16, 7} {
			for _, nn := range []string{"1 thread", "4 threads"} {
				m2 := methods(batch)[i]
				r, err := m2.Attribute(ctx, nets[nn], x, explain.Predicted(explain.Softmax))
				if err != nil {
					t.Fatal(err)
				}
				if !bytes.Equal(npy(r.Map), want) {
					t.Errorf("%s: batch %d, %s: map differs from batch 1, 1 thread (max relative difference %.2e)", m.Name(), batch, nn, relErr(r.Map.Data, r0.Map.Data))
				}
			}
		}
	}
}
