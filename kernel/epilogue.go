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

// BiasAddClamp sets x[j] = min(hi, max(lo, (x[j]+bias)+r[j])) for every
// j < len(x): a convolution's bias, then a residual input r added as ONNX
// Add would add it, then a fused ReLU, Clip or no activation. The two
// additions are rounded separately in that order, so the result is bit
// identical to Conv, Add and Relu run one after another (float addition is
// commutative, so the order of Add's operands does not matter). A bias of
// −0 adds nothing (x + −0 = x for every x, −0 included), which is how a
// convolution without bias keeps its signed zeros. r must be at least as
// long as x.
func BiasAddClamp(x, r []float32, bias, lo, hi float32) {
	r = r[:len(x)]
	done := biasAddClampSIMD(x, r, bias, lo, hi)
	biasAddClampGo(x[done:], r[done:], bias, lo, hi)
}

func biasAddClampGo(x, r []float32, bias, lo, hi float32) {
	r = r[:len(x)]
	for j, v := range x {
		x[j] = min(hi, max(lo, (v+bias)+r[j]))
	}
}
