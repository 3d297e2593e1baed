package engine

import (
	"math/rand"
	"testing"
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

func BenchmarkReluMask(b *testing.B) { benchMask(b, reluMask) }

func BenchmarkClipMask(b *testing.B) {
	benchMask(b, func(dst, g, y []float32) { clipMask(dst, g, y, 0, 6) })
}
