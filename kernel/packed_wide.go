package kernel

import "fmt"

// maxWideKC bounds the k-block depth SgemmWide handles, so the block's tap
// offsets live in a stack array (every path's kc is 256).
const maxWideKC = 512

// WideSlack is how many values a padded input given to SgemmWide must hold
// beyond its channels planes of PaddedShape: the last 32-column tile of a
// row of C reads up to nr−1 values past the last wide column.
const WideSlack = maxPanelWidth

// wideTaps is an ISA's tap-offset micro-kernel (asmgen/wide.go): an mr×nr
// tile of C = A·B, A read in place (rows lda apart), B row p the nr values
// at b[offs[p]:].
type wideTaps func(k int, a []float32, lda int, b []float32, offs []int32, c []float32, ldc int, beta float32, load bool)

// WideNative reports whether this GEMM has micro-kernels that read a
// convolution's padded input through tap offsets (SgemmWide without any
// copy). Elsewhere SgemmWide packs each B panel first and is no faster
// than Im2colPanelsPadded + SgemmPanels.
func (g *Packed) WideNative() bool {
	_, _, ok := wideKernels(g.conf())
	return ok
}

// SgemmWide computes a stride-1 convolution on the "wide" output grid: for
// the plan's geometry (StrideH = StrideW = 1, any dilation) and its
// zero-padded input padded (channels planes of PaddedShape ph×pw, as Pad
// writes, plus WideSlack values), output (oy, ox) is wide column
// o = oy·pw + ox, and kernel tap p = (c, ky, kx) reads
//
//	B[p][o] = padded[c·ph·pw + ky·DilationH·pw + kx·DilationW + o]
//
// so every row of B is a contiguous stretch of the padded input and no
// column matrix is written. Columns with ox ≥ OW are computed too (on
// values of the next row) and are for the caller to discard: pw−OW of
// every pw. It writes C[i][o−w0] = Σ_p A[i][p]·B[p][o] for wide columns
// o in [w0, w1), C m×(w1−w0) with row stride ldc, overwritten; A is m×K
// row-major with row stride lda, K = channels·KH·KW.
//
// The k blocking, tile shapes and accumulation order are SgemmPanels', so
// the valid columns equal Im2colPanelsPadded + SgemmPanels bit for bit. It
// runs on the calling goroutine (callers split the columns themselves).
func (g *Packed) SgemmWide(plan *Im2colPlan, channels int, m int, a []float32, lda int, padded []float32, w0, w1 int, c []float32, ldc int) error {
	cfg := g.conf()
	geo := plan.Geometry()
	if geo.StrideH != 1 || geo.StrideW != 1 {
		return fmt.Errorf("kernel: wide convolution needs stride 1, have %d×%d", geo.StrideH, geo.StrideW)
	}
	if channels <= 0 || m < 0 || w0 < 0 || w1 < w0 {
		return fmt.Errorf("kernel: wide convolution with %d channels, %d rows, columns [%d, %d)", channels, m, w0, w1)
	}
	if cfg.kc > maxWideKC {
		return fmt.Errorf("kernel: wide convolution k block %d above %d", cfg.kc, maxWideKC)
	}
	ph, pw := plan.PaddedShape()
	k := channels * geo.KH * geo.KW
	n := w1 - w0
	if lda < max(1, k) || (m > 0 && len(a) < (m-1)*lda+k) {
		return fmt.Errorf("kernel: wide convolution weights have %d values with stride %d, want %d×%d", len(a), lda, m, k)
	}
	if ldc < max(1, n) || (m > 0 && n > 0 && len(c) < (m-1)*ldc+n) {
		return fmt.Errorf("kernel: wide convolution output has %d values with stride %d, want %d×%d", len(c), ldc, m, n)
	}
	// The last tap's offset plus the last column read, rounded up to a
	// whole tile.
	maxOff := (channels-1)*ph*pw + (geo.KH-1)*geo.DilationH*pw + (geo.KW-1)*geo.DilationW
	if need := maxOff + w0 + roundUp(n, cfg.nr); n > 0 && len(padded) < need {
		return fmt.Errorf("kernel: wide convolution input has %d values, want >= %d (%d planes of %d×%d, columns [%d, %d))", len(padded), need, channels, ph, pw, w0, w1)
	}
	if m == 0 || n == 0 {
		return nil
	}
	ws := g.get()
	g.runWide(ws, geo, ph*pw, pw, m, n, k, a, lda, padded[w0:], c, ldc)
	g.pool.Put(ws)
	return nil
}

// runWide is run for SgemmWide: the same loop nest and tile choice, with
// each k block's B rows addressed through a table of tap offsets. Paths
// without tap kernels copy each k block's B panels from the table and run
// the SgemmPanels loop on them (the lowering SgemmWide otherwise removes).
func (g *Packed) runWide(ws *workspace, geo Conv2D, plane, pw, m, n, k int, a []float32, lda int, src []float32, c []float32, ldc int) {
	cfg := g.conf()
	mr, nr := cfg.mr, cfg.nr
	taps, edgeTaps, native := wideKernels(cfg)
	var offs [maxWideKC]int32
	khw := geo.KH * geo.KW
	for pc := 0; pc < k; pc += cfg.kc {
		kb := min(cfg.kc, k-pc)
		for p := range kb {
			t := pc + p
			ch, r := t/khw, t%khw
			offs[p] = int32(ch*plane + r/geo.KW*geo.DilationH*pw + r%geo.KW*geo.DilationW)
		}
		off := offs[:kb]
		bet := float32(0)
		if pc > 0 {
			bet = 1 // later k blocks accumulate onto the first
		}
		if !native {
			np := (n + nr - 1) / nr
			ws.wide = grow(ws.wide, np*kb*nr)
			for q := range np {
				panel := ws.wide[q*kb*nr : (q+1)*kb*nr]
				for p, o := range off {
					s := int(o) + q*nr
					copy(panel[p*nr:(p+1)*nr], src[s:s+nr])
				}
			}
			g.run(ws, false, false, m, n, kb, 1, a[pc:], lda, nil, 0, bet, c, ldc, ws.wide)
			continue
		}
		for ic := 0; ic < m; ic += cfg.mc {
			mb := min(cfg.mc, m-ic)
			full := mb / mr * mr
			rem := mb - full
			// The last rem rows: an edge tile of exactly rem rows reads A
			// in place; otherwise they are copied into a zero-padded
			// block of the covering tile's height (run packs them).
			emr, eTaps := mr, taps
			if e, ok := cfg.edgeFor(rem); rem > 0 && ok {
				emr, eTaps = e.mr, edgeTaps(e.mr)
			}
			inPlace := emr == rem
			if rem > 0 && !inPlace {
				ws.a = grow(ws.a, emr*kb)
				clear(ws.a)
				for i := range rem {
					r := (ic+full+i)*lda + pc
					copy(ws.a[i*kb:(i+1)*kb], a[r:r+kb])
				}
			}
			for ir := 0; ir < mb; ir += mr {
				rows := min(mr, mb-ir)
				tm, tTaps := mr, taps
				ad, alda := a[(ic+ir)*lda+pc:], lda
				if ir >= full {
					tm, tTaps = emr, eTaps
					if !inPlace {
						ad, alda = ws.a, kb
					}
				}
				for jr := 0; jr < n; jr += nr {
					nrr := min(nr, n-jr)
					ci := (ic+ir)*ldc + jr
					if nrr == nr && tm == rows {
						tTaps(kb, ad, alda, src[jr:], off, c[ci:], ldc, bet, bet != 0)
						continue
					}
					// Edge tile: computed whole into scratch (its extra
					// rows and columns are discarded).
					tTaps(kb, ad, alda, src[jr:], off, ws.tile[:tm*nr], nr, 0, false)
					storeTile(c[ci:], ldc, ws.tile, nr, rows, nrr, bet)
				}
			}
		}
	}
}
