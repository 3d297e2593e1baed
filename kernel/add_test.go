package kernel

import (
	"math"
	"math/rand/v2"
	"testing"
)

// TestAddStride2 checks AddStride2 (vector and Go loops) against
// dst[2j] += src[j] written out, bit for bit, and that odd elements and
// anything past 2·len(src)−1 stay as they were.
func TestAddStride2(t *testing.T) {
	r := rand.New(rand.NewPCG(51, 52))
	for n := 0; n <= 70; n++ {
		src := make([]float32, n)
		for j := range src {
			src[j] = r.Float32()*2 - 1
		}
		dst := make([]float32, 2*n+3)
		for i := range dst {
			dst[i] = r.Float32()*2 - 1
		}
		want := append([]float32(nil), dst...)
		for j, v := range src {
			want[2*j] += v
		}
		got := append([]float32(nil), dst...)
		AddStride2(got, src)
		goOnly := append([]float32(nil), dst...)
		addStride2Go(goOnly, src)
		for i := range want {
			if math.Float32bits(got[i]) != math.Float32bits(want[i]) || math.Float32bits(goOnly[i]) != math.Float32bits(want[i]) {
				t.Fatalf("n=%d element %d: AddStride2 %v, Go loop %v, want %v", n, i, got[i], goOnly[i], want[i])
			}
		}
	}
}

// TestAddTo checks AddTo against dst[i] += src[i] bit for bit, over
// lengths around the vector step, and that dst past len(src) is kept.
func TestAddTo(t *testing.T) {
	r := rand.New(rand.NewPCG(53, 54))
	for _, n := range []int{0, 1, 63, 64, 65, 127, 128, 200, 1000} {
		src := make([]float32, n)
		dst := make([]float32, n+5)
		for i := range src {
			src[i] = r.Float32()*2 - 1
		}
		for i := range dst {
			dst[i] = r.Float32()*2 - 1
		}
		want := append([]float32(nil), dst...)
		for i, v := range src {
			want[i] += v
		}
		AddTo(dst, src)
		for i := range want {
			if math.Float32bits(dst[i]) != math.Float32bits(want[i]) {
				t.Fatalf("n=%d element %d: %v, want %v", n, i, dst[i], want[i])
			}
		}
	}
}
