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

// TestMax9Stride2 checks Max9Stride2 and ArgMax9Stride2 (vector and Go
// loops) against the same scan, with its position, over the nine taps of
// a 3×3 window at column stride 2, with rows exactly 2·n+1 long.
func TestMax9Stride2(t *testing.T) {
	r := rand.New(rand.NewPCG(43, 44))
	special := []float32{0, float32(math.Copysign(0, -1)), float32(math.Inf(1)), float32(math.Inf(-1)), float32(math.NaN())}
	for n := 0; n <= 70; n++ {
		var rows [3][]float32
		for i := range rows {
			rows[i] = make([]float32, 2*n+1)
			for j := range rows[i] {
				rows[i][j] = float32(r.IntN(5) - 2)
				if r.IntN(5) == 0 {
					rows[i][j] = special[r.IntN(len(special))]
				}
			}
		}
		got, goOnly := make([]float32, n), make([]float32, n)
		Max9Stride2(got, &rows)
		max9Stride2Go(goOnly, &rows, 0)
		offs := [9]int32{100, 101, 102, 200, 201, 202, 300, 301, 302}
		at, atGo := make([]int32, n), make([]int32, n)
		ArgMax9Stride2(at, &rows, &offs)
		argMax9Stride2Go(atGo, &rows, &offs, 0)
		for j := 0; j < n; j++ {
			var taps []float32
			for i := range rows {
				taps = append(taps, rows[i][2*j:2*j+3]...)
			}
			want, wantAt := taps[0], 0
			for k, v := range taps[1:] {
				if v > want {
					want, wantAt = v, k+1
				}
			}
			if math.Float32bits(got[j]) != math.Float32bits(want) || math.Float32bits(goOnly[j]) != math.Float32bits(want) {
				t.Fatalf("n=%d j=%d: Max9Stride2 %v, Go loop %v, want %v (taps %v)", n, j, got[j], goOnly[j], want, taps)
			}
			if at[j] != offs[wantAt] || atGo[j] != offs[wantAt] {
				t.Fatalf("n=%d j=%d: ArgMax9Stride2 %d, Go loop %d, want %d (taps %v)", n, j, at[j], atGo[j], offs[wantAt], taps)
			}
		}
	}
}
