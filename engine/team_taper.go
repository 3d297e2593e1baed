package engine

// taper cuts [0, n) into contiguous tasks for team.run that shrink from
// both ends toward the middle. The caller claims tasks from the front and
// the helpers from the back (phaseState.claim), so the two meet in the
// middle, on the smallest tasks: a goroutine that runs out of work waits
// at most one small task for the other. With equal tasks (four per core)
// the goroutine that finished first waited up to an eighth of the
// operator, and in per-node timing of a MobileNetV2 batch-1 forward pass
// these waits added up to 0.16–0.47 ms of a 2.8–3.7 ms pass, more when
// other processes took the cores. Each round takes from either end
// ⌈rem/(2·workers)⌉ of the rem units left, at least unit (an
// eighth-per-core share, so a phase still has about as many tasks as
// before and no more claims); the last units go to one or two middle
// tasks. Guided self-scheduling (Polychronopoulos & Kuck, IEEE Trans.
// Computers 36(12), 1987; cited from memory) shrinks its chunks the same
// way from one end.
type taper struct {
	n, workers, unit int
	most             int // largest task (n when uncapped)
	tasks            int
}

// taperPerCore is about how many tasks a core gets; a range of at most
// that many units per core is cut into single units.
const taperPerCore = 4

// newTaper cuts n units for workers goroutines.
func newTaper(n, workers int) taper { return newCappedTaper(n, workers, n) }

// newCappedTaper is newTaper with no task larger than most units (a
// slab that must fit a cache): the ends then take most at a time until
// the rest tapers, and the smallest tasks are at most a quarter of most.
func newCappedTaper(n, workers, most int) taper {
	tp := taper{n: n, workers: max(workers, 1), most: max(most, 1)}
	tp.unit = max(1, min((n+2*taperPerCore*tp.workers-1)/(2*taperPerCore*tp.workers), tp.most/4))
	if n <= 2*taperPerCore*tp.workers {
		tp.unit, tp.most = 1, 1 // every task one unit
	}
	tp.tasks = tp.walk(-1, nil)
	return tp
}

// walk generates the tasks round by round from both ends and returns how
// many there are; when t is one of them it stores t's bounds. Task
// indices are in position order: round k's front task is k, its back
// task tasks−1−k (tasks as counted by a first walk).
func (tp taper) walk(t int, bounds *[2]int) int {
	set := func(i, i0, i1 int) {
		if i == t && bounds != nil {
			bounds[0], bounds[1] = i0, i1
		}
	}
	front, back := 0, tp.n
	for k := 0; ; k++ {
		rem := back - front
		if rem == 0 {
			return 2 * k
		}
		s := min(tp.most, max(tp.unit, (rem+2*tp.workers-1)/(2*tp.workers)))
		if rem < 2*s {
			// One or two middle tasks, none larger than a unit when
			// the halves can be.
			if rem > tp.unit {
				h := rem / 2
				set(k, front, front+h)
				set(k+1, front+h, back)
				return 2*k + 2
			}
			set(k, front, back)
			return 2*k + 1
		}
		set(k, front, front+s)
		set(tp.tasks-1-k, back-s, back)
		front += s
		back -= s
	}
}

// bounds returns task t's units [i0, i1).
func (tp taper) bounds(t int) (i0, i1 int) {
	var b [2]int
	tp.walk(t, &b)
	return b[0], b[1]
}
