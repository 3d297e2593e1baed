package kernel

// portableKernel is the pure-Go 2×4 micro-kernel (see config for the
// contract). Eight accumulators, four B values and one A value fit in the
// fifteen XMM registers the Go register allocator hands out; a 4×4 tile
// measured 2× slower because the compiler hoists the products and spills
// (go test -bench with a 4×4 variant, 1.2–1.4 vs 2.3 GFLOP/s on the same
// loaded machine). The capped reslices let the compiler drop bounds checks.
func portableKernel(k int, a, b, c []float32, ldc int, alpha, beta float32, load bool) {
	var c00, c01, c02, c03, c10, c11, c12, c13 float32
	a = a[:2*k]
	b = b[:4*k]
	for p := 0; p < k; p++ {
		bb := b[4*p : 4*p+4 : 4*p+4]
		aa := a[2*p : 2*p+2 : 2*p+2]
		b0, b1, b2, b3 := bb[0], bb[1], bb[2], bb[3]
		x := aa[0]
		c00 += x * b0
		c01 += x * b1
		c02 += x * b2
		c03 += x * b3
		x = aa[1]
		c10 += x * b0
		c11 += x * b1
		c12 += x * b2
		c13 += x * b3
	}
	storeRow4(c[0:4], c00, c01, c02, c03, alpha, beta, load)
	storeRow4(c[ldc:ldc+4], c10, c11, c12, c13, alpha, beta, load)
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
