package kernel

import "math"

// MaskRange sets dst[j] = g[j] where bits(y[j]) − lo < span, compared as
// unsigned 32-bit integers, and +0 elsewhere, for j < len(dst); g and y
// must be at least as long, and dst may be g. With lo and span from
// non-negative float32 bounds l < h (lo = bits(l)+1, span = bits(h)−bits(l)−1)
// the test is l < y < h: float32 order matches the bits' unsigned order
// there, and NaNs and negative values fall outside. That is the gradient
// of ReLU (l = 0, h = +Inf) and of Clip read from the output y. It uses
// AVX-512 or AVX2 where the CPU has them; the Go loop is the reference
// and does the tail.
func MaskRange(dst, g, y []float32, lo, span uint32) {
	g, y = g[:len(dst)], y[:len(dst)]
	done := maskRangeSIMD(dst, g, y, lo, span)
	maskRangeGo(dst[done:], g[done:], y[done:], lo, span)
}

func maskRangeGo(dst, g, y []float32, lo, span uint32) {
	g, y = g[:len(dst)], y[:len(dst)]
	for i := range dst {
		var m uint32
		if math.Float32bits(y[i])-lo < span {
			m = ^uint32(0)
		}
		dst[i] = math.Float32frombits(math.Float32bits(g[i]) & m)
	}
}
