package engine

import (
	"sync/atomic"
	"testing"
)

// TestTeamSplit checks team.split's contract, with a fresh helper per call
// and with a persistent team: f is called on disjoint chunks covering
// [0, n) exactly once each, for counts below, at and above the chunk
// count, and for work below the split threshold (run on the caller).
func TestTeamSplit(t *testing.T) {
	for _, tm := range []*team{nil, newTeam()} {
		for _, n := range []int{0, 1, 3, 8, 9, 1000} {
			for _, work := range []int{1, splitMinWork, 1 << 22} {
				hits := make([]atomic.Int32, n)
				tm.split(n, work, func(i0, i1 int) {
					if i0 >= i1 {
						t.Errorf("n=%d: empty chunk [%d, %d)", n, i0, i1)
					}
					for i := i0; i < i1; i++ {
						hits[i].Add(1)
					}
				})
				for i := range hits {
					if h := hits[i].Load(); h != 1 {
						t.Fatalf("n=%d work=%d: index %d covered %d times", n, work, i, h)
					}
				}
			}
		}
	}
}
