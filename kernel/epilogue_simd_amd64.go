package kernel

import "golang.org/x/sys/cpu"

// biasClampSIMD runs the vector part of BiasClamp and returns how many
// leading values of x it did (0 when the CPU has neither AVX-512F nor AVX2).
func biasClampSIMD(x []float32, bias, lo, hi float32) int {
	n := len(x)
	switch {
	case n >= 16 && cpu.X86.HasAVX512F:
		n &^= 15
		biasClampAVX512(n, &x[0], bias, lo, hi)
		return n
	case n >= 8 && cpu.X86.HasAVX2:
		n &^= 7
		biasClampAVX2(n, &x[0], bias, lo, hi)
		return n
	}
	return 0
}

// biasAddClampSIMD runs the vector part of BiasAddClamp and returns how
// many leading values of x it did (0 without AVX-512F or AVX2).
func biasAddClampSIMD(x, r []float32, bias, lo, hi float32) int {
	n := len(x)
	switch {
	case n >= 16 && cpu.X86.HasAVX512F:
		n &^= 15
		biasAddClampAVX512(n, &x[0], &r[0], bias, lo, hi)
		return n
	case n >= 8 && cpu.X86.HasAVX2:
		n &^= 7
		biasAddClampAVX2(n, &x[0], &r[0], bias, lo, hi)
		return n
	}
	return 0
}

// maskRangeSIMD runs the vector part of MaskRange and returns how many
// leading values it did (0 without AVX-512F or AVX2).
func maskRangeSIMD(dst, g, y []float32, lo, span uint32) int {
	n := len(dst)
	switch {
	case n >= 16 && cpu.X86.HasAVX512F:
		n &^= 15
		maskRangeAVX512(n, &dst[0], &g[0], &y[0], lo, span)
		return n
	case n >= 8 && cpu.X86.HasAVX2:
		n &^= 7
		maskRangeAVX2(n, &dst[0], &g[0], &y[0], lo, span)
		return n
	}
	return 0
}

// rangeBitsSIMD runs the vector part of RangeBits and returns how many
// leading values it did, a multiple of 64 (0 without AVX-512F).
func rangeBitsSIMD(bits []uint64, y []float32, lo, span uint32) int {
	n := len(y) &^ 63
	if n == 0 || !cpu.X86.HasAVX512F {
		return 0
	}
	rangeBitsAVX512(n, &bits[0], &y[0], lo, span)
	return n
}

// maskBitsSIMD runs the vector part of MaskBits and returns how many
// leading values it did, a multiple of 64 (0 without AVX-512F).
func maskBitsSIMD(dst, g []float32, bits []uint64) int {
	n := len(dst) &^ 63
	if n == 0 || !cpu.X86.HasAVX512F {
		return 0
	}
	maskBitsAVX512(n, &dst[0], &g[0], &bits[0])
	return n
}

// max9SIMD runs the vector part of Max9 and returns how many leading
// outputs it did (0 without AVX-512F).
func max9SIMD(dst []float32, s *[9][]float32) int {
	n := len(dst) &^ 15
	if n == 0 || !cpu.X86.HasAVX512F {
		return 0
	}
	var p [9]*float32
	for i := range p {
		p[i] = &s[i][0]
	}
	max9AVX512(n, &dst[0], &p)
	return n
}

// max9Stride2SIMD runs the vector part of Max9Stride2 and returns how
// many leading outputs it did (0 without AVX-512F). Each row holds at
// least 2·len(dst)+1 values.
func max9Stride2SIMD(dst []float32, r *[3][]float32) int {
	n := len(dst) &^ 15
	if n == 0 || !cpu.X86.HasAVX512F {
		return 0
	}
	p := [3]*float32{&r[0][0], &r[1][0], &r[2][0]}
	max9Stride2AVX512(n, &dst[0], &p)
	return n
}

// argMax9Stride2SIMD runs the vector part of ArgMax9Stride2 and returns
// how many leading outputs it did (0 without AVX-512F).
func argMax9Stride2SIMD(at []int32, r *[3][]float32, offs *[9]int32) int {
	n := len(at) &^ 15
	if n == 0 || !cpu.X86.HasAVX512F {
		return 0
	}
	p := [3]*float32{&r[0][0], &r[1][0], &r[2][0]}
	argMax9Stride2AVX512(n, &at[0], &p, offs)
	return n
}

// addStride2SIMD runs the vector part of AddStride2 and returns how many
// leading source values it added (0 without AVX-512F).
func addStride2SIMD(dst, src []float32) int {
	n := len(src) &^ 15
	if n == 0 || !cpu.X86.HasAVX512F {
		return 0
	}
	addStride2AVX512(n, &dst[0], &src[0])
	return n
}

// addToSIMD runs the vector part of AddTo and returns how many leading
// values it added (0 without AVX-512F).
func addToSIMD(dst, src []float32) int {
	n := len(src) &^ 63
	if n == 0 || !cpu.X86.HasAVX512F {
		return 0
	}
	addToAVX512(n, &dst[0], &src[0])
	return n
}
