package kernel

// wideKernels returns the path's tap-offset kernels: the main tile and the
// edge tiles by height. Only the AVX-512 path has them.
func wideKernels(cfg *config) (main wideTaps, edge func(mr int) wideTaps, ok bool) {
	if cfg.isa != ISAAVX512 {
		return nil, nil, false
	}
	return wideTaps12, wideEdge512, true
}

// wideEdge512 returns the AVX-512 tap kernel of an edge tile's height
// (the heights of archKernels' AVX-512 edges).
func wideEdge512(mr int) wideTaps {
	if mr == 4 {
		return wideTaps4
	}
	if mr == 8 {
		return wideTaps8
	}
	return wideTaps12
}

// The wrappers index the last element the kernel touches so that a short
// slice panics in Go instead of reaching the assembly.
func wideTaps12(k int, a []float32, lda int, b []float32, offs []int32, c []float32, ldc int, beta float32, load bool) {
	_, _, _ = a[11*lda+k-1], offs[k-1], c[11*ldc+31]
	sgemm12x32AVX512Taps(k, &a[0], lda, &b[0], &offs[0], &c[0], ldc, 1, beta, b2i(load))
}

func wideTaps8(k int, a []float32, lda int, b []float32, offs []int32, c []float32, ldc int, beta float32, load bool) {
	_, _, _ = a[7*lda+k-1], offs[k-1], c[7*ldc+31]
	sgemm8x32AVX512Taps(k, &a[0], lda, &b[0], &offs[0], &c[0], ldc, 1, beta, b2i(load))
}

func wideTaps4(k int, a []float32, lda int, b []float32, offs []int32, c []float32, ldc int, beta float32, load bool) {
	_, _, _ = a[3*lda+k-1], offs[k-1], c[3*ldc+31]
	sgemm4x32AVX512Taps(k, &a[0], lda, &b[0], &offs[0], &c[0], ldc, 1, beta, b2i(load))
}
