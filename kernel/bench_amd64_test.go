package kernel

import "testing"

// BenchmarkPeak measures the register-only FMA rate of one core at the
// moment (see asmgen genPeak): on a shared machine, compare the other
// benchmarks with this figure from the same run rather than with a
// datasheet peak.
func BenchmarkPeak(b *testing.B) {
	const iters = 1000
	for _, p := range []struct {
		isa   ISA
		flops float64 // per iteration
		run   func(int)
	}{
		{ISAAVX2, 12 * 16, fmaPeakAVX2},
		{ISAAVX512, 24 * 32, fmaPeakAVX512},
	} {
		if !Supported(p.isa) {
			continue
		}
		b.Run(p.isa.String(), func(b *testing.B) {
			for b.Loop() {
				p.run(iters)
			}
			b.ReportMetric(p.flops*iters*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
		})
	}
}
