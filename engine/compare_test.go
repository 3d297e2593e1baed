package engine

import "math"

// The error measures the engine's tests compare results with, exported to
// the external test package too.

// MaxRel is max|a−b| / max|b| (max|a−b| when b is all zero).
func MaxRel(a, b []float32) float64 {
	var num, den float64
	for i := range b {
		num = math.Max(num, math.Abs(float64(a[i])-float64(b[i])))
		den = math.Max(den, math.Abs(float64(b[i])))
	}
	if den == 0 {
		return num
	}
	return num / den
}

// CompareGrad returns the cosine similarity of a and b and the relative L2
// error ‖a−b‖₂/‖b‖₂, accumulated in float64; NaN for both when b is zero,
// since a zero golden gradient would make the check vacuous.
func CompareGrad(a, b []float32) (cos, rel float64) {
	var ab, aa, bb, dd float64
	for i := range b {
		x, y := float64(a[i]), float64(b[i])
		ab += x * y
		aa += x * x
		bb += y * y
		dd += (x - y) * (x - y)
	}
	if bb == 0 {
		return math.NaN(), math.NaN()
	}
	return ab / math.Sqrt(aa*bb), math.Sqrt(dd / bb)
}
