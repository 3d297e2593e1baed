package kernel

import (
	"math"
	"math/rand/v2"
	"testing"
)

// TestBiasClamp checks the vector epilogue against its definition
// (min(hi, max(lo, x+bias)), the composition of ONNX Conv's bias with the
// Relu and Clip operators) at every length up to a few vectors, so each
// vector width and every tail length is exercised, including NaN, ±Inf
// and signed zeros.
func TestBiasClamp(t *testing.T) {
	r := rand.New(rand.NewPCG(1, 2))
	inf := float32(math.Inf(1))
	cases := []struct{ bias, lo, hi float32 }{
		{0.25, 0, inf},                  // ReLU
		{-1.5, 0, 6},                    // ReLU6 (Clip 0..6)
		{0, float32(math.Inf(-1)), inf}, // bias only
		{0, 0, inf},                     // ReLU without bias
	}
	for _, c := range cases {
		for n := 0; n <= 80; n++ {
			x := make([]float32, n)
			for i := range x {
				x[i] = float32(r.NormFloat64() * 4)
				switch r.IntN(12) {
				case 0:
					x[i] = float32(math.NaN())
				case 1:
					x[i] = float32(math.Copysign(0, -1))
				case 2:
					x[i] = -inf
				}
			}
			want := make([]float32, n)
			for i, v := range x {
				s := v + c.bias
				if s < c.lo {
					s = c.lo
				}
				if s > c.hi {
					s = c.hi
				}
				if v != v {
					s = v
				}
				want[i] = s
			}
			got := append([]float32(nil), x...)
			BiasClamp(got, c.bias, c.lo, c.hi)
			for i := range got {
				if math.Float32bits(got[i]) != math.Float32bits(want[i]) && !(got[i] != got[i] && want[i] != want[i]) {
					t.Fatalf("bias %v clamp [%v, %v], n=%d: x[%d]=%v gave %v, want %v", c.bias, c.lo, c.hi, n, i, x[i], got[i], want[i])
				}
			}
		}
	}
}

func BenchmarkBiasClamp(b *testing.B) {
	x := make([]float32, 56*56)
	b.SetBytes(int64(8 * len(x)))
	for b.Loop() {
		BiasClamp(x, 0.5, 0, 6)
	}
}

// BenchmarkBiasClampGo is the scalar reference loop, for comparison with
// BenchmarkBiasClamp.
func BenchmarkBiasClampGo(b *testing.B) {
	x := make([]float32, 56*56)
	b.SetBytes(int64(8 * len(x)))
	for b.Loop() {
		biasClampGo(x, 0.5, 0, 6)
	}
}
