package engine

import "runtime"

// splitMinWork is the least work (in the caller's units, about one
// multiply-add or one value moved) worth sharing with a helper: a spinning
// helper takes a job within a microsecond, a parked one in tens.
const splitMinWork = 1 << 15

// split runs f over [0, n) in contiguous chunks on the team: about four
// chunks per core, shrinking toward the middle of the range (taper), each
// claimed by whichever goroutine is free, so a core that loses its time
// slice to another process does fewer chunks instead of holding up the
// call (a fixed half each, as splitWork gives, waits for
// the slower core). Small jobs (work below splitMinWork) run on the caller
// alone. A nil team starts fresh goroutines, as splitWork does.
func (tm *team) split(n, work int, f func(i0, i1 int)) {
	workers := runtime.GOMAXPROCS(0)
	if workers <= 1 || n <= 1 || work < splitMinWork {
		if n > 0 {
			f(0, n)
		}
		return
	}
	tp := newTaper(n, workers)
	tm.run([]int{tp.tasks}, func(_, t int) error {
		f(tp.bounds(t))
		return nil
	})
}

// Run runs task(0) … task(tasks−1) on the team (kernel.Runner), so a
// packed GEMM's slabs use the team's helpers instead of goroutines it
// would start per call.
func (tm *team) Run(tasks int, task func(t int)) {
	tm.run([]int{tasks}, func(_, t int) error {
		task(t)
		return nil
	})
}
