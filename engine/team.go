package engine

import (
	"runtime"
	"sync"
	"sync/atomic"
	"time"
)

// team runs the phased tasks of a Graph's convolutions on the caller's
// goroutine and helper goroutines that outlive one call. A convolution's
// phases last tens to hundreds of microseconds, about as long as waking a
// parked goroutine on another core takes, so with a fresh helper per call
// the caller did most of the work alone (measured on ResNet-18 forward at
// batch 1: the helper ran 30 % of the tasks, and one goroutine ran alone
// for 43 % of the wall time). A helper that has just finished a job
// therefore spins briefly for the next one before it parks, and a parked
// helper exits after a second without work, so a Graph that is no longer
// used leaves no goroutines behind. The zero team is usable: a nil *team
// starts a fresh helper per call.
type team struct {
	offer    atomic.Pointer[phaseJob] // a job waiting for a spinning helper
	spinning atomic.Int32             // helpers polling offer
	parked   chan *phaseJob           // hands a job to a parked helper
}

// spinFor is how long a helper polls for the next job before parking:
// longer than the gap between two convolutions of a pass (the
// element-wise and pooling nodes between them), short enough that an idle
// Graph stops using the CPU at once.
const spinFor = 200 * time.Microsecond

// parkFor is how long a parked helper waits for a job before it exits.
const parkFor = time.Second

func newTeam() *team { return &team{parked: make(chan *phaseJob)} }

// phaseJob is one run call: the tasks of each phase, claimed in turn.
type phaseJob struct {
	counts   []int
	f        func(phase, t int) error
	next     []atomic.Int64
	done     []atomic.Int64
	failed   atomic.Bool
	mu       sync.Mutex
	firstErr error
	helpers  sync.WaitGroup
}

// run runs the tasks of each phase in turn, f(phase, t) for t <
// counts[phase], on the caller's goroutine and up to GOMAXPROCS−1 helpers:
// every goroutine claims tasks of the current phase until none is left,
// waits until all of them have finished, then moves to the next phase. It
// returns the first error, after which no further task starts.
func (tm *team) run(counts []int, f func(phase, t int) error) error {
	most := 0
	for _, c := range counts {
		most = max(most, c)
	}
	if most == 0 {
		return nil
	}
	j := &phaseJob{counts: counts, f: f, next: make([]atomic.Int64, len(counts)), done: make([]atomic.Int64, len(counts))}
	helpers := min(runtime.GOMAXPROCS(0), most) - 1
	var offered bool
	for h := 0; h < helpers; h++ {
		j.helpers.Add(1)
		switch {
		case tm == nil:
			go func() {
				defer j.helpers.Done()
				j.work()
			}()
		case h == 0 && tm.spinning.Load() > 0 && tm.offer.CompareAndSwap(nil, j):
			offered = true
		default:
			select {
			case tm.parked <- j:
			default:
				go tm.helper(j)
			}
		}
	}
	j.work()
	if offered && tm.offer.CompareAndSwap(j, nil) {
		j.helpers.Done() // no helper took the offer; the caller did it all
	}
	j.helpers.Wait()
	return j.firstErr
}

// helper works on j, then on every job it is given or finds offered,
// spinning spinFor and then parking for up to parkFor between jobs.
func (tm *team) helper(j *phaseJob) {
	for j != nil {
		j.work()
		j.helpers.Done()
		j = tm.next()
	}
}

// next returns the next job for a helper that has just finished one, or
// nil when none came within spinFor + parkFor.
func (tm *team) next() *phaseJob {
	tm.spinning.Add(1)
	deadline := time.Now().Add(spinFor)
	for i := 0; ; i++ {
		if j := tm.offer.Load(); j != nil && tm.offer.CompareAndSwap(j, nil) {
			tm.spinning.Add(-1)
			return j
		}
		if i%64 == 63 && time.Now().After(deadline) {
			break
		}
		runtime.Gosched()
	}
	tm.spinning.Add(-1)
	// An offer made just before the counter dropped is taken back by
	// its caller (run's CompareAndSwap), so nothing is stranded here.
	timer := time.NewTimer(parkFor)
	defer timer.Stop()
	select {
	case j := <-tm.parked:
		return j
	case <-timer.C:
		return nil
	}
}

// work claims tasks phase by phase until none is left.
func (j *phaseJob) work() {
	for p, c := range j.counts {
		for {
			t := int(j.next[p].Add(1) - 1)
			if t >= c {
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
			j.done[p].Add(1)
		}
		for j.done[p].Load() < int64(c) {
			runtime.Gosched() // another goroutine is finishing a task of this phase
		}
	}
}
