package kernel

// portableKernel is the pure-Go 4×4 micro-kernel (see config for the
// contract). The sixteen accumulators are locals so the compiler can keep
// them in registers; the reslicing up front lets it drop bounds checks in
// the loop.
func portableKernel(k int, a, b, c []float32, ldc int, alpha, beta float32, load bool) {
	var (
		c00, c01, c02, c03 float32
		c10, c11, c12, c13 float32
		c20, c21, c22, c23 float32
		c30, c31, c32, c33 float32
	)
	a = a[:4*k]
	b = b[:4*k]
	for p := 0; p+3 < len(a) && p+3 < len(b); p += 4 {
		a0, a1, a2, a3 := a[p], a[p+1], a[p+2], a[p+3]
		b0, b1, b2, b3 := b[p], b[p+1], b[p+2], b[p+3]
		c00 += a0 * b0
		c01 += a0 * b1
		c02 += a0 * b2
		c03 += a0 * b3
		c10 += a1 * b0
		c11 += a1 * b1
		c12 += a1 * b2
		c13 += a1 * b3
		c20 += a2 * b0
		c21 += a2 * b1
		c22 += a2 * b2
		c23 += a2 * b3
		c30 += a3 * b0
		c31 += a3 * b1
		c32 += a3 * b2
		c33 += a3 * b3
	}
	storeRow4(c[0*ldc:0*ldc+4], c00, c01, c02, c03, alpha, beta, load)
	storeRow4(c[1*ldc:1*ldc+4], c10, c11, c12, c13, alpha, beta, load)
	storeRow4(c[2*ldc:2*ldc+4], c20, c21, c22, c23, alpha, beta, load)
	storeRow4(c[3*ldc:3*ldc+4], c30, c31, c32, c33, alpha, beta, load)
}

func storeRow4(row []float32, v0, v1, v2, v3, alpha, beta float32, load bool) {
	row = row[:4]
	if load {
		row[0] = alpha*v0 + beta*row[0]
		row[1] = alpha*v1 + beta*row[1]
		row[2] = alpha*v2 + beta*row[2]
		row[3] = alpha*v3 + beta*row[3]
		return
	}
	row[0] = alpha * v0
	row[1] = alpha * v1
	row[2] = alpha * v2
	row[3] = alpha * v3
}
