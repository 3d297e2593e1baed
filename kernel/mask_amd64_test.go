package kernel

import (
	"math"
	"math/rand/v2"
	"testing"

	"golang.org/x/sys/cpu"
)

// maskWant is the gradient mask by its definition on float32 values: g
// where l < y < h, +0 elsewhere (ReLU: d/dx max(0, x) = 1 for x > 0, 0
// otherwise, the subgradient 0 at the kink by common practice; Clip: 1
// strictly inside the bounds). NaN is inside no interval.
func maskWant(g, y, l, h float32) float32 {
	if y > l && y < h {
		return g
	}
	return 0
}

// eachMaskCase calls f for ReLU's and ReLU6's bounds (l, h, and the
// unsigned range test lo, span of MaskRange) at every length up to maxN,
// with outputs y drawn at random, a quarter of them special values (±0,
// the bounds, ±Inf, NaN, the smallest subnormal, the floats next to 6),
// and gradients g.
func eachMaskCase(r *rand.Rand, maxN int, f func(l, h float32, lo, span uint32, y, g []float32)) {
	inf := float32(math.Inf(1))
	special := []float32{0, float32(math.Copysign(0, -1)), 6, inf, -inf, float32(math.NaN()), 1e-45, 5.9999995, 6.0000005}
	for _, b := range []struct{ l, h float32 }{{0, inf}, {0, 6}} {
		lo := math.Float32bits(b.l) + 1
		span := math.Float32bits(b.h) - math.Float32bits(b.l) - 1
		for n := 0; n <= maxN; n++ {
			y, g := make([]float32, n), make([]float32, n)
			for i := range y {
				y[i] = float32(r.NormFloat64() * 4)
				if r.IntN(4) == 0 {
					y[i] = special[r.IntN(len(special))]
				}
				g[i] = float32(r.NormFloat64())
			}
			f(b.l, b.h, lo, span, y, g)
		}
	}
}

// TestMaskRange checks MaskRange, its Go loop and (on a CPU with AVX2)
// the AVX2 loop directly against maskWant for ReLU's and ReLU6's bounds
// at every length up to a few vectors, including ±0, ±Inf, NaN and values
// at the bounds.
func TestMaskRange(t *testing.T) {
	eachMaskCase(rand.New(rand.NewPCG(31, 32)), 80, func(l, h float32, lo, span uint32, y, g []float32) {
		n := len(y)
		check := func(name string, got []float32) {
			for i := range got {
				want := maskWant(g[i], y[i], l, h)
				if math.Float32bits(got[i]) != math.Float32bits(want) {
					t.Fatalf("%s [%v, %v] n=%d: y=%v g=%v gave %v, want %v", name, l, h, n, y[i], g[i], got[i], want)
				}
			}
		}
		got := make([]float32, n)
		MaskRange(got, g, y, lo, span)
		check("MaskRange", got)
		goLoop := make([]float32, n)
		maskRangeGo(goLoop, g, y, lo, span)
		check("Go loop", goLoop)
		if cpu.X86.HasAVX2 && n >= 8 {
			avx2 := append([]float32(nil), goLoop...)
			maskRangeAVX2(n&^7, &avx2[0], &g[0], &y[0], lo, span)
			check("AVX2", avx2)
		}
		inPlace := append([]float32(nil), g...)
		MaskRange(inPlace, inPlace, y, lo, span)
		check("in place", inPlace)
	})
}

// TestRangeBits checks that RangeBits followed by MaskBits is MaskRange
// bit for bit (and so maskWant, the mask's definition), for the vector
// and Go paths, at every length up to 200 (three full words and the
// tails), in place and not, on the same special values; and that
// RangeBits clears the bits of a reused word.
func TestRangeBits(t *testing.T) {
	eachMaskCase(rand.New(rand.NewPCG(33, 34)), 200, func(l, h float32, lo, span uint32, y, g []float32) {
		n := len(y)
		want := make([]float32, n)
		MaskRange(want, g, y, lo, span)
		for i := range want {
			if w := maskWant(g[i], y[i], l, h); math.Float32bits(want[i]) != math.Float32bits(w) {
				t.Fatalf("MaskRange n=%d: %v, definition %v", n, want[i], w)
			}
		}
		words := (n + 63) / 64
		check := func(name string, bits []uint64, inPlace bool) {
			got := make([]float32, n)
			src := g
			if inPlace {
				copy(got, g)
				src = got
			}
			MaskBits(got, src, bits)
			for i := range got {
				if math.Float32bits(got[i]) != math.Float32bits(want[i]) {
					t.Fatalf("%s [%v, %v] n=%d in place %v: y=%v g=%v gave %v, want %v", name, l, h, n, inPlace, y[i], g[i], got[i], want[i])
				}
			}
			gl := make([]float32, n)
			maskBitsGo(gl, g, bits)
			for i := range gl {
				if math.Float32bits(gl[i]) != math.Float32bits(want[i]) {
					t.Fatalf("%s, MaskBits' Go loop, n=%d: %v, want %v", name, n, gl[i], want[i])
				}
			}
		}
		bits := make([]uint64, words)
		for i := range bits {
			bits[i] = ^uint64(0) // stale bits must be cleared
		}
		RangeBits(bits, y, lo, span)
		check("RangeBits", bits, false)
		check("RangeBits", bits, true)
		goBits := make([]uint64, words)
		rangeBitsGo(goBits, y, lo, span)
		for i := range goBits {
			if goBits[i] != bits[i] {
				t.Fatalf("n=%d word %d: Go loop %x, RangeBits %x", n, i, goBits[i], bits[i])
			}
		}
	})
}
