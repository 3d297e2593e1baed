package engine

import (
	"fmt"
	"runtime"
	"sync/atomic"
	"testing"
	"time"
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

// TestTeamParkedWaiters runs three-phase jobs on four goroutines (three
// helpers) whose first task of each phase outlasts barrierSpin, so the
// others park at the barrier, several on the same phase: no task may
// start before the phase before it has finished, and every task runs.
func TestTeamParkedWaiters(t *testing.T) {
	prev := runtime.GOMAXPROCS(4)
	defer runtime.GOMAXPROCS(prev)
	tm := newTeam()
	for i := 0; i < 50; i++ {
		var done [3]atomic.Int32
		err := tm.run([]int{4, 4, 4}, func(p, task int) error {
			if p > 0 && done[p-1].Load() != 4 {
				return fmt.Errorf("phase %d task %d started before phase %d finished", p, task, p-1)
			}
			if task == 0 {
				time.Sleep(4 * barrierSpin)
			}
			done[p].Add(1)
			return nil
		})
		if err != nil {
			t.Fatal(err)
		}
		for p := range done {
			if n := done[p].Load(); n != 4 {
				t.Fatalf("phase %d ran %d tasks, want 4", p, n)
			}
		}
	}
}
