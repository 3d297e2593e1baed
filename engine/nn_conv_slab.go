package engine

import (
	"math"
	"runtime"
	"sync"
	"sync/atomic"

	"heedmap/kernel"
)

// epilogue is what a convolution applies to its output after the matrix
// product: the bias and, when fused (fuse.go), an activation.
type epilogue struct {
	bias   []float32 // per output channel; nil for none
	act    actKind
	lo, hi float32 // Clip bounds
}

type actKind uint8

const (
	actNone actKind = iota
	actRelu
	actClip
)

// apply runs the epilogue on rows [m0, m1) of one image's M×N output,
// columns [j0, j1) (a row stride of n), with the kernel package's vector
// loop: Relu is max(v, 0) and Clip min(hi, max(lo, v)) exactly as those
// operators' forward kernels compute them.
func (e *epilogue) apply(y []float32, n, m0, m1, j0, j1 int) {
	if e == nil || (e.bias == nil && e.act == actNone) {
		return
	}
	lo, hi := e.bounds()
	for m := m0; m < m1; m++ {
		var bv float32
		if e.bias != nil {
			bv = e.bias[m]
		}
		kernel.BiasClamp(y[m*n+j0:m*n+j1], bv, lo, hi)
	}
}

// bounds returns the clamp interval of the activation.
func (e *epilogue) bounds() (lo, hi float32) {
	inf := float32(math.Inf(1))
	switch e.act {
	case actRelu:
		return 0, inf
	case actClip:
		return e.lo, e.hi
	}
	return -inf, inf
}

// slabCols is the target size, in floats, of one column slab: 128 Ki
// floats (512 KiB) sits in a Zen 4/5 core's 1 MiB L2 next to the packed
// weights, so the slab is still cached when the GEMM packs it.
const slabFloats = 128 << 10

// useSlabs reports whether a convolution of this shape is lowered slab by
// slab: only when there are enough output positions for every core to
// take several 32-column slabs. With fewer (late layers, N = 49 … 196)
// the column matrix is small anyway and the multi-threaded GEMM splits the
// much larger M instead.
func (op *convOp) useSlabs(kk, ohw int) bool {
	return op.gemm1 != nil && ohw >= 8*32*runtime.GOMAXPROCS(0)/2 && kk >= 8
}

// slabForward computes one image and group, Yg (mg×ohw) = Wg·col, by
// slabs of columns: each goroutine claims the next slab, lowers it with
// Im2colCols into its own cache-sized buffer, multiplies it with a
// single-threaded GEMM and applies the epilogue to it while it is hot.
// Both cores are busy on every such convolution, and the full column
// matrix (7 MiB for a 64-channel 56×56 3×3 layer) is never written out.
func (op *convOp) slabForward(plan *kernel.Im2colPlan, xg []float32, cg int, g geom2, wg []float32, mg, kk int, yg []float32, ep *epilogue, mOff int) error {
	ohw := g.oh * g.ow
	nb := max(32, min(512, slabFloats/kk/32*32))
	slabs := (ohw + nb - 1) / nb
	workers := min(runtime.GOMAXPROCS(0), slabs)
	var next atomic.Int64
	var mu sync.Mutex
	var firstErr error
	work := func() {
		buf := poolBuf(&op.slabBufs, kk*nb)
		defer op.slabBufs.Put(buf)
		for {
			s := int(next.Add(1) - 1)
			if s >= slabs {
				return
			}
			j0 := s * nb
			j1 := min(j0+nb, ohw)
			w := j1 - j0
			col := (*buf)[:kk*w]
			for ch := 0; ch < cg; ch++ {
				rows := kk / cg
				if err := plan.Im2colCols(col[ch*rows*w:(ch+1)*rows*w], xg[ch*g.ih*g.iw:(ch+1)*g.ih*g.iw], j0, j1); err != nil {
					mu.Lock()
					firstErr = err
					mu.Unlock()
					return
				}
			}
			op.gemm1.Sgemm(false, false, mg, w, kk, 1, wg, kk, col, w, 0, yg[j0:], ohw)
			if ep != nil {
				sub := *ep
				if sub.bias != nil {
					sub.bias = sub.bias[mOff:]
				}
				sub.apply(yg, ohw, 0, mg, j0, j1)
			}
		}
	}
	var wg2 sync.WaitGroup
	for t := 1; t < workers; t++ {
		wg2.Add(1)
		go func() {
			defer wg2.Done()
			work()
		}()
	}
	work()
	wg2.Wait()
	return firstErr
}

// poolBuf returns a buffer of n floats from p; its contents are arbitrary.
func poolBuf(p *sync.Pool, n int) *[]float32 {
	if b, ok := p.Get().(*[]float32); ok && cap(*b) >= n {
		*b = (*b)[:n]
		return b
	}
	b := make([]float32, n)
	return &b
}
