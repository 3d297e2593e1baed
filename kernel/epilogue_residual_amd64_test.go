package kernel

import (
	"math/rand/v2"
	"testing"

	"golang.org/x/sys/cpu"
)

// TestBiasAddClampAVX2 runs the AVX2 residual epilogue directly (BiasAddClamp
// picks AVX-512 on a machine that has it) against the operator chain.
func TestBiasAddClampAVX2(t *testing.T) {
	if !cpu.X86.HasAVX2 {
		t.Skip("no AVX2")
	}
	rng := rand.New(rand.NewPCG(5, 6))
	for _, c := range residualCases() {
		for n := 8; n <= 80; n += 8 {
			x, r := randomResidual(rng, n), randomResidual(rng, n)
			got := append([]float32(nil), x...)
			biasAddClampAVX2(n, &got[0], &r[0], c.bias, c.lo, c.hi)
			for i := range got {
				if want := residualWant(x[i], r[i], c); !sameBits(got[i], want) {
					t.Fatalf("%+v n=%d: x=%v r=%v gave %v, want %v", c, n, x[i], r[i], got[i], want)
				}
			}
		}
	}
}
