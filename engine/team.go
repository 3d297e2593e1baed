package engine

import (
	"runtime"
	"sync"
	"sync/atomic"
	"time"
)

// team runs the phased tasks of a Graph's convolutions (and the element-wise
// and pooling loops between them) on the caller's goroutine and helper
// goroutines that outlive one call. A convolution's phases last tens to
// hundreds of microseconds, about as long as waking a parked goroutine on
// another core takes, so with a fresh helper per call the caller did most
// of the work alone (measured on ResNet-18 forward at batch 1: the helper
// ran 30 % of the tasks, and one goroutine ran alone for 43 % of the wall
// time). A helper that has just finished a job therefore spins briefly for
// the next one before it parks, and a parked helper exits after a second
// without work, so a Graph that is no longer used leaves no goroutines
// behind. The zero team is usable: a nil *team starts a fresh helper per
// call.
//
// Waiting spins on atomic loads, not runtime.Gosched: every Gosched takes
// the scheduler's global run-queue lock and wakes an idle P, and on a
// machine shared with other processes (a core taken away mid-task leaves
// the other goroutine waiting at a phase barrier) that cost more than half
// of ResNet-18's batch-1 CPU time in runtime lock2/unlock2/findRunnable.
// A spinner still yields to the Go scheduler every yieldEvery so that
// goroutines queued on its P (a splitWork chunk, a GC worker) run, and a
// phase barrier parks on a channel once it has spun barrierSpin.
type team struct {
	offer    atomic.Pointer[phaseJob] // a job waiting for a spinning helper
	spinning atomic.Int32             // helpers polling offer
	parked   chan *phaseJob           // hands a job to a parked helper
	// solo counts the callers that keep every core busy with passes of
	// their own (Graph.eachImage): while it is non-zero, run does all of a
	// job's tasks on its caller and recruits no helper.
	solo atomic.Int32
}

// spinFor is how long a helper polls for the next job before parking:
// longer than the gap between two convolutions of a pass (the
// element-wise and pooling nodes between them), short enough that an idle
// Graph stops using the CPU at once.
const spinFor = 200 * time.Microsecond

// barrierSpin is how long a goroutine that has run out of tasks of a phase
// polls for the others to finish before it parks. Tasks are sized at tens
// of microseconds; a longer wait means the other goroutine lost its core.
const barrierSpin = 50 * time.Microsecond

// yieldEvery is how often a spinning goroutine lets the Go scheduler run
// whatever is queued on its P.
const yieldEvery = 20 * time.Microsecond

// parkFor is how long a parked helper waits for a job before it exits.
const parkFor = time.Second

func newTeam() *team { return &team{parked: make(chan *phaseJob)} }

// phaseJob is one run call: the tasks of each phase, claimed in turn.
type phaseJob struct {
	counts []int
	f      func(phase, t int) error
	phases []phaseState
	// failed is set after the first error; no task starts after it.
	failed   atomic.Bool
	mu       sync.Mutex
	firstErr error
	// taken is set by the helper that accepts an offered job, so the
	// caller knows whether to withdraw the offer.
	taken atomic.Bool
}

// phaseState counts one phase's claimed and finished tasks. A waiter that
// stops spinning parks on a channel it puts in released; the goroutine
// that finishes the phase's last task swaps in closedPhase and closes
// the channel it found, if any. Waiters rarely park, so no channel is
// made for a phase nobody waits on (making one per phase up front was
// part of the time a helper took to join a job).
type phaseState struct {
	// claimed counts the tasks taken from the front (low 32 bits, by the
	// caller) and from the back (high 32 bits, by the helpers).
	claimed  atomic.Uint64
	done     atomic.Int64
	released atomic.Pointer[chan struct{}]
	_        [40]byte // keep the counters of adjacent phases on separate cache lines
}

// closedPhase marks a phaseState whose tasks have all finished.
var closedPhase = new(chan struct{})

// finish is called once a phase's last task has finished: it wakes a
// parked waiter.
func (ps *phaseState) finish() {
	if ch := ps.released.Swap(closedPhase); ch != nil {
		close(*ch)
	}
}

// claim returns the next unclaimed task of a phase of c tasks, or −1 when
// none is left: the caller takes tasks in order from the front, helpers
// from the back. Which goroutine runs which task does not change any
// result, but this keeps each core on one end of a phase's range, and
// the phases of a convolution split their data alike (the padding by
// rows, the lowering by output positions), so a core mostly reads what
// it wrote itself rather than lines held in the other core's cache:
// taking tasks in turn doubled the lowering's time on ResNet-18's 56×56
// layers at batch 1.
func (ps *phaseState) claim(c int, front bool) int {
	for {
		v := ps.claimed.Load()
		f, b := int(uint32(v)), int(v>>32)
		if f+b >= c {
			return -1
		}
		if front {
			if ps.claimed.CompareAndSwap(v, v+1) {
				return f
			}
		} else if ps.claimed.CompareAndSwap(v, v+1<<32) {
			return c - 1 - b
		}
	}
}

// run runs the tasks of each phase in turn, f(phase, t) for t <
// counts[phase], on the caller's goroutine and up to GOMAXPROCS−1 helpers:
// every goroutine claims tasks of the current phase until none is left,
// waits until all of them have finished, then moves to the next phase. It
// returns the first error, after which no further task starts. run returns
// once every task has finished; a helper may still be leaving the job.
func (tm *team) run(counts []int, f func(phase, t int) error) error {
	most := 0
	for _, c := range counts {
		most = max(most, c)
	}
	if most == 0 {
		return nil
	}
	j := &phaseJob{counts: counts, f: f, phases: make([]phaseState, len(counts))}
	helpers := min(runtime.GOMAXPROCS(0), most) - 1
	if tm != nil && tm.solo.Load() > 0 {
		helpers = 0
	}
	for h := 0; h < helpers; h++ {
		switch {
		case tm == nil:
			go j.work(false)
		case h == 0 && tm.spinning.Load() > 0 && tm.offer.CompareAndSwap(nil, j):
			// A spinning helper takes it; if none does before the
			// caller has finished, the caller withdraws it below.
		default:
			select {
			case tm.parked <- j:
			default:
				go tm.helper(j)
			}
		}
	}
	j.work(true)
	if tm != nil {
		tm.offer.CompareAndSwap(j, nil)
	}
	return j.firstErr
}

// helper works on j, then on every job it is given or finds offered,
// spinning spinFor and then parking for up to parkFor between jobs.
func (tm *team) helper(j *phaseJob) {
	for j != nil {
		j.work(false)
		j = tm.next()
	}
}

// next returns the next job for a helper that has just finished one, or
// nil when none came within spinFor + parkFor.
func (tm *team) next() *phaseJob {
	tm.spinning.Add(1)
	start := time.Now()
	lastYield := start
	for i := 0; ; i++ {
		if j := tm.offer.Load(); j != nil && tm.offer.CompareAndSwap(j, nil) {
			tm.spinning.Add(-1)
			return j
		}
		if i%64 == 63 {
			now := time.Now()
			if now.Sub(start) > spinFor {
				break
			}
			if now.Sub(lastYield) > yieldEvery {
				runtime.Gosched()
				lastYield = now
			}
		}
	}
	tm.spinning.Add(-1)
	// An offer made just before the counter dropped is withdrawn by its
	// caller (run's CompareAndSwap) once it has done the work itself, so
	// nothing is stranded here.
	timer := time.NewTimer(parkFor)
	defer timer.Stop()
	select {
	case j := <-tm.parked:
		return j
	case <-timer.C:
		return nil
	}
}

// work claims tasks phase by phase until none is left. The caller waits
// for the last phase to finish; a helper leaves as soon as it finds no
// task to claim in it.
func (j *phaseJob) work(caller bool) {
	for p, c := range j.counts {
		ps := &j.phases[p]
		for {
			t := ps.claim(c, caller)
			if t < 0 {
				break
			}
			if !j.failed.Load() {
				if err := j.f(p, t); err != nil {
					j.mu.Lock()
					if j.firstErr == nil {
						j.firstErr = err
					}
					j.mu.Unlock()
					j.failed.Store(true)
				}
			}
			if ps.done.Add(1) == int64(c) {
				ps.finish()
			}
		}
		if p == len(j.counts)-1 && !caller {
			return
		}
		if c > 0 {
			ps.wait(int64(c))
		}
	}
}

// wait returns once all c tasks of the phase have finished: it polls the
// counter for barrierSpin, then parks until the last task's goroutine
// closes the channel it leaves in released.
func (ps *phaseState) wait(c int64) {
	if ps.done.Load() >= c {
		return
	}
	start := time.Now()
	for i := 0; ; i++ {
		if ps.done.Load() >= c {
			return
		}
		if i%64 == 63 && time.Since(start) > barrierSpin {
			break
		}
	}
	ch := make(chan struct{})
	for {
		switch cur := ps.released.Load(); {
		case cur == closedPhase:
			return
		case cur != nil: // another waiter's channel (several helpers)
			<-*cur
			return
		case ps.released.CompareAndSwap(nil, &ch):
			if ps.done.Load() < c {
				<-ch // finish, still to come, closes it
			}
			return
		}
	}
}
