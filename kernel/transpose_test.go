package kernel

import (
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
