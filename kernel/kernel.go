// Package kernel holds the dense linear-algebra kernels the runtime's
// operators call. Operators depend only on the GEMM interface, so a faster
// implementation (blocked, SIMD, multi-threaded) replaces the portable one
// without touching any operator.
package kernel

// GEMM computes C = alpha·op(A)·op(B) + beta·C on row-major float32 matrices,
// where op(X) is X or Xᵀ. op(A) is m×k, op(B) is k×n and C is m×n; lda, ldb
// and ldc are the row strides of A, B and C as stored. When beta is 0, C is
// not read (NaNs in C do not propagate), as in the reference BLAS.
type GEMM interface {
	Sgemm(transA, transB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int)
}

// Naive is the textbook triple loop, accumulated in float64. It is the
// reference every faster GEMM is tested against; it is far too slow for use.
type Naive struct{}

// Sgemm implements GEMM.
func (Naive) Sgemm(transA, transB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	for i := 0; i < m; i++ {
		for j := 0; j < n; j++ {
			var s float64
			for p := 0; p < k; p++ {
				var av, bv float32
				if transA {
					av = a[p*lda+i]
				} else {
					av = a[i*lda+p]
				}
				if transB {
					bv = b[j*ldb+p]
				} else {
					bv = b[p*ldb+j]
				}
				s += float64(av) * float64(bv)
			}
			v := alpha * float32(s)
			if beta != 0 {
				v += beta * c[i*ldc+j]
			}
			c[i*ldc+j] = v
		}
	}
}
