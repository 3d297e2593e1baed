package explain_test

import (
	"encoding/json"
	"os"
	"path/filepath"
	"testing"

	"heedmap/engine"
	"heedmap/explain"
	"heedmap/occlusion"
	"heedmap/onnx"
	"heedmap/tensor"
)

// benchNet loads the compact ResNet-18 of testdata/nets (64×64 input, random
// weights) through the runtime, or the network directory named by
// HEEDMAP_BENCH_NET (same layout: model.onnx, input.pb, meta.json), e.g. the
// full-size ResNet-18 at 224×224 written by
// testdata/reference/export_nets.py --full --out DIR resnet18.
func benchNet(b *testing.B) (explain.Network, *tensor.Tensor, string) {
	dir := "../testdata/nets/resnet18"
	if d := os.Getenv("HEEDMAP_BENCH_NET"); d != "" {
		dir = d
	}
	raw, err := os.ReadFile(filepath.Join(dir, "meta.json"))
	if err != nil {
		b.Skip("no testdata/nets/resnet18")
	}
	var meta netMeta
	if err := json.Unmarshal(raw, &meta); err != nil {
		b.Fatal(err)
	}
	g, err := engine.Load(filepath.Join(dir, "model.onnx"))
	if err != nil {
		b.Skip(err)
	}
	net, err := explain.FromGraph(g, explain.GraphOptions{Input: meta.Input, Output: meta.Output})
	if err != nil {
		b.Fatal(err)
	}
	x, _, err := onnx.LoadTensor(filepath.Join(dir, "input.pb"))
	if err != nil {
		b.Fatal(err)
	}
	x0 := tensor.FromFloat32(x.F32[:x.Len()/x.Shape[0]], append([]int{1}, x.Shape[1:]...)...)
	return net, x0, meta.Layer
}

// BenchmarkMethods reports images per minute for each method with its
// default settings on the compact ResNet-18 (64×64), or the network in
// HEEDMAP_BENCH_NET. Run with
//
//	go test -run '^$' -bench Methods -benchtime 1x ./explain
//
// The bench notes (bench/METHODS.md) hold the measured table.
func BenchmarkMethods(b *testing.B) {
	net, x, layer := benchNet(b)
	methods := []explain.Method{
		explain.Gradient{},
		explain.GradientTimesInput{},
		explain.IntegratedGradients{},
		explain.SmoothGrad{},
		explain.GradCAM{Layer: layer},
		explain.RISE{},
		occlusion.Occlusion{},
	}
	for _, m := range methods {
		b.Run(m.Name(), func(b *testing.B) {
			for i := 0; i < b.N; i++ {
				if _, err := m.Attribute(ctx, net, x, explain.Predicted(explain.Logit)); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(b.N)/b.Elapsed().Minutes(), "img/min")
			b.ReportMetric(b.Elapsed().Seconds()/float64(b.N), "s/img")
		})
	}
}
