package engine

import (
	"fmt"
	"runtime"

	"heedmap/kernel"
	"heedmap/tensor"
)

// The Winograd path computes a 3×3 unit-stride convolution as F(2×2, 3×3)
// (Lavin & Gray, CVPR 2016; kernel.WinogradFilter has the algebra): 16
// multiply-adds per 2×2 outputs and input channel instead of 36. The
// filters are transformed once per graph (they must be a graph constant);
// each task then takes a block of 64 tiles of one image and
//
//  1. transforms the input rows they read where they lie, the padding
//     masked out by the kernel (kernel.WinogradInput): sixteen channels ×
//     tiles matrices V_ξ;
//  2. multiplies U_ξ (outputs × channels) by V_ξ for each ξ with the
//     single-threaded packed GEMM reading V_ξ where it lies
//     (Packed.SgemmUnpacked);
//  3. transforms the sixteen products back into 2×2 output blocks with
//     the bias, residual and activation applied as they are stored
//     (kernel.WinogradOutput).
//
// Everything a block needs stays in its core's L2. When there are too few
// blocks to keep every core busy (a 14×14 map at batch 1 is one block),
// the output channels are split as well, and the transform then runs first
// as its own phase, split by channels, so no core repeats it.
//
// The input gradient of such a layer is the same kind of convolution (of
// dY with the flipped filters, see transposedGeom), so the backward pass
// takes this path too.
//
// Rounding differs from the im2col path's: each output is still a sum over
// its own 3×3 window only, but through the transformed values
// (TestConvWinogradMatchesReference bounds the difference). Which tiles a
// block holds depends only on the shapes, so results do not depend on the
// number of cores.

// winoFilters is the memo owner of a convolution's transformed filters
// (flipped: those of its input gradient's convolution).
type winoFilters struct {
	op      *convOp
	flipped bool
}

func (winoFilters) Forward([]*tensor.Tensor) ([]*tensor.Tensor, error) {
	return nil, fmt.Errorf("winoFilters is a memo key, not an operator")
}

// winoMinTiles is the fewest 2×2 tiles per image for which the Winograd
// path is taken: a 7×7 map (16 tiles, 49 outputs) spends most of its time
// reading the 16/9 larger transformed filters.
const winoMinTiles = 40

// useWinograd reports whether a convolution of geometry g with c input
// and m output channels (one group) goes through the Winograd path:
// constant filters with an arena to keep their transform, the AVX-512
// GEMM (its unpacked-B kernels), a 3×3 window at unit stride and dilation.
func (op *convOp) useWinograd(g geom2, c, m int) bool {
	return !op.noWinograd && op.constW && op.arena != nil && op.gemm1 != nil && op.group == 1 &&
		op.gemm1.ISA() == kernel.ISAAVX512 &&
		g.kh == 3 && g.kw == 3 && g.sh == 1 && g.sw == 1 && g.dh == 1 && g.dw == 1 &&
		c >= 16 && m >= 16 && ((g.oh+1)/2)*((g.ow+1)/2) >= winoMinTiles
}

// winoFilter returns the transformed filters (16 m×c matrices) of w, made
// once per graph; flipped gives those of the input gradient's
// convolution, whose filters flipFilters makes from w.
func (op *convOp) winoFilter(w *tensor.Tensor, m, c int, flipped bool) []float32 {
	return op.arena.derived(w, winoFilters{op, flipped}, 16*m*c, func(dst []float32) {
		f := w.F32
		if flipped {
			// w is c×m×3×3 here (the forward's output channels are
			// this convolution's inputs).
			f = make([]float32, len(w.F32))
			flipFilters(f, w.F32, 1, c, m, 9)
		}
		kernel.WinogradFilter(dst, f, m, c)
	})
}

// winoBlockTiles is the number of tiles in a block: two 32-column panels
// of the product, so every panel is full (a partial one would be packed
// and its tile stored through a scratch copy) except where a map's last
// block is short, and it is then padded to whole panels.
const winoBlockTiles = 64

// winoPlan is the blocking of one Winograd convolution: an image's tiles,
// row-major, cut into blocks of winoBlockTiles.
type winoPlan struct {
	g             geom2
	c, m          int
	th, tw, tiles int  // tile rows and columns, tiles per image
	blocks        int  // blocks per image
	kBlocks       int  // output-channel blocks per block
	shared        bool // transform as its own phase into a shared buffer
	blockOp       int  // floats of a block's V
}

func newWinoPlan(g geom2, nImg, c, m int) winoPlan {
	p := winoPlan{g: g, c: c, m: m, th: (g.oh + 1) / 2, tw: (g.ow + 1) / 2}
	p.tiles = p.th * p.tw
	p.blocks = (p.tiles + winoBlockTiles - 1) / winoBlockTiles
	procs := runtime.GOMAXPROCS(0)
	p.kBlocks = 1
	if tasks := nImg * p.blocks; tasks < 2*procs && procs > 1 {
		p.kBlocks = max(1, min((4*procs+tasks-1)/tasks, m/32))
	}
	p.shared = p.kBlocks > 1
	p.blockOp = 16 * winoStride(c, winoBlockTiles)
	return p
}

// winoStride is the distance between the sixteen rows×ld matrices of a
// block: one cache line more than their size, because a transform writes
// (or reads) all sixteen at once, and at a multiple of 4 KiB apart (64
// channels × 64 tiles) the sixteen streams fall into the same L1 sets.
// Measured with BenchmarkConvWinograd, three runs each way: the
// ResNet-18 layers went from 0.55–0.69 to 0.45–0.57 ms.
func winoStride(rows, ld int) int { return rows*ld + 16 }

// block returns block b's tiles [t0, t1) and the row stride ld of its
// matrices (t1−t0 rounded up to whole panels).
func (p *winoPlan) block(b int) (t0, t1, ld int) {
	t0 = b * winoBlockTiles
	t1 = min(t0+winoBlockTiles, p.tiles)
	return t0, t1, (t1 - t0 + 31) / 32 * 32
}

// rowSpan calls f for each tile row i the tiles [t0, t1) meet, with the
// row's tiles [j0, j1) among them.
func (p *winoPlan) rowSpan(t0, t1 int, f func(i, j0, j1 int)) {
	for i := t0 / p.tw; i*p.tw < t1; i++ {
		f(i, max(t0-i*p.tw, 0), min(t1-i*p.tw, p.tw))
	}
}

// transform transforms channels [c0, c1) of block b of image x (c×ih×iw)
// into v (16 matrices c×ld), reading the input rows in place: the
// convolution's padding is masked out by the kernel (zero is a row of
// zeros, for padding rows). Columns past the block's tiles are zeroed.
func (p *winoPlan) transform(v, x, zero []float32, b, c0, c1 int) {
	g := p.g
	t0, t1, ld := p.block(b)
	ihw := g.ih * g.iw
	p.rowSpan(t0, t1, func(i, j0, j1 int) {
		var rows [4][]float32
		var strides [4]int
		for r := range rows {
			rows[r] = zero
			if iy := 2*i + r - g.pt; iy >= 0 && iy < g.ih {
				rows[r], strides[r] = x[c0*ihw+iy*g.iw:], ihw
			}
		}
		kernel.WinogradInput(v[c0*ld+i*p.tw+j0-t0:], winoStride(p.c, ld), ld, &rows, &strides, c1-c0, 2*j0-g.pl, j1-j0, g.iw)
	})
	if t1-t0 < ld {
		for ci := c0; ci < c1; ci++ {
			for e := 0; e < 16; e++ {
				row := v[e*winoStride(p.c, ld)+ci*ld:]
				clear(row[t1-t0 : ld])
			}
		}
	}
}

// multiply computes output channels [k0, k1) of block b from its
// transformed input v: the sixteen products into prod, then the output
// transform with the epilogue into y (m×oh×ow, one image; off is y's
// offset in the layer output, for the epilogue's residual).
func (p *winoPlan) multiply(gemm *kernel.Packed, u, v, prod, y []float32, off int, ep *epilogue, b, k0, k1 int) {
	g := p.g
	t0, t1, ld := p.block(b)
	kb := k1 - k0
	for e := 0; e < 16; e++ {
		gemm.SgemmUnpacked(kb, ld, p.c, u[(e*p.m+k0)*p.c:], p.c, v[e*winoStride(p.c, ld):], ld, prod[e*winoStride(kb, ld):], ld)
	}
	bias, noBias, res, lo, hi := ep.channels(k0, k1)
	ohw := g.oh * g.ow
	p.rowSpan(t0, t1, func(i, j0, j1 int) {
		at := k0*ohw + 2*i*g.ow + 2*j0
		var r []float32
		if res != nil {
			r = res[off+at:]
		}
		kernel.WinogradOutput(y[at:], g.ow, ohw, min(2, g.oh-2*i), min(2*j1, g.ow)-2*j0, prod[i*p.tw+j0-t0:], winoStride(kb, ld), ld, kb, bias, noBias, r, lo, hi)
	})
}

// winogradForward computes y (nImg×m×oh×ow) = the convolution of x
// (nImg×c×ih×iw) with the filters whose transform is u, followed by ep
// (nil for none; its residual laid out like y). Each block is transformed
// and multiplied by one task; when the output channels are split too, all
// blocks are transformed (split by channels) before any is multiplied.
func (op *convOp) winogradForward(x []float32, nImg, c int, g geom2, u []float32, m int, y []float32, ep *epilogue) error {
	p := newWinoPlan(g, nImg, c, m)
	ihw, ohw := g.ih*g.iw, g.oh*g.ow
	zeroBuf := op.scr.get(g.iw)
	defer op.scr.put(zeroBuf)
	zero := *zeroBuf
	clear(zero)
	prodLen := 16 * winoStride((m+p.kBlocks-1)/p.kBlocks, winoBlockTiles)
	blocks := nImg * p.blocks
	if !p.shared {
		return op.team.run([]int{blocks}, func(_, t int) error {
			n, b := t/p.blocks, t%p.blocks
			bufs := op.scr.get(p.blockOp + prodLen)
			defer op.scr.put(bufs)
			v, prod := (*bufs)[:p.blockOp], (*bufs)[p.blockOp:]
			p.transform(v, x[n*c*ihw:(n+1)*c*ihw], zero, b, 0, c)
			p.multiply(op.gemm1, u, v, prod, y[n*m*ohw:(n+1)*m*ohw], n*m*ohw, ep, b, 0, m)
			return nil
		})
	}
	vBuf := op.scr.get(blocks * p.blockOp)
	defer op.scr.put(vBuf)
	vs := *vBuf
	cTasks := max(1, min(4*runtime.GOMAXPROCS(0)/blocks, c/16))
	return op.team.run([]int{blocks * cTasks, blocks * p.kBlocks}, func(phase, t int) error {
		if phase == 0 {
			nb, ct := t/cTasks, t%cTasks
			n := nb / p.blocks
			p.transform(vs[nb*p.blockOp:(nb+1)*p.blockOp], x[n*c*ihw:(n+1)*c*ihw], zero, nb%p.blocks, c*ct/cTasks, c*(ct+1)/cTasks)
			return nil
		}
		nb, kt := t/p.kBlocks, t%p.kBlocks
		n := nb / p.blocks
		bufs := op.scr.get(prodLen)
		defer op.scr.put(bufs)
		p.multiply(op.gemm1, u, vs[nb*p.blockOp:(nb+1)*p.blockOp], *bufs, y[n*m*ohw:(n+1)*m*ohw], n*m*ohw, ep, nb%p.blocks, m*kt/p.kBlocks, m*(kt+1)/p.kBlocks)
		return nil
	})
}
