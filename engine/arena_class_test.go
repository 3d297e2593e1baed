package engine

import (
	"testing"
	"unsafe"
)

// TestSizeClass checks the arena's size classes: a class holds its
// request, wastes at most a quarter of it (from 8 floats up), is its own
// class, and classes grow with the request.
func TestSizeClass(t *testing.T) {
	prev := 0
	for n := 1; n < 1<<21; n += 1 + n/97 {
		c := sizeClass(n)
		switch {
		case c < n:
			t.Fatalf("sizeClass(%d) = %d < n", n, c)
		case n >= 8 && 4*(c-n) > n:
			t.Fatalf("sizeClass(%d) = %d wastes more than a quarter", n, c)
		case sizeClass(c) != c:
			t.Fatalf("sizeClass(%d) = %d, but sizeClass(%d) = %d", n, c, c, sizeClass(c))
		case c < prev:
			t.Fatalf("sizeClass(%d) = %d < %d for a smaller request", n, c, prev)
		}
		prev = c
	}
	// Worked values: 32×112×112 and 144×56×56 (MobileNetV2) share a class.
	if a, b := sizeClass(32*112*112), sizeClass(144*56*56); a != b || a != 7<<16 {
		t.Errorf("sizeClass(401408) = %d, sizeClass(451584) = %d, want both %d", a, b, 7<<16)
	}
}

// TestArenaBestFit checks that a request takes the smallest free buffer
// of its class up to twice that, and not a larger one.
func TestArenaBestFit(t *testing.T) {
	a := newArena()
	big := a.floats(1000)  // class 1024
	small := a.floats(300) // class 320
	huge := a.floats(4000) // class 4096
	a.put(huge)
	a.put(big)
	a.put(small)
	same := func(x, y []float32) bool { return unsafe.SliceData(x) == unsafe.SliceData(y) }
	// 600 (class 640): 1024 is within twice, 320 too small: takes big.
	if got := a.floats(600); len(got) != 600 || !same(got, big) {
		t.Errorf("floats(600) did not reuse the 1024-float buffer")
	}
	// 290 (class 320): the 320 buffer, not the 4096 one.
	if got := a.floats(290); !same(got, small) {
		t.Errorf("floats(290) did not reuse the 320-float buffer")
	}
	// 1500 (class 1536): 4096 is more than twice: a fresh buffer.
	if got := a.floats(1500); same(got, huge) || cap(got) != 1536 {
		t.Errorf("floats(1500) took the 4096-float buffer or has capacity %d, want a fresh 1536", cap(got))
	}
	// A slice that is not an arena buffer (capacity not a class) is not kept.
	before, _, _ := a.held()
	a.put(make([]float32, 1001))
	if after, _, _ := a.held(); after != before {
		t.Errorf("put of a 1001-float slice changed the held bytes %d → %d", before, after)
	}
}

// TestScratchClasses checks the scratch pool's buffers: the length asked
// for, a power-of-two capacity that holds it, and buffers of other
// capacities refused.
func TestScratchClasses(t *testing.T) {
	var s scratch
	for _, n := range []int{1, 2, 3, 4, 5, 31, 32, 33, 1000, 1 << 20, 1<<20 + 1} {
		b := s.get(n)
		if len(*b) != n || cap(*b) < n || cap(*b)&(cap(*b)-1) != 0 || cap(*b) >= 2*n && n > 1 {
			t.Errorf("get(%d): len %d cap %d, want len %d and the smallest power of two ≥ it", n, len(*b), cap(*b), n)
		}
		s.put(b)
	}
	odd := make([]float32, 3)
	s.put(&odd) // not a power of two: dropped, and no get may return it
	for range 4 {
		if b := s.get(3); unsafe.SliceData(*b) == unsafe.SliceData(odd) {
			t.Fatal("get(3) returned a buffer of capacity 3")
		}
	}
}
