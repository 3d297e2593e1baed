package engine

import (
	"context"
	"fmt"
	"math/rand"
	"os"
	"path/filepath"
	"syscall"
	"testing"

	"heedmap/tensor"
)

// netForBench loads the network a whole-model benchmark runs: the
// full-size export named by the environment variable env (a model.onnx
// made by testdata/reference/export_nets.py --full), else the compact
// committed variant in testdata/nets/<dir>.
func netForBench(b *testing.B, env, dir string) (*Graph, string) {
	path := os.Getenv(env)
	if path == "" {
		path = filepath.Join("..", "testdata", "nets", dir, "model.onnx")
	}
	if _, err := os.Stat(path); err != nil {
		b.Skipf("no %s export at %s (set %s to a full-size model.onnx): %v", dir, path, env, err)
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

// cpuSeconds is the user+system CPU time this process has used. On a
// shared machine wall-clock img/s swings with other load, while CPU time
// per image (cpu-ms/img) measures the work itself.
func cpuSeconds() float64 {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return float64(ru.Utime.Nano()+ru.Stime.Nano()) / 1e9
}

// benchForward reports img/s and allocations per forward pass.
func benchForward(b *testing.B, g *Graph, path string) {
	for _, batch := range []int{1, 16} {
		b.Run(fmt.Sprintf("batch=%d", batch), func(b *testing.B) {
			name, x := benchInput(b, g, batch)
			b.Logf("%s, input %v", path, x.Shape)
			ctx := context.Background()
			in := map[string]*tensor.Tensor{name: x}
			if _, err := g.Run(ctx, in, RunOptions{}); err != nil { // warm caches and pools
				b.Fatal(err)
			}
			b.ReportAllocs()
			b.ResetTimer()
			cpu0 := cpuSeconds()
			for i := 0; i < b.N; i++ {
				if _, err := g.Run(ctx, in, RunOptions{}); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(batch*b.N)/b.Elapsed().Seconds(), "img/s")
			b.ReportMetric((cpuSeconds()-cpu0)*1e3/float64(batch*b.N), "cpu-ms/img")
		})
	}
}

// benchForwardBackward reports img/s and allocations per forward pass plus
// the input gradient of the first logit.
func benchForwardBackward(b *testing.B, g *Graph, path string) {
	out := g.Outputs()[0].Name
	for _, batch := range []int{1, 16} {
		b.Run(fmt.Sprintf("batch=%d", batch), func(b *testing.B) {
			name, x := benchInput(b, g, batch)
			b.Logf("%s, input %v", path, x.Shape)
			ctx := context.Background()
			in := map[string]*tensor.Tensor{name: x}
			step := func() {
				p, err := g.Run(ctx, in, RunOptions{Backward: true})
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
			step() // warm caches and pools
			b.ReportAllocs()
			b.ResetTimer()
			cpu0 := cpuSeconds()
			for i := 0; i < b.N; i++ {
				step()
			}
			b.ReportMetric(float64(batch*b.N)/b.Elapsed().Seconds(), "img/s")
			b.ReportMetric((cpuSeconds()-cpu0)*1e3/float64(batch*b.N), "cpu-ms/img")
		})
	}
}

func BenchmarkResNet18Forward(b *testing.B) {
	g, path := netForBench(b, "HEEDMAP_RESNET18", "resnet18")
	benchForward(b, g, path)
}

func BenchmarkResNet18ForwardBackward(b *testing.B) {
	g, path := netForBench(b, "HEEDMAP_RESNET18", "resnet18")
	benchForwardBackward(b, g, path)
}

// The MobileNetV2 benchmarks exercise the depthwise and Clip (ReLU6) path;
// set HEEDMAP_MOBILENETV2 to a full-size export.
func BenchmarkMobileNetV2Forward(b *testing.B) {
	g, path := netForBench(b, "HEEDMAP_MOBILENETV2", "mobilenet_v2")
	benchForward(b, g, path)
}

func BenchmarkMobileNetV2ForwardBackward(b *testing.B) {
	g, path := netForBench(b, "HEEDMAP_MOBILENETV2", "mobilenet_v2")
	benchForwardBackward(b, g, path)
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
