package kernel

import (
	"math"
	"math/rand/v2"
	"testing"
)

// TestMax9 checks Max9 (vector and Go loops) and the Go loop alone
// against the scan that defines max-pooling's output in ONNX MaxPool,
// written out here: keep the first value, replace it by a later one only
// when the later one is greater. Inputs mix ties, ±0, ±Inf and NaN, which
// decide which value is kept; lengths cover partial vectors.
func TestMax9(t *testing.T) {
	r := rand.New(rand.NewPCG(41, 42))
	special := []float32{0, float32(math.Copysign(0, -1)), float32(math.Inf(1)), float32(math.Inf(-1)), float32(math.NaN())}
	for n := 0; n <= 70; n++ {
		var s [9][]float32
		for i := range s {
			s[i] = make([]float32, n+i) // longer rows are allowed
			for j := range s[i] {
				s[i][j] = float32(r.IntN(5) - 2)
				if r.IntN(5) == 0 {
					s[i][j] = special[r.IntN(len(special))]
				}
			}
		}
		want := make([]float32, n)
		for j := range want {
			best := s[0][j]
			for i := 1; i < 9; i++ {
				if s[i][j] > best {
					best = s[i][j]
				}
			}
			want[j] = best
		}
		got, goOnly := make([]float32, n), make([]float32, n)
		Max9(got, &s)
		max9Go(goOnly, &s, 0)
		for j := range want {
			if math.Float32bits(got[j]) != math.Float32bits(want[j]) || math.Float32bits(goOnly[j]) != math.Float32bits(want[j]) {
				t.Fatalf("n=%d j=%d: Max9 %v, Go loop %v, want %v (column %v)", n, j, got[j], goOnly[j], want[j], column(&s, j))
			}
		}
	}
}

func column(s *[9][]float32, j int) []float32 {
	var c []float32
	for i := range s {
		c = append(c, s[i][j])
	}
	return c
}
