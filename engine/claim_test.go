package engine

import (
	"errors"
	"sync"
	"sync/atomic"
	"testing"
)

// TestClaimPhases checks the task runner's contract, with a fresh helper per
// call and with a persistent team whose helpers carry over: every task of every
// phase runs exactly once, no task of a phase starts before every task of
// the previous phase has finished, and after an error no new task starts
// and the first error is returned. Run it with -race.
func TestClaimPhases(t *testing.T) {
	for _, tm := range []*team{nil, newTeam()} {
		for rep := 0; rep < 3; rep++ { // a team's helpers carry over between calls
			checkTeam(t, tm)
		}
	}
}

func checkTeam(t *testing.T, tm *team) {
	counts := []int{3, 0, 17, 1, 40}
	var mu sync.Mutex
	seen := make([][]int, len(counts))
	for p, c := range counts {
		seen[p] = make([]int, c)
	}
	var finished [5]atomic.Int64
	err := tm.run(counts, func(p, i int) error {
		for q := 0; q < p; q++ {
			if got := finished[q].Load(); got != int64(counts[q]) {
				t.Errorf("phase %d task %d started with %d of phase %d's %d tasks finished", p, i, got, q, counts[q])
			}
		}
		mu.Lock()
		seen[p][i]++
		mu.Unlock()
		finished[p].Add(1)
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	for p := range seen {
		for i, n := range seen[p] {
			if n != 1 {
				t.Errorf("phase %d task %d ran %d times", p, i, n)
			}
		}
	}
	boom := errors.New("boom")
	var after atomic.Int64
	err = tm.run([]int{50, 50}, func(p, i int) error {
		if p == 1 {
			after.Add(1)
		}
		if p == 0 && i == 0 {
			return boom
		}
		return nil
	})
	if !errors.Is(err, boom) {
		t.Fatalf("error %v, want boom", err)
	}
	if n := after.Load(); n != 0 {
		t.Errorf("%d tasks of the next phase ran after an error", n)
	}
	if err := tm.run(nil, func(int, int) error { return boom }); err != nil {
		t.Errorf("no phases: %v", err)
	}
}
