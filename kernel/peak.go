package kernel

import (
	"context"
	"fmt"
	"sync"
	"time"
)

// MeasurePeak runs the register-only FMA loop of isa (the same loop as
// BenchmarkPeak) on threads goroutines at once for about d and returns the
// float32 rate achieved, in GFLOP/s, counting an FMA lane as two
// operations. On a shared machine it is the ceiling the GEMM and whole
// networks should be compared with in the same run, rather than a datasheet
// peak: it moves with the load just as they do. It fails for ISAs without
// such a loop (the portable path) or not supported by this CPU.
func MeasurePeak(ctx context.Context, isa ISA, threads int, d time.Duration) (float64, error) {
	run, flopsPerIter, ok := peakLoop(isa)
	if !ok || !Supported(isa) {
		return 0, fmt.Errorf("kernel: no FMA peak loop for %v on this CPU/GOARCH", isa)
	}
	if threads < 1 {
		return 0, fmt.Errorf("kernel: MeasurePeak threads must be >= 1, got %d", threads)
	}
	// Short calls so every goroutine stops close to the deadline; the
	// per-call overhead is a few ns against ~10 µs of FMAs.
	const iters = 4096
	start := time.Now()
	deadline := start.Add(d)
	counts := make([]int, threads)
	var wg sync.WaitGroup
	for t := range threads {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for ctx.Err() == nil && time.Now().Before(deadline) {
				run(iters)
				counts[t]++
			}
		}()
	}
	wg.Wait()
	if err := ctx.Err(); err != nil {
		return 0, err
	}
	total := 0
	for _, c := range counts {
		total += c
	}
	return flopsPerIter * iters * float64(total) / time.Since(start).Seconds() / 1e9, nil
}
