package kernel

import (
	"fmt"
	"runtime"
	"sync"
	"sync/atomic"
)

// ISA names an instruction-set path of the packed GEMM.
type ISA int

const (
	// ISAAuto picks the fastest path the CPU supports.
	ISAAuto ISA = iota
	// ISAPortable is the pure-Go path, available on every GOARCH.
	ISAPortable
	// ISAAVX2 is the amd64 AVX2+FMA micro-kernel (6×16 tile).
	ISAAVX2
	// ISAAVX512 is the amd64 AVX-512F micro-kernel (12×32 tile).
	ISAAVX512
)

func (i ISA) String() string {
	switch i {
	case ISAAuto:
		return "auto"
	case ISAPortable:
		return "portable"
	case ISAAVX2:
		return "avx2"
	case ISAAVX512:
		return "avx512"
	}
	return fmt.Sprintf("ISA(%d)", int(i))
}

// Supported reports whether this CPU and build can run the given path.
func Supported(isa ISA) bool {
	if isa == ISAAuto || isa == ISAPortable {
		return true
	}
	_, ok := archKernels()[isa]
	return ok
}

// Options configures New.
type Options struct {
	// Threads is the most goroutines one Sgemm call uses; 0 means
	// runtime.GOMAXPROCS(0) read at each call.
	Threads int
	// ISA forces a path; ISAAuto (the zero value) picks the fastest.
	ISA ISA
}

// microKernel computes one mr×nr tile of C from packed panels: see
// asmgen/gen.go for the exact contract. c must hold (mr-1)·ldc+nr values.
type microKernel func(k int, a, b, c []float32, ldc int, alpha, beta float32, load bool)

// directKernel is a microKernel that reads A unpacked: mr rows lda apart,
// unit stride along k (see asmgen/gen.go). a must hold (mr-1)·lda+k values.
type directKernel func(k int, a []float32, lda int, b, c []float32, ldc int, alpha, beta float32, load bool)

// kmajorKernel is a micro-kernel reading its A operand in place stored k
// step by k step: A(i, p) at a[p·lda + i] (Packed.SgemmKMajor).
type kmajorKernel func(k int, a []float32, lda int, b, c []float32, ldc int, alpha, beta float32, load bool)

// stridedKernel is a directKernel that reads B unpacked too: k rows ldb
// apart, nr values each (see asmgen/gen.go). b must hold (k-1)·ldb+nr
// values.
type stridedKernel func(k int, a []float32, lda int, b []float32, ldb int, c []float32, ldc int, alpha, beta float32, load bool)

// config is one path's register tile and cache blocking.
//
// The loop nest is the one of Goto & van de Geijn (ACM TOMS 34(3), 2008) as
// restructured in BLIS (Van Zee & van de Geijn, ACM TOMS 41(3), 2015):
// for each nc-wide column block of B, for each kc-deep slice, B is packed
// once into kc×nr micro-panels; for each mc-tall row block of A, A is packed
// into mr×kc micro-panels; the micro-kernel then sweeps the mr×nr tiles. The
// kc×nr B micro-panel is reused by every A micro-panel of the block, so it
// should stay in L1; the mc×kc packed A block is reused by every B
// micro-panel, so it should stay in L2; the kc×nc packed B lives in L3.
type config struct {
	isa            ISA
	mr, nr         int
	kc, mc, nc     int
	kernel         microKernel
	direct         directKernel  // nil when the path has no direct-A kernel
	strided        stridedKernel // nil when the path has no unpacked-B kernel
	kmajor         kmajorKernel  // nil when the path has no k-major-A kernel
	minParallelOps int           // m·n·k below which one goroutine is used
	// edges are shorter tiles, by increasing mr, for the last rows of a
	// direct-A block: the smallest that covers the remaining rows is used
	// instead of the full mr-row tile (whose extra rows would be wasted
	// work). Empty when the path has none.
	edges []edgeTile
}

// edgeTile is a micro-kernel pair for fewer rows than the main tile, with
// the same nr.
type edgeTile struct {
	mr      int
	kernel  microKernel
	direct  directKernel
	strided stridedKernel
	kmajor  kmajorKernel
}

// edgeFor returns the smallest edge tile covering rows rows, if any.
func (c *config) edgeFor(rows int) (edgeTile, bool) {
	for _, e := range c.edges {
		if e.mr >= rows {
			return e, true
		}
	}
	return edgeTile{}, false
}

// portableConfig: the 2×4 tile is the largest the Go compiler keeps in
// registers (see portableKernel). kc=256 as for the SIMD paths; mc and nc
// are smaller because the scalar kernel is far from memory-bound.
var portableConfig = config{
	isa: ISAPortable, mr: 2, nr: 4, kc: 256, mc: 64, nc: 1024,
	kernel: portableKernel, minParallelOps: 1 << 18,
}

// Packed is a cache-blocked, packed SGEMM with a SIMD micro-kernel where the
// CPU has one. The zero value is the portable path using GOMAXPROCS
// goroutines; use it through a pointer, as it must not be copied. It is safe for concurrent use; packing buffers are reused
// through a pool owned by the value, so steady-state calls do not allocate
// (apart from goroutine start-up when a call is split across threads).
type Packed struct {
	cfg     config
	threads int
	pool    sync.Pool // *workspace
	jobs    sync.Pool // *parJob
}

type workspace struct {
	a, b []float32 // packed A block, packed B panel
	tile []float32 // mr×nr scratch for edge tiles
}

// New returns a packed GEMM configured by opts. It fails when the requested
// ISA is not supported by this CPU or build, or Threads is negative.
func New(opts Options) (*Packed, error) {
	if opts.Threads < 0 {
		return nil, fmt.Errorf("kernel: Threads must be >= 0, got %d", opts.Threads)
	}
	var cfg config
	switch opts.ISA {
	case ISAAuto:
		cfg = portableConfig
		ks := archKernels()
		for _, isa := range []ISA{ISAAVX512, ISAAVX2} {
			if c, ok := ks[isa]; ok {
				cfg = c
				break
			}
		}
	case ISAPortable:
		cfg = portableConfig
	default:
		c, ok := archKernels()[opts.ISA]
		if !ok {
			return nil, fmt.Errorf("kernel: ISA %v not supported on this CPU/GOARCH", opts.ISA)
		}
		cfg = c
	}
	return &Packed{cfg: cfg, threads: opts.Threads}, nil
}

// Best returns the fastest GEMM for this CPU: the AVX-512 path, else the
// AVX2+FMA path, else the pure-Go path, using up to GOMAXPROCS goroutines.
func Best() *Packed {
	g, err := New(Options{})
	if err != nil {
		panic(err) // unreachable: ISAAuto always resolves
	}
	return g
}

// Portable returns the pure-Go packed GEMM (compiled and tested on every
// build) using up to GOMAXPROCS goroutines.
func Portable() *Packed {
	g, err := New(Options{ISA: ISAPortable})
	if err != nil {
		panic(err) // unreachable
	}
	return g
}

// ISA reports the path this GEMM runs.
func (g *Packed) ISA() ISA { return g.conf().isa }

// HasUnpacked reports whether SgemmUnpacked runs on this path (it has an
// unpacked-B micro-kernel) rather than reporting false.
func (g *Packed) HasUnpacked() bool { return g.conf().strided != nil }

// Tile reports the micro-kernel's register tile (rows × columns of C).
func (g *Packed) Tile() (mr, nr int) { return g.conf().mr, g.conf().nr }

// conf returns the path's configuration; the zero Packed is the portable
// path with GOMAXPROCS goroutines.
func (g *Packed) conf() *config {
	if g.cfg.kernel == nil {
		return &portableConfig
	}
	return &g.cfg
}

// Sgemm implements GEMM. Dimensions, strides and slice lengths are checked
// before any work, because the SIMD micro-kernels address memory directly;
// a violation panics with a message naming the argument, like the reference
// BLAS's XERBLA (the GEMM interface has no error result).
func (g *Packed) Sgemm(transA, transB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	g.SgemmOn(nil, transA, transB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
}

// Runner runs task(0) … task(tasks−1), possibly concurrently, and returns
// once all of them have returned.
type Runner interface {
	Run(tasks int, task func(t int))
}

// SgemmOn is Sgemm with the slabs of a parallel product run by r, for a
// caller that keeps helper goroutines of its own (a thread team): Sgemm
// starts fresh goroutines for every call, which then wait for a core
// that the caller's idle helpers are still spinning on. A nil r is
// Sgemm. The result does not depend on r: each slab of C is computed by
// one task, in the same order of operations.
func (g *Packed) SgemmOn(r Runner, transA, transB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	checkArgs(transA, transB, m, n, k, a, lda, b, ldb, c, ldc)
	if m == 0 || n == 0 {
		return
	}
	if k == 0 || alpha == 0 {
		scaleC(m, n, beta, c, ldc)
		return
	}
	threads := g.threads
	if threads == 0 {
		threads = runtime.GOMAXPROCS(0)
	}
	cfg := g.conf()
	if threads < 2 || m*n*k < cfg.minParallelOps {
		ws := g.get()
		g.run(ws, transA, transB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc, nil)
		g.pool.Put(ws)
		return
	}
	g.parallel(r, threads, transA, transB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
}

// PanelWidth is the column count nr of the packed B panels SgemmPanels
// reads (the micro-kernel's register tile width).
func (g *Packed) PanelWidth() int { return g.conf().nr }

// SgemmPanels computes C = A·B (m×n, row stride ldc, overwritten) for a
// row-major A (m×k, row stride lda) and a B that the caller has already
// packed: ⌈n/nr⌉ panels of k×nr values (nr = PanelWidth), panel q holding
// columns q·nr … q·nr+nr−1 with the column index fastest, the last panel
// zero-padded. Producing B in that layout directly (Im2colPlan.
// Im2colPanels does for a convolution) saves the copy Sgemm's packing
// step makes, which costs as much as a sizeable share of the multiply
// when B is an im2col slab used once. It runs on the calling goroutine:
// the callers split their work into independent slabs themselves.
func (g *Packed) SgemmPanels(m, n, k int, a []float32, lda int, panels []float32, c []float32, ldc int) {
	nr := g.conf().nr
	if m < 0 || n < 0 || k < 0 {
		panic(fmt.Sprintf("kernel: negative GEMM size m=%d n=%d k=%d", m, n, k))
	}
	checkMat("A", a, m, k, lda)
	checkMat("C", c, m, n, ldc)
	if need := (n + nr - 1) / nr * nr * k; len(panels) < need {
		panic(fmt.Sprintf("kernel: SgemmPanels B panels have %d elements, want >= %d for k=%d n=%d nr=%d", len(panels), need, k, n, nr))
	}
	if m == 0 || n == 0 {
		return
	}
	if k == 0 {
		scaleC(m, n, 0, c, ldc)
		return
	}
	ws := g.get()
	g.run(ws, false, false, m, n, k, 1, a, lda, nil, 0, 0, c, ldc, panels)
	g.pool.Put(ws)
}

// parallel splits C into slabs of whole register tiles along the dimension
// with more tiles and runs the sequential algorithm on each slab. There are
// a few more slabs than goroutines and each goroutine takes the next free
// slab, so a core that is slowed by other work (the machine is shared)
// does fewer slabs instead of holding up the call. Each slab packs its own
// B panels, and its own A block when A is transposed (a non-transposed A is
// read in place); that repeated packing is small next to the slab's
// multiply. No two slabs share any part of C, so only the final wait
// synchronises.
func (g *Packed) parallel(r Runner, threads int, transA, transB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int) {
	cfg := g.conf()
	mTiles := (m + cfg.mr - 1) / cfg.mr
	nTiles := (n + cfg.nr - 1) / cfg.nr
	splitN := nTiles >= mTiles
	tiles, unit := mTiles, cfg.mr
	if splitN {
		tiles, unit = nTiles, cfg.nr
	}
	threads = min(threads, tiles)
	// slabsPerThread trades load balance against repeated packing.
	const slabsPerThread = 3
	slabs := min(tiles, threads*slabsPerThread, max(threads, m*n*k/(cfg.minParallelOps/2)))
	if threads < 2 {
		ws := g.get()
		g.run(ws, transA, transB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc, nil)
		g.pool.Put(ws)
		return
	}
	j, _ := g.jobs.Get().(*parJob)
	if j == nil {
		j = new(parJob)
	}
	j.g, j.transA, j.transB, j.m, j.n, j.k = g, transA, transB, m, n, k
	j.alpha, j.a, j.lda, j.b, j.ldb, j.beta, j.c, j.ldc = alpha, a, lda, b, ldb, beta, c, ldc
	j.splitN, j.tiles, j.unit, j.slabs = splitN, tiles, unit, slabs
	j.next.Store(0)
	if r != nil {
		r.Run(slabs, func(s int) {
			ws := g.get()
			j.slab(ws, s)
			g.pool.Put(ws)
		})
		j.a, j.b, j.c = nil, nil, nil
		g.jobs.Put(j)
		return
	}
	j.wg.Add(threads - 1)
	for t := 1; t < threads; t++ {
		go j.helper()
	}
	j.work()
	j.wg.Wait()
	j.a, j.b, j.c = nil, nil, nil // do not keep the caller's matrices alive
	g.jobs.Put(j)
}

// parJob is one parallel Sgemm call; it is pooled so a call allocates only
// its goroutines.
type parJob struct {
	g                  *Packed
	transA, transB     bool
	m, n, k            int
	alpha, beta        float32
	a, b, c            []float32
	lda, ldb, ldc      int
	splitN             bool
	tiles, unit, slabs int
	next               atomic.Int64 // next unclaimed slab
	wg                 sync.WaitGroup
}

func (j *parJob) helper() {
	defer j.wg.Done()
	j.work()
}

// work claims slabs until none is left.
func (j *parJob) work() {
	g := j.g
	ws := g.get()
	defer g.pool.Put(ws)
	for {
		s := int(j.next.Add(1) - 1)
		if s >= j.slabs {
			return
		}
		j.slab(ws, s)
	}
}

// slab computes slab s of C.
func (j *parJob) slab(ws *workspace, s int) {
	lo := j.tiles * s / j.slabs * j.unit
	hi := j.tiles * (s + 1) / j.slabs * j.unit
	sa, sb, sc := j.a, j.b, j.c
	sm, sn := j.m, j.n
	if j.splitN {
		hi = min(hi, j.n)
		sn = hi - lo
		if j.transB {
			sb = j.b[lo*j.ldb:]
		} else {
			sb = j.b[lo:]
		}
		sc = j.c[lo:]
	} else {
		hi = min(hi, j.m)
		sm = hi - lo
		if j.transA {
			sa = j.a[lo:]
		} else {
			sa = j.a[lo*j.lda:]
		}
		sc = j.c[lo*j.ldc:]
	}
	j.g.run(ws, j.transA, j.transB, sm, sn, j.k, j.alpha, sa, j.lda, sb, j.ldb, j.beta, sc, j.ldc, nil)
}

func (g *Packed) get() *workspace {
	if ws, ok := g.pool.Get().(*workspace); ok {
		return ws
	}
	return &workspace{tile: make([]float32, g.conf().mr*g.conf().nr)}
}

// grow returns buf with length n, reallocating only when it is too small.
func grow(buf []float32, n int) []float32 {
	if cap(buf) < n {
		return make([]float32, n)
	}
	return buf[:n]
}

// run is the sequential blocked algorithm on one slab of C. When panels
// is not nil it holds B already packed (see SgemmPanels) and b, ldb and
// transB are ignored.
func (g *Packed) run(ws *workspace, transA, transB bool, m, n, k int, alpha float32, a []float32, lda int, b []float32, ldb int, beta float32, c []float32, ldc int, panels []float32) {
	cfg := g.conf()
	mr, nr := cfg.mr, cfg.nr
	kcMax := min(cfg.kc, k)
	ncMax := min(cfg.nc, roundUp(n, nr))
	mcMax := min(cfg.mc, roundUp(m, mr))
	ws.a = grow(ws.a, mcMax*kcMax)
	if panels == nil {
		ws.b = grow(ws.b, ncMax*kcMax)
	}
	kern := cfg.kernel
	// A non-transposed A is read in place by the direct kernel when the
	// path has one: packing it would be a strided gather (see
	// transposeStrip) costing as much as the multiply when n is small.
	direct := !transA && cfg.direct != nil
	for jc := 0; jc < n; jc += cfg.nc {
		nb := min(cfg.nc, n-jc)
		for pc := 0; pc < k; pc += cfg.kc {
			kb := min(cfg.kc, k-pc)
			if panels == nil {
				packB(ws.b, transB, b, ldb, pc, jc, kb, nb, nr)
			}
			bet := beta
			if pc > 0 {
				bet = 1 // later k slices accumulate onto the first
			}
			for ic := 0; ic < m; ic += cfg.mc {
				mb := min(cfg.mc, m-ic)
				full := mb // rows read directly from A; the rest is packed
				var edge edgeTile
				edgeOK, edgeDirect := false, false
				if direct {
					full = mb / mr * mr
					if rem := mb - full; rem > 0 {
						edge, edgeOK = cfg.edgeFor(rem)
						switch {
						case edgeOK && edge.mr == rem:
							edgeDirect = true // exactly an edge tile: read A in place
						case edgeOK:
							packA(ws.a, transA, a, lda, ic+full, pc, rem, kb, edge.mr)
						default:
							packA(ws.a, transA, a, lda, ic+full, pc, rem, kb, mr)
						}
					}
				} else {
					packA(ws.a, transA, a, lda, ic, pc, mb, kb, mr)
				}
				for jr := 0; jr < nb; jr += nr {
					nrr := min(nr, nb-jr)
					var bp []float32
					if panels == nil {
						bp = ws.b[jr*kb : (jr+nr)*kb]
					} else {
						off := (jc+jr)/nr*k*nr + pc*nr
						bp = panels[off : off+kb*nr]
					}
					for ir := 0; ir < mb; ir += mr {
						mrr := min(mr, mb-ir)
						ci := (ic+ir)*ldc + jc + jr
						if edgeOK && ir >= full {
							if edgeDirect {
								ad := a[(ic+ir)*lda+pc:]
								if nrr == nr {
									edge.direct(kb, ad, lda, bp, c[ci:], ldc, alpha, bet, bet != 0)
									continue
								}
								edge.direct(kb, ad, lda, bp, ws.tile, nr, alpha, 0, false)
							} else {
								edge.kernel(kb, ws.a[:edge.mr*kb], bp, ws.tile, nr, alpha, 0, false)
							}
						} else if direct && ir < full {
							ad := a[(ic+ir)*lda+pc:]
							if nrr == nr {
								cfg.direct(kb, ad, lda, bp, c[ci:], ldc, alpha, bet, bet != 0)
								continue
							}
							cfg.direct(kb, ad, lda, bp, ws.tile, nr, alpha, 0, false)
						} else {
							off := ir
							if direct {
								off = ir - full
							}
							ap := ws.a[off*kb : (off+mr)*kb]
							if mrr == mr && nrr == nr {
								kern(kb, ap, bp, c[ci:], ldc, alpha, bet, bet != 0)
								continue
							}
							// Edge tile: compute the full tile into scratch
							// (the packed panels are zero-padded) and copy
							// the valid part, so the kernels need no masking.
							kern(kb, ap, bp, ws.tile, nr, alpha, 0, false)
						}
						storeTile(c[ci:], ldc, ws.tile, nr, mrr, nrr, bet)
					}
				}
			}
		}
	}
}

func roundUp(x, m int) int { return (x + m - 1) / m * m }

// storeTile writes the valid rows×cols part of a scratch tile (row
// stride nr) to c (row stride ldc): copied when beta is 0, else added to
// beta·c.
func storeTile(c []float32, ldc int, tile []float32, nr, rows, cols int, beta float32) {
	for i := 0; i < rows; i++ {
		row := c[i*ldc : i*ldc+cols]
		t := tile[i*nr : i*nr+cols]
		if beta == 0 {
			copy(row, t)
			continue
		}
		for j, v := range t {
			row[j] = v + beta*row[j]
		}
	}
}

// packB copies op(B)[pc:pc+kb, jc:jc+nb] into kb×nr micro-panels, column
// index fastest, zero-padding the last panel to nr columns.
func packB(dst []float32, transB bool, b []float32, ldb, pc, jc, kb, nb, nr int) {
	packPanels(dst, !transB, b, ldb, pc, jc, nb, kb, nr)
}

// packA copies op(A)[ic:ic+mb, pc:pc+kb] into mr×kb micro-panels, row index
// fastest, zero-padding the last panel to mr rows. It is packB of op(A)ᵀ:
// the same panels, with the stored layout's transposition flipped.
func packA(dst []float32, transA bool, a []float32, lda, ic, pc, mb, kb, mr int) {
	packPanels(dst, transA, a, lda, pc, ic, mb, kb, mr)
}

// packPanels copies the kb×nb block of panel entries (p, j), p in
// [0, kb), j in [0, nb), into kb×w micro-panels, j fastest, zero-padding
// the last panel to w. With contiguous, entry (p, j) is stored at
// src[(pc+p)·ld + j0+j] (stored rows run along j and are copied);
// otherwise at src[(j0+j)·ld + pc+p] (each stored row is read
// contiguously and transposed).
func packPanels(dst []float32, contiguous bool, src []float32, ld, pc, j0, nb, kb, w int) {
	for jr := 0; jr < nb; jr += w {
		wr := min(w, nb-jr)
		panel := dst[jr*kb : jr*kb+kb*w]
		if contiguous {
			for p := 0; p < kb; p++ {
				row := src[(pc+p)*ld+j0+jr:]
				d := panel[p*w : p*w+w]
				copy(d, row[:wr])
				clear(d[wr:])
			}
			continue
		}
		if wr < w {
			clear(panel)
		}
		transposeStrip(panel, w, src, ld, (j0+jr)*ld+pc, wr, kb)
	}
}

// transposeStrip writes rows [0, rows) of the strip src[off+i·ld : +kb]
// into panel with stride: panel[p·width+i] = src[off+i·ld+p]. Four rows
// are read side by side so each store burst is contiguous and the bounds
// checks hoist out of the loop; this gather is the packing cost of a
// non-transposed A (and a transposed B), so it matters when the other
// dimension is small (e.g. n = 49 in late ResNet layers).
func transposeStrip(panel []float32, width int, src []float32, ld, off, rows, kb int) {
	i := 0
	for ; i+4 <= rows; i += 4 {
		r0 := src[off+i*ld : off+i*ld+kb]
		r1 := src[off+(i+1)*ld : off+(i+1)*ld+kb]
		r2 := src[off+(i+2)*ld : off+(i+2)*ld+kb]
		r3 := src[off+(i+3)*ld : off+(i+3)*ld+kb]
		r1, r2, r3 = r1[:len(r0)], r2[:len(r0)], r3[:len(r0)]
		d := panel[i:]
		for p := range r0 {
			q := d[p*width : p*width+4 : p*width+4]
			q[0], q[1], q[2], q[3] = r0[p], r1[p], r2[p], r3[p]
		}
	}
	for ; i < rows; i++ {
		r := src[off+i*ld : off+i*ld+kb]
		for p, v := range r {
			panel[p*width+i] = v
		}
	}
}

// scaleC sets C = beta·C, writing zeros without reading C when beta is 0.
func scaleC(m, n int, beta float32, c []float32, ldc int) {
	if beta == 1 {
		return
	}
	for i := 0; i < m; i++ {
		row := c[i*ldc : i*ldc+n]
		if beta == 0 {
			clear(row)
			continue
		}
		for j := range row {
			row[j] *= beta
		}
	}
}

// checkArgs validates a GEMM call the way the reference BLAS's SGEMM does
// (non-negative sizes, leading dimensions at least the stored row length)
// and additionally that every slice holds the last element addressed.
func checkArgs(transA, transB bool, m, n, k int, a []float32, lda int, b []float32, ldb int, c []float32, ldc int) {
	if m < 0 || n < 0 || k < 0 {
		panic(fmt.Sprintf("kernel: negative GEMM size m=%d n=%d k=%d", m, n, k))
	}
	ar, ac := m, k
	if transA {
		ar, ac = k, m
	}
	br, bc := k, n
	if transB {
		br, bc = n, k
	}
	checkMat("A", a, ar, ac, lda)
	checkMat("B", b, br, bc, ldb)
	checkMat("C", c, m, n, ldc)
}

func checkMat(name string, x []float32, rows, cols, ld int) {
	if ld < max(1, cols) {
		panic(fmt.Sprintf("kernel: GEMM leading dimension of %s is %d, want >= %d", name, ld, max(1, cols)))
	}
	if rows == 0 || cols == 0 {
		return
	}
	if need := (rows-1)*ld + cols; len(x) < need {
		panic(fmt.Sprintf("kernel: GEMM %s has %d elements, want >= %d for %d×%d with stride %d", name, len(x), need, rows, cols, ld))
	}
}
