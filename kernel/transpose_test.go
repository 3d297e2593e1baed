package kernel

import (
	"math"
	"math/rand"
	"testing"
)

// TestTranspose checks Transpose against the definition, dst[j·ldd + i] =
// src[i·lds + j], on shapes with and without whole 16×16 blocks, and that
// it writes nothing else.
func TestTranspose(t *testing.T) {
	rng := rand.New(rand.NewSource(9))
	for _, sh := range [][4]int{{16, 16, 16, 16}, {49, 32, 32, 49}, {196, 64, 70, 200}, {5, 3, 3, 5}, {33, 47, 50, 40}, {16, 160, 161, 17}} {
		rows, cols, lds, ldd := sh[0], sh[1], sh[2], sh[3]
		src := make([]float32, (rows-1)*lds+cols)
		for i := range src {
			src[i] = rng.Float32()
		}
		dst := make([]float32, (cols-1)*ldd+rows+7)
		for i := range dst {
			dst[i] = -1
		}
		Transpose(dst, ldd, src, lds, rows, cols)
		for k, v := range dst {
			j, i := k/ldd, k%ldd
			want := float32(-1)
			if j < cols && i < rows {
				want = src[i*lds+j]
			}
			if v != want {
				t.Fatalf("%v: dst[%d] (row %d, col %d) = %v, want %v", sh, k, j, i, v, want)
			}
		}
	}
}

// TestTransposeEpilogue checks the transpose with the convolution epilogue
// against its scalar loop bit for bit (which is BiasClamp's and
// BiasAddClamp's arithmetic: min(hi, max(lo, (v+b)+r))), with and without
// per-row biases and a residual, a NaN included, and that it writes
// nothing else.
func TestTransposeEpilogue(t *testing.T) {
	rng := rand.New(rand.NewSource(10))
	fill := func(n int) []float32 { return normals(rng, n) }
	for _, sh := range [][4]int{{16, 16, 16, 16}, {49, 64, 64, 49}, {196, 96, 100, 200}, {5, 3, 3, 5}, {33, 47, 50, 40}} {
		rows, cols, lds, ldd := sh[0], sh[1], sh[2], sh[3]
		for _, withBias := range []bool{false, true} {
			for _, withRes := range []bool{false, true} {
				src := fill((rows-1)*lds + cols)
				src[len(src)/2] = float32(math.NaN())
				var bias, res []float32
				if withBias {
					bias = fill(cols)
				}
				if withRes {
					res = fill((cols-1)*ldd + rows)
				}
				got := fill((cols-1)*ldd + rows + 7)
				want := append([]float32(nil), got...)
				TransposeEpilogue(got, ldd, src, lds, rows, cols, bias, -0.0, res, -0.5, 1.5)
				transposeEpilogueGo(want, ldd, src, lds, 0, rows, 0, cols, bias, -0.0, res, -0.5, 1.5)
				for i := range want {
					if math.Float32bits(got[i]) != math.Float32bits(want[i]) {
						t.Fatalf("%v bias=%v res=%v: dst[%d] = %v, scalar %v", sh, withBias, withRes, i, got[i], want[i])
					}
				}
			}
		}
	}
}
