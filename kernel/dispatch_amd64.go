package kernel

import "golang.org/x/sys/cpu"

// archKernels lists the SIMD paths this CPU can run. It is computed on each
// call from the read-only feature flags, so there is no package state.
//
// AVX-512 (12×32): 24 of the 32 zmm registers accumulate, 2 hold the B row,
// 2 the broadcast A values; per k step that is 24 FMAs for 2 vector loads
// and 12 broadcasts, enough independent FMAs (24) to cover two FMA pipes of
// 4-cycle latency. kc=256 keeps the 32 KiB B micro-panel in a 48 KiB L1D;
// the mc=192 × kc packed A block (192 KiB) sits in L2 (1 MiB on Zen 4/5); nc
// = 4096 gives a 4 MiB packed B slice for L3. The same shape (32×12 in
// column-major terms) is BLIS's Zen 4 SGEMM kernel.
//
// AVX2 (6×16): 12 of the 16 ymm registers accumulate, 2 hold the B row, 2
// the broadcasts, the classic Haswell-era shape; kc=256 keeps the 16 KiB B
// micro-panel in L1.
func archKernels() map[ISA]config {
	ks := map[ISA]config{}
	if cpu.X86.HasAVX512F {
		ks[ISAAVX512] = config{
			isa: ISAAVX512, mr: 12, nr: 32, kc: 256, mc: 192, nc: 4096,
			kernel: avx512Kernel, direct: avx512Direct, strided: avx512Strided, kmajor: avx512KMajor, minParallelOps: 1 << 20,
			edges: []edgeTile{
				{mr: 4, kernel: avx512Kernel4, direct: avx512Direct4, strided: avx512Strided4},
				{mr: 8, kernel: avx512Kernel8, direct: avx512Direct8, strided: avx512Strided8},
			},
		}
	}
	if cpu.X86.HasAVX2 && cpu.X86.HasFMA {
		ks[ISAAVX2] = config{
			isa: ISAAVX2, mr: 6, nr: 16, kc: 256, mc: 144, nc: 4096,
			kernel: avx2Kernel, direct: avx2Direct, minParallelOps: 1 << 20,
		}
	}
	return ks
}

func b2i(x bool) int {
	if x {
		return 1
	}
	return 0
}

// The wrappers index element 0 and the last element the kernel touches so
// that a short slice panics in Go instead of reaching the assembly.
func avx512Kernel(k int, a, b, c []float32, ldc int, alpha, beta float32, load bool) {
	_, _, _ = a[12*k-1], b[32*k-1], c[11*ldc+31]
	sgemm12x32AVX512(k, &a[0], &b[0], &c[0], ldc, alpha, beta, b2i(load))
}

func avx2Kernel(k int, a, b, c []float32, ldc int, alpha, beta float32, load bool) {
	_, _, _ = a[6*k-1], b[16*k-1], c[5*ldc+15]
	sgemm6x16AVX2(k, &a[0], &b[0], &c[0], ldc, alpha, beta, b2i(load))
}

func avx512Direct(k int, a []float32, lda int, b, c []float32, ldc int, alpha, beta float32, load bool) {
	_, _, _ = a[11*lda+k-1], b[32*k-1], c[11*ldc+31]
	sgemm12x32AVX512Direct(k, &a[0], lda, &b[0], &c[0], ldc, alpha, beta, b2i(load))
}

func avx2Direct(k int, a []float32, lda int, b, c []float32, ldc int, alpha, beta float32, load bool) {
	_, _, _ = a[5*lda+k-1], b[16*k-1], c[5*ldc+15]
	sgemm6x16AVX2Direct(k, &a[0], lda, &b[0], &c[0], ldc, alpha, beta, b2i(load))
}

func avx512Kernel8(k int, a, b, c []float32, ldc int, alpha, beta float32, load bool) {
	_, _, _ = a[8*k-1], b[32*k-1], c[7*ldc+31]
	sgemm8x32AVX512(k, &a[0], &b[0], &c[0], ldc, alpha, beta, b2i(load))
}

func avx512Direct8(k int, a []float32, lda int, b, c []float32, ldc int, alpha, beta float32, load bool) {
	_, _, _ = a[7*lda+k-1], b[32*k-1], c[7*ldc+31]
	sgemm8x32AVX512Direct(k, &a[0], lda, &b[0], &c[0], ldc, alpha, beta, b2i(load))
}

func avx512Kernel4(k int, a, b, c []float32, ldc int, alpha, beta float32, load bool) {
	_, _, _ = a[4*k-1], b[32*k-1], c[3*ldc+31]
	sgemm4x32AVX512(k, &a[0], &b[0], &c[0], ldc, alpha, beta, b2i(load))
}

func avx512Direct4(k int, a []float32, lda int, b, c []float32, ldc int, alpha, beta float32, load bool) {
	_, _, _ = a[3*lda+k-1], b[32*k-1], c[3*ldc+31]
	sgemm4x32AVX512Direct(k, &a[0], lda, &b[0], &c[0], ldc, alpha, beta, b2i(load))
}

func avx512Strided(k int, a []float32, lda int, b []float32, ldb int, c []float32, ldc int, alpha, beta float32, load bool) {
	_, _, _ = a[11*lda+k-1], b[(k-1)*ldb+31], c[11*ldc+31]
	sgemm12x32AVX512DirectStrided(k, &a[0], lda, &b[0], ldb, &c[0], ldc, alpha, beta, b2i(load))
}

func avx512Strided8(k int, a []float32, lda int, b []float32, ldb int, c []float32, ldc int, alpha, beta float32, load bool) {
	_, _, _ = a[7*lda+k-1], b[(k-1)*ldb+31], c[7*ldc+31]
	sgemm8x32AVX512DirectStrided(k, &a[0], lda, &b[0], ldb, &c[0], ldc, alpha, beta, b2i(load))
}

func avx512Strided4(k int, a []float32, lda int, b []float32, ldb int, c []float32, ldc int, alpha, beta float32, load bool) {
	_, _, _ = a[3*lda+k-1], b[(k-1)*ldb+31], c[3*ldc+31]
	sgemm4x32AVX512DirectStrided(k, &a[0], lda, &b[0], ldb, &c[0], ldc, alpha, beta, b2i(load))
}

func avx512KMajor(k int, a []float32, lda int, b, c []float32, ldc int, alpha, beta float32, load bool) {
	_, _, _ = a[(k-1)*lda+11], b[32*k-1], c[11*ldc+31]
	sgemm12x32AVX512KMajor(k, &a[0], lda, &b[0], &c[0], ldc, alpha, beta, b2i(load))
}
