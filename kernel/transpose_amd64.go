package kernel

// transpose16 runs n 16×16 blocks of Transpose on the vector path.
func transpose16(n int, src []float32, lds int, dst []float32, ldd int) {
	transpose16AVX512(n, &src[0], lds, &dst[0], ldd)
}

// transpose16Ep runs n 16×16 blocks of TransposeEpilogue on the vector
// path; bias is nil for noBias on every row, res nil for no residual.
func transpose16Ep(n int, src []float32, lds int, dst, res []float32, ldd int, bias []float32, noBias, lo, hi float32) {
	bp, bstep := &noBias, 0
	if bias != nil {
		bp, bstep = &bias[0], 1
	}
	if res != nil {
		transpose16EpResAVX512(n, &src[0], lds, &dst[0], &res[0], ldd, bp, bstep, lo, hi)
		return
	}
	transpose16EpAVX512(n, &src[0], lds, &dst[0], ldd, bp, bstep, lo, hi)
}
