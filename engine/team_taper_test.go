package engine

import "testing"

// TestTaper checks taper's contract for counts from 0 to 1000, two and
// four workers, capped and not: the tasks cover [0, n) in position order
// with no gap or overlap, none is empty or larger than the cap, sizes do
// not grow from either end toward the middle, the middle tasks are at
// most a unit, and a large range still gets about four tasks per core
// (no more than 2·taperPerCore·workers plus the rounds a cap adds).
func TestTaper(t *testing.T) {
	for _, workers := range []int{2, 4} {
		for n := 0; n <= 1000; n++ {
			for _, most := range []int{n, 16, 5} {
				tp := newCappedTaper(n, workers, most)
				sizes := make([]int, tp.tasks)
				next := 0
				for i := range sizes {
					i0, i1 := tp.bounds(i)
					if i0 != next || i1 <= i0 || i1-i0 > max(most, 1) {
						t.Fatalf("n=%d workers=%d most=%d: task %d is [%d, %d), want it to start at %d, be non-empty and at most %d", n, workers, most, i, i0, i1, next, most)
					}
					sizes[i] = i1 - i0
					next = i1
				}
				if next != n {
					t.Fatalf("n=%d workers=%d most=%d: tasks end at %d", n, workers, most, next)
				}
				for i := 1; i < len(sizes)/2; i++ {
					if sizes[i] > sizes[i-1] || sizes[len(sizes)-1-i] > sizes[len(sizes)-i] {
						t.Fatalf("n=%d workers=%d most=%d: sizes %v grow toward the middle", n, workers, most, sizes)
					}
				}
				if m := len(sizes) / 2; len(sizes) > 0 && sizes[m] > max(tp.unit, 1) && n > 2*taperPerCore*workers {
					t.Fatalf("n=%d workers=%d most=%d: middle task of %d units, unit %d (%v)", n, workers, most, sizes[m], tp.unit, sizes)
				}
				limit := 2*taperPerCore*workers + 2
				if most < n {
					limit += (n + most - 1) / most
				}
				if n > 2*taperPerCore*workers && len(sizes) > limit {
					t.Fatalf("n=%d workers=%d most=%d: %d tasks (%v), want at most %d", n, workers, most, len(sizes), sizes, limit)
				}
			}
		}
	}
}
