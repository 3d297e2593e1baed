//go:build !amd64

package kernel

// biasClampSIMD: no vector path off amd64; the Go loop does every value.
func biasClampSIMD(x []float32, bias, lo, hi float32) int { return 0 }

// biasAddClampSIMD: no vector path off amd64.
func biasAddClampSIMD(x, r []float32, bias, lo, hi float32) int { return 0 }

// rangeBitsSIMD: no vector path off amd64.
func rangeBitsSIMD(bits []uint64, y []float32, lo, span uint32) int { return 0 }

// maskBitsSIMD: no vector path off amd64.
func maskBitsSIMD(dst, g []float32, bits []uint64) int { return 0 }

// maskRangeSIMD: no vector path off amd64.
func maskRangeSIMD(dst, g, y []float32, lo, span uint32) int { return 0 }

// max9SIMD: no vector path off amd64.
func max9SIMD(dst []float32, s *[9][]float32) int { return 0 }

// max9Stride2SIMD: no vector path off amd64.
func max9Stride2SIMD(dst []float32, r *[3][]float32) int { return 0 }

// argMax9Stride2SIMD: no vector path off amd64.
func argMax9Stride2SIMD(at []int32, r *[3][]float32, offs *[9]int32) int { return 0 }

// addStride2SIMD: no vector path off amd64.
func addStride2SIMD(dst, src []float32) int { return 0 }

// addToSIMD: no vector path off amd64.
func addToSIMD(dst, src []float32) int { return 0 }

// winogradInputSIMD: no vector path off amd64.
func winogradInputSIMD(v []float32, vstride, vc int, rows *[4][]float32, strides *[4]int, channels, x0, n, width int) bool {
	return false
}

// winogradOutputSIMD: no vector path off amd64.
func winogradOutputSIMD(y []float32, ldy, yc, rows, cols int, m []float32, mstride, mc, channels int, bias []float32, noBias float32, res []float32, lo, hi float32) bool {
	return false
}

// transpose16 and transpose16Ep: never called off amd64 (cpu.X86 reports
// no AVX-512 there).
func transpose16(n int, src []float32, lds int, dst []float32, ldd int) {}

func transpose16Ep(n int, src []float32, lds int, dst, res []float32, ldd int, bias []float32, noBias, lo, hi float32) {
}
