package kernel

// BiasClamp sets x[j] = min(hi, max(lo, x[j]+bias)) for every j: the bias
// of one output channel of a convolution followed by a fused activation,
// ReLU (lo = 0, hi = +Inf), Clip (its bounds) or none (lo = −Inf,
// hi = +Inf). A NaN stays NaN, as with Go's max and min. The bias is
// always added, so a −0 result of the product becomes +0 before the clamp
// (IEEE 754 round-to-nearest: −0 + +0 = +0); that matches Relu's
// max(v, 0) exactly.
//
// It uses AVX-512 or AVX2 where the CPU has them; the scalar loop is the
// reference and does the tail.
func BiasClamp(x []float32, bias, lo, hi float32) {
	done := biasClampSIMD(x, bias, lo, hi)
	biasClampGo(x[done:], bias, lo, hi)
}

func biasClampGo(x []float32, bias, lo, hi float32) {
	for j, v := range x {
		x[j] = min(hi, max(lo, v+bias))
	}
}
