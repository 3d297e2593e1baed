package kernel

import "fmt"

// RowPanels says how SgemmRowPanels wants the m rows of its A operand
// packed: full panels of mr rows each, then, when mr does not divide m,
// one panel edge rows wide for the remaining rows (the smallest edge tile
// that covers them, or mr when the path has none). Panel i holds rows
// i·mr … as k×width values with the row index fastest: for a convolution
// whose output positions are the rows, that is Im2colPanelsPadded's
// layout with nr = mr (and the tail lowered with nr = edge).
func (g *Packed) RowPanels(m int) (mr, full, edge int) {
	cfg := g.conf()
	mr = cfg.mr
	full = m / mr
	if rem := m - full*mr; rem > 0 {
		edge = mr
		if e, ok := cfg.edgeFor(rem); ok {
			edge = e.mr
		}
	}
	return mr, full, edge
}

// RowPanelsLen is the number of floats of the packed A operand
// RowPanels(m) describes, for depth k.
func (g *Packed) RowPanelsLen(m, k int) int {
	mr, full, edge := g.RowPanels(m)
	return (full*mr + edge) * k
}

// PackColumnPanels packs the transpose of the row-major n×k matrix w (row
// stride ldw) as SgemmPanels' and SgemmRowPanels' packed B, so the rows of
// w become its columns: ⌈n/nr⌉ panels of k×nr values,
// entry (r, j) of panel q at q·k·nr + r·nr + j holding w[(q·nr+j)·ldw+r],
// the last panel zero-padded. A convolution's weight matrix (output
// channels × K) packed this way is the B operand of the product that
// computes the output transposed (positions × channels); packed once, it
// is streamed contiguously instead of as nr separate rows.
func (g *Packed) PackColumnPanels(dst, w []float32, n, k, ldw int) {
	nr := g.conf().nr
	np := (n + nr - 1) / nr
	if len(dst) < np*k*nr {
		panic(fmt.Sprintf("kernel: PackColumnPanels dst has %d values, want %d", len(dst), np*k*nr))
	}
	checkMat("W", w, n, k, ldw)
	for q := 0; q < np; q++ {
		panel := dst[q*k*nr : (q+1)*k*nr]
		clear(panel)
		for j := 0; j < min(nr, n-q*nr); j++ {
			row := w[(q*nr+j)*ldw : (q*nr+j)*ldw+k]
			for r, v := range row {
				panel[r*nr+j] = v
			}
		}
	}
}

// SgemmRowPanels computes C = A·B (m×n, row stride ldc, overwritten) with
// both operands packed: A as RowPanels(m) describes, B as SgemmPanels takes
// it. It suits a convolution layer with few output positions, computed
// transposed (positions × channels): at batch 1 a late layer has 49 or
// 196 positions, which as columns fill 49 of 64 and 196 of 224 panel
// columns, but as rows fill 12-row tiles and one 4-row edge tile (52 and
// 196 rows computed); and the weights, packed once, are read as
// contiguous panels. Measured on m512 k4608 n49 and m256 k2304 n196 (the
// 7×7 and 14×14 ResNet layers, one core, 60 alternating calls of each on
// a loaded machine): 133 → 155 and 169 → 196 GFLOP/s median against
// SgemmPanels over the same product; BenchmarkSgemmRowPanels repeats the
// comparison (run both in one session). It runs on the calling
// goroutine; callers split n by panels.
func (g *Packed) SgemmRowPanels(m, n, k int, apanels, bpanels, c []float32, ldc int) {
	cfg := g.conf()
	mr, nr := cfg.mr, cfg.nr
	if m < 0 || n < 0 || k < 0 {
		panic(fmt.Sprintf("kernel: negative GEMM size m=%d n=%d k=%d", m, n, k))
	}
	checkMat("C", c, m, n, ldc)
	if need := g.RowPanelsLen(m, k); len(apanels) < need {
		panic(fmt.Sprintf("kernel: SgemmRowPanels A panels have %d elements, want >= %d for m=%d k=%d", len(apanels), need, m, k))
	}
	if need := (n + nr - 1) / nr * nr * k; len(bpanels) < need {
		panic(fmt.Sprintf("kernel: SgemmRowPanels B panels have %d elements, want >= %d for k=%d n=%d", len(bpanels), need, k, n))
	}
	if m == 0 || n == 0 {
		return
	}
	if k == 0 {
		scaleC(m, n, 0, c, ldc)
		return
	}
	full, rem, edgeRows, edgeKern := g.rowEdge(m)
	ws := g.get()
	defer g.pool.Put(ws)
	// Loop order: one B panel (nr output columns) at a time, its kc-deep
	// slices kept in L1 while every row panel passes under them, so B —
	// the large operand — is read from memory once; the row panels (A)
	// are small and stay in L2.
	cfg.rowPanelSlices(n, k, bpanels, func(jr, nrr, pc, kb int, bp []float32, bet float32) {
		for ir := 0; ir <= full; ir++ {
			rows, width, kern := mr, mr, cfg.kernel
			if ir == full {
				if rem == 0 {
					break
				}
				rows, width, kern = rem, edgeRows, edgeKern
			}
			aoff := ir*k*mr + pc*width
			ap := apanels[aoff : aoff+kb*width]
			ci := ir*mr*ldc + jr
			if rows == width && nrr == nr {
				kern(kb, ap, bp, c[ci:], ldc, 1, bet, bet != 0)
				continue
			}
			// A partial tile: the full tile into scratch (the
			// panels are zero-padded), then its valid part.
			kern(kb, ap, bp, ws.tile, nr, 1, 0, false)
			storeTile(c[ci:], ldc, ws.tile, nr, rows, nrr, bet)
		}
	})
}

// SgemmUnpacked computes C = A·B (m×n, row stride ldc, overwritten) with
// both operands where they lie: A row-major (row stride lda), B row-major
// (k rows ldb apart), on the calling goroutine. It suits a pointwise
// convolution's slab of columns, whose B is the input itself (channels ×
// positions, ldb = the positions of a plane): no panel is packed, except
// a partial last one (fewer than nr columns), whose loads would run past
// the slab. It reports false, doing nothing, when the path has no
// unpacked-B kernel (only AVX-512 has); callers then pack.
func (g *Packed) SgemmUnpacked(m, n, k int, a []float32, lda int, b []float32, ldb int, c []float32, ldc int) bool {
	cfg := g.conf()
	if cfg.strided == nil {
		return false
	}
	if m < 0 || n < 0 || k < 0 {
		panic(fmt.Sprintf("kernel: negative GEMM size m=%d n=%d k=%d", m, n, k))
	}
	checkMat("A", a, m, k, lda)
	checkMat("B", b, k, n, ldb)
	checkMat("C", c, m, n, ldc)
	if m == 0 || n == 0 {
		return true
	}
	if k == 0 {
		scaleC(m, n, 0, c, ldc)
		return true
	}
	mr, nr := cfg.mr, cfg.nr
	full := m / mr * mr
	rem := m - full
	// The last rem rows: an edge tile of exactly rem rows reads A in
	// place; otherwise they are copied, zero-padded to the tile's rows.
	edge := edgeTile{mr: mr, direct: cfg.direct, strided: cfg.strided}
	if e, ok := cfg.edgeFor(rem); ok && rem > 0 {
		edge = e
	}
	exact := edge.mr == rem
	ws := g.get()
	defer g.pool.Put(ws)
	for pc := 0; pc < k; pc += cfg.kc {
		kb := min(cfg.kc, k-pc)
		bet := float32(0)
		if pc > 0 {
			bet = 1
		}
		var padA []float32
		if rem > 0 && !exact {
			ws.a = grow(ws.a, edge.mr*kb)
			padA = ws.a[:edge.mr*kb]
			clear(padA)
			for i := 0; i < rem; i++ {
				copy(padA[i*kb:(i+1)*kb], a[(full+i)*lda+pc:(full+i)*lda+pc+kb])
			}
		}
		for jr := 0; jr < n; jr += nr {
			nrr := min(nr, n-jr)
			var bp []float32
			if nrr < nr {
				ws.b = grow(ws.b, kb*nr)
				bp = ws.b[:kb*nr]
				packB(bp, false, b, ldb, pc, jr, kb, nrr, nr)
			}
			for ir := 0; ir < m; ir += mr {
				rows, tileRows := mr, mr
				strided, direct := cfg.strided, cfg.direct
				ad, ldA := a[ir*lda+pc:], lda
				if ir == full {
					rows, tileRows = rem, edge.mr
					strided, direct = edge.strided, edge.direct
					if !exact {
						ad, ldA = padA, kb
					}
				}
				ci := ir*ldc + jr
				if rows == tileRows && nrr == nr {
					strided(kb, ad, ldA, b[pc*ldb+jr:], ldb, c[ci:], ldc, 1, bet, bet != 0)
					continue
				}
				if nrr == nr {
					strided(kb, ad, ldA, b[pc*ldb+jr:], ldb, ws.tile, nr, 1, 0, false)
				} else {
					direct(kb, ad, ldA, bp, ws.tile, nr, 1, 0, false)
				}
				storeTile(c[ci:], ldc, ws.tile, nr, rows, nrr, bet)
			}
		}
	}
	return true
}

// SgemmKMajor computes C = A·B (m×n, row stride ldc, overwritten) for an
// A stored k step by k step and read where it lies, A(i, p) at
// a[p·lda + i], and a B packed as SgemmRowPanels takes it
// (PackColumnPanels). A pointwise convolution computed transposed
// (positions × channels, as on SgemmRowPanels' path) has exactly that A:
// its input, channels × positions, lda the positions of a plane; so its
// rows are multiplied without lowering them into row panels first. The
// last m mod mr rows, which a full tile would read past, are packed into
// one zero-padded edge panel. The loops and the k blocking are
// SgemmRowPanels', so the result is bit for bit what lowering A into row
// panels and calling SgemmRowPanels gives. It runs on the calling
// goroutine and reports false, doing nothing, when the path has no k-major
// kernel (only AVX-512 has); callers then lower.
func (g *Packed) SgemmKMajor(m, n, k int, a []float32, lda int, bpanels []float32, c []float32, ldc int) bool {
	cfg := g.conf()
	if cfg.kmajor == nil {
		return false
	}
	mr, nr := cfg.mr, cfg.nr
	if m < 0 || n < 0 || k < 0 {
		panic(fmt.Sprintf("kernel: negative GEMM size m=%d n=%d k=%d", m, n, k))
	}
	checkMat("A (k-major)", a, k, m, lda)
	checkMat("C", c, m, n, ldc)
	if need := (n + nr - 1) / nr * nr * k; len(bpanels) < need {
		panic(fmt.Sprintf("kernel: SgemmKMajor B panels have %d elements, want >= %d for k=%d n=%d", len(bpanels), need, k, n))
	}
	if m == 0 || n == 0 {
		return true
	}
	if k == 0 {
		scaleC(m, n, 0, c, ldc)
		return true
	}
	full, rem, edgeRows, edgeKern := g.rowEdge(m)
	ws := g.get()
	defer g.pool.Put(ws)
	// The edge panel as RowPanels lays it out: k steps of edgeRows values.
	var edge []float32
	if rem > 0 {
		ws.a = grow(ws.a, edgeRows*k)
		edge = ws.a[:edgeRows*k]
		clear(edge)
		for p := 0; p < k; p++ {
			copy(edge[p*edgeRows:p*edgeRows+rem], a[p*lda+full*mr:p*lda+m])
		}
	}
	cfg.rowPanelSlices(n, k, bpanels, func(jr, nrr, pc, kb int, bp []float32, bet float32) {
		for ir := 0; ir <= full; ir++ {
			ci := ir*mr*ldc + jr
			if ir == full {
				if rem == 0 {
					break
				}
				edgeKern(kb, edge[pc*edgeRows:(pc+kb)*edgeRows], bp, ws.tile, nr, 1, 0, false)
				storeTile(c[ci:], ldc, ws.tile, nr, rem, nrr, bet)
				continue
			}
			ap := a[pc*lda+ir*mr:]
			if nrr == nr {
				cfg.kmajor(kb, ap, lda, bp, c[ci:], ldc, 1, bet, bet != 0)
				continue
			}
			cfg.kmajor(kb, ap, lda, bp, ws.tile, nr, 1, 0, false)
			storeTile(c[ci:], ldc, ws.tile, nr, mr, nrr, bet)
		}
	})
	return true
}

// rowPanelSlices calls f for each packed B panel (columns jr … jr+nrr−1,
// nrr ≤ nr of them real) and each kc-deep slice of it (rows pc … pc+kb−1),
// one panel at a time as SgemmRowPanels and SgemmKMajor go: bp is that
// slice of bpanels and bet the beta that adds every slice after the first
// to what the earlier ones stored.
func (cfg *config) rowPanelSlices(n, k int, bpanels []float32, f func(jr, nrr, pc, kb int, bp []float32, bet float32)) {
	nr := cfg.nr
	for jr := 0; jr < n; jr += nr {
		nrr := min(nr, n-jr)
		for pc := 0; pc < k; pc += cfg.kc {
			kb := min(cfg.kc, k-pc)
			bet := float32(0)
			if pc > 0 {
				bet = 1
			}
			boff := jr/nr*k*nr + pc*nr
			f(jr, nrr, pc, kb, bpanels[boff:boff+kb*nr], bet)
		}
	}
}

// rowEdge splits m rows as RowPanels does: full panels of mr rows, then rem
// rows in one panel edgeRows wide, multiplied with edgeKern (the edge tile
// that covers them, or the main kernel on a zero-padded panel).
func (g *Packed) rowEdge(m int) (full, rem, edgeRows int, edgeKern microKernel) {
	cfg := g.conf()
	mr, full, edgeRows := g.RowPanels(m)
	rem = m - full*mr
	edgeKern = cfg.kernel
	if e, ok := cfg.edgeFor(rem); ok && rem > 0 {
		edgeKern = e.kernel
	}
	return full, rem, edgeRows, edgeKern
}
