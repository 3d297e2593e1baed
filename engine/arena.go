package engine

import (
	"math/bits"
	"sync"
	"unsafe"

	"heedmap/tensor"
)

// arena recycles float32 activation buffers between the nodes of a pass
// and across passes of one Graph. A network runs the same shapes on every
// pass, so a steady-state forward pass reuses the previous pass's buffers
// instead of allocating (and the runtime zeroing) fresh ones: allocation
// churn, page faults and garbage collection pauses were a fifth of a
// ResNet-18 pass. Buffers are pooled by size class (sizeClass), and a
// request takes the smallest free buffer of its class up to twice that,
// most recently freed first, so a layer writes into memory the last one
// has just used. The memory a pass touches is what counts on a cache
// shared with other work: pooled by exact length, MobileNetV2 at batch 1
// held 10.6 MB of buffers for activations that peak at 3.9 MB; by class
// and best fit, 5.7 MB, and its forward pass ran 7 % faster
// (DEVELOPERS.md).
//
// A buffer comes back only through Run's free of a value at its last use,
// and only when its producer is known to return freshly allocated outputs
// (see recyclable) and no other live value shares its backing array (a
// view such as Reshape or Identity); anything else is left to the garbage
// collector. Values a caller can still see (graph outputs, kept values,
// those retained for Backward) are never freed by Run, so they are never
// recycled. The trade-off is memory held between passes. Two rules keep it
// proportional to the network rather than to the number of passes:
//
//   - Only size classes some operator has asked the arena for are kept. Most
//     recyclable operators (pooling, element-wise, normalisation) allocate
//     their own outputs, so without this rule their buffers, returned at
//     every pass and never taken again, piled up to the byte bound: ~385 MB
//     of pooling outputs on a 47k-parameter network.
//   - The bytes held never exceed arenaPeakFactor times the largest live
//     activation bytes of one pass (Pass.peakBytes, reported as it grows)
//     times the largest number of passes seen running at once. A fixed
//     ceiling, arenaMaxBytes, still applies on top.
//
// With every recyclable producer drawing from the arena (useArena), the
// free lists settle at the most buffers live at once, so a steady-state
// pass allocates only the values it hands to its caller.
//
// Buffers past the bound are dropped to the garbage collector.
//
// Tensors handed out by the arena are not zeroed: only operators that
// overwrite every output element take them. A nil *arena allocates
// normally, so operators built outside a Graph (tests, incremental
// re-planning) need no arena.
type arena struct {
	mu       sync.Mutex
	free     map[int][][]float32 // by capacity, a sizeClass
	asked    map[int]bool        // size classes floats has been called for
	bytes    int
	maxBytes int // fixed ceiling
	hits     int // buffers reused (for tests and benchmarks)
	misses   int // requests served by a fresh allocation

	// Pass accounting for the bound (see passStart, passPeak). peak is 0
	// for an arena no Run has used (operator tests), which then has only
	// the fixed ceiling.
	active, maxActive int
	peak              int64 // largest Pass.peakBytes reported
	maxHeld           int   // high-water mark of bytes (for tests)

	// memo holds data Backward derives from the graph's constants (see
	// derived), outside the byte bound: at most one copy of each constant
	// an op asks about, made on the first backward pass.
	memo map[memoKey][]float32
}

// memoKey names data one operator derived from one graph constant.
type memoKey struct {
	c     *tensor.Tensor
	owner Op
}

// arenaMaxBytes bounds the memory the free lists hold between passes:
// enough for every intermediate of a ResNet-50-sized network at batch 16
// and for what a MobileNetV2 forward+backward at batch 16 keeps for
// Backward (about 390 MB). With a lower cap (384 MiB) those released
// buffers were dropped and reallocated every pass: a loop of full-size
// MobileNetV2 forward+backward passes at batch 16 (each released) ran at
// 28–30 img/s with 1.33 GB peak RSS, against 36–44 img/s and 0.79 GB with
// this cap (garbage waiting for the collector costs more than a bounded
// pool).
const arenaMaxBytes = 768 << 20

// arenaPeakFactor scales the per-pass bound. Buffers are pooled by size
// class, so the free lists together settle above one pass's peak live
// bytes (different classes peak at different nodes, and a class rounds
// up): 1.25× on ResNet-18 at batch 1 and 16, measured with exact lengths
// (1.1× by class); a bound of 1× made half the recycled outputs
// miss on every pass. Attribution alternates batch sizes (a single image to
// resolve the target, full batches, a short last batch), whose sets add up
// to at most about (1 + 1 + small)·1.25 of the largest pass's peak; 3 covers
// that with some margin.
const arenaPeakFactor = 3

func newArena() *arena {
	return &arena{free: map[int][][]float32{}, asked: map[int]bool{}, maxBytes: arenaMaxBytes}
}

// floats returns a slice of n floats with arbitrary contents.
func (a *arena) floats(n int) []float32 {
	b, _ := a.floatsFresh(n)
	return b
}

// floatsFresh is floats, also reporting whether the slice was freshly
// allocated (and so is all zeros).
func (a *arena) floatsFresh(n int) ([]float32, bool) {
	if a == nil || n == 0 {
		return make([]float32, n), true
	}
	c := sizeClass(n)
	a.mu.Lock()
	a.asked[c] = true
	// The smallest free buffer of at least c and at most twice c: at
	// most five classes to look at, smallest first.
	best := 0
	for k := c; k <= 2*c; k = sizeClass(k + 1) {
		if len(a.free[k]) > 0 {
			best = k
			break
		}
	}
	if best > 0 {
		l := a.free[best]
		b := l[len(l)-1]
		l[len(l)-1] = nil
		a.free[best] = l[:len(l)-1]
		a.bytes -= 4 * best
		a.hits++
		a.mu.Unlock()
		return b[:n], false
	}
	a.misses++
	a.mu.Unlock()
	return make([]float32, n, c), true
}

// sizeClass is the capacity of the arena buffers that serve a request for
// n floats: n rounded up to three significant bits (steps of an eighth to
// a quarter of a power of two), so one buffer serves every request within
// that step. Pooled by exact length, as before, MobileNetV2's 18 output
// sizes at batch 1 kept 10.6 MB of buffers for a pass whose live
// activations peak at 3.9 MB, and a pass that touches more memory than the
// cache holds runs slower (DEVELOPERS.md); a coarser step (powers of two)
// would hold up to twice the bytes a pass uses.
func sizeClass(n int) int {
	e := max(0, bits.Len(uint(n))-3)
	return (n + 1<<e - 1) >> e << e
}

// tensor returns a float32 tensor of the given shape with arbitrary
// contents; the caller must write every element.
func (a *arena) tensor(shape ...int) *tensor.Tensor {
	if a == nil {
		return tensor.New(shape...)
	}
	s := make([]int, len(shape))
	copy(s, shape)
	return &tensor.Tensor{DType: tensor.Float32, Shape: s, F32: a.floats(tensor.Numel(shape))}
}

// put returns a buffer to the free list. The caller guarantees nothing
// else references it.
func (a *arena) put(b []float32) {
	if a == nil || cap(b) == 0 {
		return
	}
	c := cap(b)
	if sizeClass(c) != c {
		return // not an arena buffer
	}
	b = b[:c]
	a.mu.Lock()
	defer a.mu.Unlock()
	if !a.asked[c] || a.bytes+4*c > a.limit() {
		return
	}
	a.free[c] = append(a.free[c], b)
	a.bytes += 4 * c
	a.maxHeld = max(a.maxHeld, a.bytes)
}

// limit is the byte bound on the free lists; the caller holds a.mu.
func (a *arena) limit() int {
	if a.peak == 0 {
		return a.maxBytes
	}
	return int(min(int64(a.maxBytes), arenaPeakFactor*int64(max(a.maxActive, 1))*a.peak))
}

// passStart records that a pass began; the returned func records its end.
func (a *arena) passStart() (end func()) {
	if a == nil {
		return func() {}
	}
	a.mu.Lock()
	a.active++
	a.maxActive = max(a.maxActive, a.active)
	a.mu.Unlock()
	return func() {
		a.mu.Lock()
		a.active--
		a.mu.Unlock()
	}
}

// passPeak records a pass's live activation bytes high-water mark so far.
func (a *arena) passPeak(b int64) {
	if a == nil {
		return
	}
	a.mu.Lock()
	a.peak = max(a.peak, b)
	a.mu.Unlock()
}

// held reports the bytes on the free lists now, their high-water mark and
// the current bound.
func (a *arena) held() (now, most, bound int) {
	if a == nil {
		return 0, 0, 0
	}
	a.mu.Lock()
	defer a.mu.Unlock()
	return a.bytes, a.maxHeld, a.limit()
}

// reused reports how many buffers have been handed out again.
func (a *arena) reused() int {
	if a == nil {
		return 0
	}
	a.mu.Lock()
	defer a.mu.Unlock()
	return a.hits
}

// recyclable reports whether op is known to return freshly allocated
// float32 outputs that alias neither its inputs nor any state of its own,
// so a dead output may be handed to another operator.
func recyclable(op Op) bool {
	switch op.(type) {
	case *convOp, *poolOp, *globalPoolOp, *unaryOp, *clipOp, *binaryOp, *batchNormOp:
		return true
	}
	return false
}

// useArena gives the recyclable operators that allocate their own float32
// outputs the graph's arena, so every buffer Run recycles has a taker on
// the next pass: a buffer is only recycled from a recyclable producer, and
// with producers drawing from the arena the free list of a length never
// outgrows the most buffers of that length live at once (no per-pass
// allocation in steady state). Each of these operators writes every
// output element, as arena buffers require. Convolution takes its arena
// from Env when built. Their Backward draws input gradients from the
// arena too (zeroed where it accumulates or writes only some elements),
// and Pass.Backward returns those that die inside the sweep.
func useArena(op Op, a *arena) {
	switch o := op.(type) {
	case *poolOp:
		o.arena = a
	case *globalPoolOp:
		o.arena = a
	case *unaryOp:
		o.arena = a
	case *binaryOp:
		o.arena = a
	case *batchNormOp:
		o.arena = a
	case *clipOp:
		o.arena = a // Backward only
	}
}

// backing returns the address one past the end of s's backing array,
// which two slices share exactly when they share the array.
func backing(s []float32) uintptr {
	if cap(s) == 0 {
		return 0
	}
	return uintptr(unsafe.Pointer(unsafe.SliceData(s))) + uintptr(cap(s))*4
}

// recycle hands the buffer of value v, which Run is about to drop, to the
// graph's arena when that is safe: v was produced by a recyclable node and
// no other value of the pass still holds its backing array.
func (g *Graph) recycle(p *Pass, v int) {
	if g.arena == nil || g.producer[v] < 0 {
		return
	}
	t := p.vals[v]
	if t == nil || t.DType != tensor.Float32 || cap(t.F32) == 0 || !recyclable(g.nodes[g.producer[v]].op) {
		return
	}
	end := backing(t.F32)
	for u, o := range p.vals {
		if u != v && o != nil && o.DType == tensor.Float32 && backing(o.F32) == end {
			return
		}
	}
	g.arena.put(t.F32)
}

// zeroed returns a float32 tensor of the given shape with every element
// zero, for operators that accumulate into or write only part of their
// output.
func (a *arena) zeroed(shape ...int) *tensor.Tensor {
	s := make([]int, len(shape))
	copy(s, shape)
	b, fresh := a.floatsFresh(tensor.Numel(shape))
	if !fresh {
		// A fresh allocation is zero already; clearing it again would
		// also fault its pages in, in a pass of its own (a third of a
		// batch-16 MobileNetV2 backward, whose kept values exceed the
		// arena's byte bound).
		clearParallel(b)
	}
	return &tensor.Tensor{DType: tensor.Float32, Shape: s, F32: b}
}

// clearParallel zeroes s, splitting long slices over the cores: a
// gradient's zeroing was a serial pass over several megabytes that left
// the other core idle.
func clearParallel(s []float32) {
	const chunk = 1 << 14 // floats; whole chunks keep the splits aligned
	chunks := (len(s) + chunk - 1) / chunk
	splitWork(chunks, len(s), func(c0, c1 int) {
		clear(s[c0*chunk : min(c1*chunk, len(s))])
	})
}

// recycleFull returns full, a full-size gradient buffer binaryOp's
// Backward drew from its arena, once reduced is the reduced copy of it
// (not full itself, and not the incoming gradient g, which it never draws).
func (b *binaryOp) recycleFull(full, reduced, g []float32) {
	if len(full) == 0 || (len(reduced) > 0 && &full[0] == &reduced[0]) || (len(g) > 0 && &full[0] == &g[0]) {
		return
	}
	b.arena.put(full)
}

// freshGrads reports whether op's Backward returns freshly allocated
// gradients (from its arena or make) that alias neither its inputs and
// outputs nor any state of its own, so Backward may recycle one once the
// next node upstream has consumed it. A fresh op may still return a view
// of its output gradient (Add does, where nothing is reduced): Pass.Backward
// recognises those by their backing array and treats them as the output
// gradient itself.
func freshGrads(op Op) bool {
	switch op.(type) {
	case *convOp, *poolOp, *globalPoolOp, *unaryOp, *clipOp, *binaryOp, *batchNormOp:
		return true
	}
	return false
}

// derived returns the n floats build derives, for the operator owner, from
// the graph constant c (Conv's flipped filters, which depend on the node's
// group count as well as on c), building them on first use and sharing them,
// read only, with every later pass. c must be a constant of the graph: the
// memo is keyed by the tensor, whose contents never change. Memory is
// bounded by one copy of the constants asked about (the convolution
// weights: 45 MB for ResNet-18). Concurrent first uses may each build;
// one result is kept.
func (a *arena) derived(c *tensor.Tensor, owner Op, n int, build func([]float32)) []float32 {
	k := memoKey{c, owner}
	a.mu.Lock()
	d, ok := a.memo[k]
	a.mu.Unlock()
	if ok && len(d) == n {
		return d
	}
	d = make([]float32, n)
	build(d)
	a.mu.Lock()
	defer a.mu.Unlock()
	if a.memo == nil {
		a.memo = map[memoKey][]float32{}
	}
	if old, ok := a.memo[k]; ok && len(old) == n {
		return old
	}
	a.memo[k] = d
	return d
}
