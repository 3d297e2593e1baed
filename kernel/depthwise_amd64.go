package kernel

import "golang.org/x/sys/cpu"

// row3SIMD runs the vector part of a unit-stride three-tap row,
// o[j] += w0·in[j] + w1·in[j+1] + w2·in[j+2], and returns how many leading
// values of o it did (0 when the CPU has neither AVX-512F nor AVX2+FMA).
// in must hold len(o)+2 values.
func row3SIMD(o, in []float32, w0, w1, w2 float32) int {
	n := len(o)
	if n == 0 || len(in) < n+2 {
		return 0
	}
	switch {
	case cpu.X86.HasAVX512F:
		n &^= 15
		if n > 0 {
			dwRow3AVX512(n, &o[0], &in[0], w0, w1, w2)
		}
		return n
	case cpu.X86.HasAVX2 && cpu.X86.HasFMA:
		n &^= 7
		if n > 0 {
			dwRow3AVX2(n, &o[0], &in[0], w0, w1, w2)
		}
		return n
	}
	return 0
}
