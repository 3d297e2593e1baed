package engine

import (
	"math/bits"
	"sync"
)

// scratch lends float32 work buffers (lowered panels, zero-padded inputs,
// product blocks, expansion blocks) to all of a Graph's operators, by
// capacity class (a power of two), instead of each operator keeping pools
// of its own. A sync.Pool hands a goroutine the buffer its own core put
// back last, so the next operator's task reuses memory that is still in
// that core's cache, and the buffers a pass touches number about what two
// goroutines hold at once rather than that times the number of layers:
// with a pool per convolution, MobileNetV2's 52 layers kept their own
// row blocks, padded inputs and expansion blocks, and every megabyte a
// pass touches beyond what the cache holds costs time (DEVELOPERS.md:
// 4 MB written between passes made a MobileNetV2 forward pass 5–8 %
// slower). Buffers come back with arbitrary contents: every user writes
// what it reads.
type scratch struct {
	classes [48]sync.Pool // class c: buffers of capacity 1<<c
}

// class is the smallest c with n ≤ 1<<c.
func class(n int) int {
	if n <= 1 {
		return 0
	}
	return bits.Len(uint(n - 1))
}

// get returns a buffer of n floats with arbitrary contents.
func (s *scratch) get(n int) *[]float32 {
	c := class(n)
	if b, ok := s.classes[c].Get().(*[]float32); ok {
		*b = (*b)[:n]
		return b
	}
	b := make([]float32, n, 1<<c)
	return &b
}

// put hands b back; the caller must not use it again.
func (s *scratch) put(b *[]float32) {
	if c := class(cap(*b)); cap(*b) == 1<<c {
		s.classes[c].Put(b)
	}
}
