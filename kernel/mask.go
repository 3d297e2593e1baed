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

// RangeBits packs MaskRange's test into bits: bit j%64 of bits[j/64] is
// set where bits(y[j]) − lo < span (unsigned) and cleared elsewhere, for
// j < len(y); bits must hold ⌈len(y)/64⌉ words. A ReLU or Clip output
// that only its gradient mask will read is kept this way between the
// forward and backward passes: a thirty-second of its size. It uses
// AVX-512 where the CPU has it; the Go loop is the reference and does the
// tail.
func RangeBits(bits []uint64, y []float32, lo, span uint32) {
	n := len(y)
	if len(bits) < (n+63)/64 {
		panic("kernel: RangeBits has too few words")
	}
	done := rangeBitsSIMD(bits, y, lo, span)
	rangeBitsGo(bits[done/64:], y[done:], lo, span)
}

func rangeBitsGo(bits []uint64, y []float32, lo, span uint32) {
	for w := 0; w*64 < len(y); w++ {
		var b uint64
		for j, v := range y[w*64 : min(w*64+64, len(y))] {
			if math.Float32bits(v)-lo < span {
				b |= 1 << j
			}
		}
		bits[w] = b
	}
}

// MaskBits sets dst[j] = g[j] where bit j%64 of bits[j/64] is set and +0
// elsewhere, for j < len(dst): MaskRange with the test read from
// RangeBits' words. g must be at least as long as dst, and dst may be g.
func MaskBits(dst, g []float32, bits []uint64) {
	n := len(dst)
	g = g[:n]
	if len(bits) < (n+63)/64 {
		panic("kernel: MaskBits has too few words")
	}
	done := maskBitsSIMD(dst, g, bits)
	maskBitsGo(dst[done:], g[done:], bits[done/64:])
}

func maskBitsGo(dst, g []float32, bits []uint64) {
	g = g[:len(dst)]
	for i := range dst {
		m := uint32(0) - uint32(bits[i/64]>>(i%64)&1)
		dst[i] = math.Float32frombits(math.Float32bits(g[i]) & m)
	}
}
