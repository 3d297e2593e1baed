package engine

import (
	"context"
	"fmt"
	"math/rand"
	"os"
	"path/filepath"
	"testing"

	"heedmap/tensor"
)

// resnet18ForBench loads the network the ResNet-18 benchmarks run: the
// full-size export named by HEEDMAP_RESNET18 (a model.onnx made by
// testdata/reference/export_nets.py --full), else the compact committed
// variant in testdata/nets/resnet18.
func resnet18ForBench(b *testing.B) (*Graph, string) {
	path := os.Getenv("HEEDMAP_RESNET18")
	if path == "" {
		path = filepath.Join("..", "testdata", "nets", "resnet18", "model.onnx")
	}
	if _, err := os.Stat(path); err != nil {
		b.Skipf("no ResNet-18 export at %s (set HEEDMAP_RESNET18 to a full-size model.onnx): %v", path, err)
	}
	g, err := Load(path)
	if err != nil {
		b.Fatal(err)
	}
	return g, path
}

func benchInput(b *testing.B, g *Graph, batch int) (string, *tensor.Tensor) {
	in := g.Inputs()[0]
	shape := make([]int, len(in.Shape))
	for i, d := range in.Shape {
		switch {
		case i == 0:
			shape[i] = batch
		case d.Value > 0:
			shape[i] = int(d.Value)
		default:
			b.Fatalf("input %q dimension %d is not fixed", in.Name, i)
		}
	}
	x := tensor.New(shape...)
	rng := rand.New(rand.NewSource(1))
	for i := range x.F32 {
		x.F32[i] = float32(rng.NormFloat64())
	}
	return in.Name, x
}

func BenchmarkResNet18Forward(b *testing.B) {
	g, path := resnet18ForBench(b)
	for _, batch := range []int{1, 16} {
		b.Run(fmt.Sprintf("batch=%d", batch), func(b *testing.B) {
			name, x := benchInput(b, g, batch)
			b.Logf("%s, input %v", path, x.Shape)
			ctx := context.Background()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				if _, err := g.Run(ctx, map[string]*tensor.Tensor{name: x}, RunOptions{}); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(batch*b.N)/b.Elapsed().Seconds(), "img/s")
		})
	}
}

func BenchmarkResNet18ForwardBackward(b *testing.B) {
	g, path := resnet18ForBench(b)
	out := g.Outputs()[0].Name
	for _, batch := range []int{1, 16} {
		b.Run(fmt.Sprintf("batch=%d", batch), func(b *testing.B) {
			name, x := benchInput(b, g, batch)
			b.Logf("%s, input %v", path, x.Shape)
			ctx := context.Background()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				p, err := g.Run(ctx, map[string]*tensor.Tensor{name: x}, RunOptions{Backward: true})
				if err != nil {
					b.Fatal(err)
				}
				y, _ := p.Value(out)
				seed := tensor.New(y.Shape...)
				for n := 0; n < y.Shape[0]; n++ {
					seed.F32[n*y.Shape[1]] = 1
				}
				if _, err := p.Backward(ctx, map[string]*tensor.Tensor{out: seed}, []string{name}); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(batch*b.N)/b.Elapsed().Seconds(), "img/s")
		})
	}
}

// BenchmarkConv3x3 measures one ResNet-style 3×3 convolution (64→64
// channels, 56×56, batch 1) in GFLOP/s, counting 2·M·N·K per output.
func BenchmarkConv3x3(b *testing.B) {
	rng := rand.New(rand.NewSource(1))
	x, w := nnRand(rng, 1, 64, 56, 56), nnRand(rng, 64, 64, 3, 3)
	op, err := buildConv(nnNode("c", "Conv", []string{"x", "w"}, []string{"y"}, nnInts("pads", 1, 1, 1, 1)), &Env{GEMM: defaultGEMM(), Opset: 13})
	if err != nil {
		b.Fatal(err)
	}
	flops := 2.0 * 64 * 56 * 56 * 64 * 9
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if _, err := op.Forward([]*tensor.Tensor{x, w}); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(flops*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
}
