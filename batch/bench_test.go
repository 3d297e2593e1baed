package batch

import (
	"context"
	"path/filepath"
	"testing"
)

// BenchmarkRunnerOverhead measures the batch machinery alone: validation
// (header decode and SHA-256 of 12×10 PNGs) and one fsynced, renamed record
// per image, with a worker that does nothing. It bounds the per-image cost
// the batch layer adds to real attribution work.
func BenchmarkRunnerOverhead(b *testing.B) {
	dir := b.TempDir()
	in := folderSet(b, dir, 200)
	noop := WorkerFunc(func(ctx context.Context, it Item, dst Dest) (Result, error) {
		return Result{Metrics: map[string]float64{"x": 1}}, nil
	})
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		p := plan(b, in, Shard{})
		out := filepath.Join(dir, "out", string(rune('a'+i%26)), filepath.Base(b.TempDir()))
		run(b, out, p, noop)
	}
	b.ReportMetric(float64(200*b.N)/b.Elapsed().Seconds(), "img/s")
}
