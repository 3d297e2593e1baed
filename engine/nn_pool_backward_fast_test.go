package engine

import (
	"math"
	"math/rand/v2"
	"testing"
)

// TestMaxPlaneBackward3x3MatchesGeneral checks the 3×3 fast path of the
// max-pool input gradient against the general loop (maxRow with indices,
// the path the ONNX MaxPool conformance tests check through Indices) bit
// for bit over eachPool3x3Case.
func TestMaxPlaneBackward3x3MatchesGeneral(t *testing.T) {
	r := rand.New(rand.NewPCG(21, 22))
	eachPool3x3Case(r, func(tc pool3x3Case, g geom2, src []float32) {
		dy := make([]float32, g.oh*g.ow)
		for i := range dy {
			dy[i] = float32(r.NormFloat64())
		}
		// The general loop: each window's index from maxRow, gradient
		// added there.
		want := make([]float32, len(src))
		val, idx := make([]float32, g.ow), make([]int64, g.ow)
		for oy := 0; oy < g.oh; oy++ {
			maxRow(src, val, idx, g, 0, oy, 0, g.ow)
			for ox, a := range idx {
				want[a] += dy[oy*g.ow+ox]
			}
		}
		got := make([]float32, len(src))
		maxPlaneBackward(src, dy, got, g, newMaxScratch(g.ow))
		for i := range got {
			if math.Float32bits(got[i]) != math.Float32bits(want[i]) {
				t.Fatalf("%+v: dx[%d] = %v, general loop %v", tc, i, got[i], want[i])
			}
		}
	})
}
