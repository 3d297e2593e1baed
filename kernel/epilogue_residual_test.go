package kernel

import (
	"math"
	"math/rand/v2"
	"testing"
)

// residualCase is one clamp interval of the fused residual epilogue.
type residualCase struct{ bias, lo, hi float32 }

// residualCases are the epilogues a Conv→Add(→Relu/Clip) chain fuses to:
// ReLU (ONNX Relu: max(0, x)), ReLU6 (ONNX Clip 0..6), no activation, and
// a convolution without bias (−0, the additive identity of IEEE 754).
func residualCases() []residualCase {
	inf := float32(math.Inf(1))
	return []residualCase{
		{0.25, 0, inf},
		{-1.5, 0, 6},
		{0.75, float32(math.Inf(-1)), inf},
		{float32(math.Copysign(0, -1)), float32(math.Inf(-1)), inf},
	}
}

// residualWant computes the chain the way the unfused ONNX operators do,
// one float32 rounding per operator: Conv's output plus its bias, then
// Add (Y = A + B), then Relu (max(0, x)) or Clip (min(max(x, lo), hi));
// a NaN propagates through every step (IEEE 754).
func residualWant(x, r float32, c residualCase) float32 {
	conv := x + c.bias
	sum := r + conv // Add's operands in the other order: addition commutes
	if sum != sum {
		return sum
	}
	if c.lo > float32(math.Inf(-1)) && sum < c.lo {
		sum = c.lo
	}
	if c.hi < float32(math.Inf(1)) && sum > c.hi {
		sum = c.hi
	}
	if c.lo == 0 && sum == 0 {
		sum = 0 // Relu/Clip at 0 returns +0 for −0 (max(0, −0) = +0 in Go and in VMAXPS with 0 second)
	}
	return sum
}

// randomResidual fills n values with normal samples and, one in twelve
// each, NaN, −0 and −Inf.
func randomResidual(r *rand.Rand, n int) []float32 {
	v := make([]float32, n)
	for i := range v {
		v[i] = float32(r.NormFloat64() * 4)
		switch r.IntN(12) {
		case 0:
			v[i] = float32(math.NaN())
		case 1:
			v[i] = float32(math.Copysign(0, -1))
		case 2:
			v[i] = float32(math.Inf(-1))
		}
	}
	return v
}

func sameBits(a, b float32) bool {
	return math.Float32bits(a) == math.Float32bits(b) || (a != a && b != b)
}

// TestBiasAddClamp checks the fused residual epilogue against the chain of
// ONNX operators it replaces (residualWant) at every length up to a few
// vectors, so each vector width and every tail length is exercised,
// bit for bit, including NaN, ±Inf and signed zeros.
func TestBiasAddClamp(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	for _, c := range residualCases() {
		for n := 0; n <= 80; n++ {
			x, r := randomResidual(rng, n), randomResidual(rng, n)
			got := append([]float32(nil), x...)
			BiasAddClamp(got, r, c.bias, c.lo, c.hi)
			gotGo := append([]float32(nil), x...)
			biasAddClampGo(gotGo, r, c.bias, c.lo, c.hi)
			for i := range got {
				want := residualWant(x[i], r[i], c)
				if !sameBits(got[i], want) {
					t.Fatalf("%+v n=%d: x=%v r=%v gave %v, want %v", c, n, x[i], r[i], got[i], want)
				}
				if !sameBits(gotGo[i], want) {
					t.Fatalf("Go loop %+v n=%d: x=%v r=%v gave %v, want %v", c, n, x[i], r[i], gotGo[i], want)
				}
			}
		}
	}
}

func BenchmarkBiasAddClamp(b *testing.B) {
	x := make([]float32, 56*56)
	r := make([]float32, 56*56)
	b.SetBytes(int64(12 * len(x)))
	for b.Loop() {
		BiasAddClamp(x, r, 0.5, 0, 6)
	}
}
