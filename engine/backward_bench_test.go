package engine

import (
	"context"
	"fmt"
	"math/rand"
	"testing"

	"heedmap/tensor"
)

// benchMask measures an activation's backward mask over 1 Mi random
// activations, half of them blocked, in GB/s of the three streams (y, dy,
// dx) it reads and writes.
func benchMask(b *testing.B, mask func(dst, g, y []float32)) {
	rng := rand.New(rand.NewSource(1))
	const n = 1 << 20
	y, g, d := make([]float32, n), make([]float32, n), make([]float32, n)
	for i := range y {
		y[i] = min(max(float32(rng.NormFloat64()), 0), 6)
		g[i] = float32(rng.NormFloat64())
	}
	b.SetBytes(3 * 4 * n)
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		mask(d, g, y)
	}
}

func BenchmarkReluMask(b *testing.B) {
	benchMask(b, func(dst, g, y []float32) { reluMask(nil, dst, g, y) })
}

func BenchmarkClipMask(b *testing.B) {
	benchMask(b, func(dst, g, y []float32) { clipMask(nil, dst, g, y, 0, 6) })
}

// benchBackwardRelease is benchForwardBackward with the pass released after
// its backward sweep, as explain does, against the same without Release:
// img/s, cpu-ms/img, bytes and allocations per pass, and the arena's fresh
// buffers per pass (misses/op: what a warm pass still allocates).
func benchBackwardRelease(b *testing.B, g *Graph, path string) {
	out := g.Outputs()[0].Name
	for _, batch := range []int{1, 16} {
		for _, release := range []bool{false, true} {
			b.Run(fmt.Sprintf("batch=%d/release=%v", batch, release), func(b *testing.B) {
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
					if release {
						p.Release()
					}
				}
				step() // warm caches, pools and the memo
				step()
				b.ReportAllocs()
				m0 := g.arena.misses
				b.ResetTimer()
				cpu0 := cpuSeconds()
				for i := 0; i < b.N; i++ {
					step()
				}
				b.ReportMetric(float64(batch*b.N)/b.Elapsed().Seconds(), "img/s")
				b.ReportMetric((cpuSeconds()-cpu0)*1e3/float64(batch*b.N), "cpu-ms/img")
				b.ReportMetric(float64(g.arena.misses-m0)/float64(b.N), "misses/op")
			})
		}
	}
}

// BenchmarkResNet18BackwardRelease: set HEEDMAP_RESNET18 to a full-size
// export (else the compact committed variant runs).
func BenchmarkResNet18BackwardRelease(b *testing.B) {
	g, path := netForBench(b, "HEEDMAP_RESNET18", "resnet18")
	benchBackwardRelease(b, g, path)
}

// BenchmarkMobileNetV2BackwardRelease: set HEEDMAP_MOBILENETV2 to a
// full-size export.
func BenchmarkMobileNetV2BackwardRelease(b *testing.B) {
	g, path := netForBench(b, "HEEDMAP_MOBILENETV2", "mobilenet_v2")
	benchBackwardRelease(b, g, path)
}
