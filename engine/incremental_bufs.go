package engine

import (
	"math/bits"
	"sync"
)

// incBufs is the incremental evaluator's own free list of float buffers,
// shared by every batch of windows (and every Incremental rebased from one
// plan). A batch of 16 windows on ResNet-18 at 224² creates about 40
// patch tensors of 0.1–2.6 MB; allocated fresh, each was zeroed by the
// runtime and, after other work in the process had left the heap
// fragmented, page-faulted in again (memclr and page faults were a tenth
// of an occlusion map's CPU time, and more inside the benchmark driver).
//
// Patch sizes differ from batch to batch, so buffers are kept by size
// class (four classes per power of two, at most 25 % larger than asked)
// rather than by exact length. Buffers are not zeroed: every caller
// overwrites all it reads. Unlike a sync.Pool, the lists survive garbage
// collections, which would otherwise empty them once per few batches; the
// bytes held are bounded by incBufsMax instead.
type incBufs struct {
	mu    sync.Mutex
	free  map[int][][]float32 // by class size
	bytes int
}

// incBufsMax bounds the bytes the free lists hold between batches: twice
// what a batch of 16 windows on a ResNet-50-sized network at 224² keeps
// live at once.
const incBufsMax = 256 << 20

// incClass returns the size class of n floats: the least value of the
// form (4+i)·2^e, i < 4, that is at least n.
func incClass(n int) int {
	if n <= 8 {
		return 8
	}
	e := bits.Len(uint(n-1)) - 3 // n−1 < 8·2^e
	step := 1 << e
	return (n + step - 1) / step * step
}

// get returns a slice of n floats with arbitrary contents.
func (b *incBufs) get(n int) []float32 {
	c := incClass(n)
	b.mu.Lock()
	if l := b.free[c]; len(l) > 0 {
		s := l[len(l)-1]
		l[len(l)-1] = nil
		b.free[c] = l[:len(l)-1]
		b.bytes -= 4 * c
		b.mu.Unlock()
		return s[:n]
	}
	b.mu.Unlock()
	return make([]float32, n, c)
}

// put hands back a slice that get returned. Slices of other capacities
// (not from get) are left to the garbage collector.
func (b *incBufs) put(s []float32) {
	c := cap(s)
	if c == 0 || incClass(c) != c {
		return
	}
	b.mu.Lock()
	if b.bytes+4*c <= incBufsMax {
		if b.free == nil {
			b.free = map[int][][]float32{}
		}
		b.free[c] = append(b.free[c], s[:c])
		b.bytes += 4 * c
	}
	b.mu.Unlock()
}
