package kernel_test

import (
	"math/rand/v2"
	"syscall"
	"testing"

	"heedmap/kernel"
)

// BenchmarkDepthwise3x3 measures one MobileNetV2-style depthwise layer
// (144 channels, 56×56, 3×3, pad 1, stride 1 and 2) in GFLOP/s, counting
// 2·KH·KW per output.
func BenchmarkDepthwise3x3(b *testing.B) {
	for _, stride := range []int{1, 2} {
		b.Run(map[int]string{1: "stride1", 2: "stride2"}[stride], func(b *testing.B) {
			p, err := kernel.NewIm2col(kernel.Conv2D{C: 144, H: 56, W: 56, KH: 3, KW: 3, StrideH: stride, StrideW: stride, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1})
			if err != nil {
				b.Fatal(err)
			}
			oh, ow := p.Out()
			r := rand.New(rand.NewPCG(1, 2))
			x, w := randSlice(r, 144*56*56), randSlice(r, 144*9)
			y := make([]float32, 144*oh*ow)
			b.ResetTimer()
			c0 := cpuSec()
			for i := 0; i < b.N; i++ {
				if err := p.Depthwise(y, x, w, 1); err != nil {
					b.Fatal(err)
				}
			}
			flops := 2 * 9 * float64(len(y)) * float64(b.N)
			b.ReportMetric(flops/b.Elapsed().Seconds()/1e9, "GFLOP/s")
			// Per CPU second, which a loaded machine disturbs less.
			b.ReportMetric(flops/(cpuSec()-c0)/1e9, "GFLOP/cpu-s")
		})
	}
}

func cpuSec() float64 {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return float64(ru.Utime.Nano()+ru.Stime.Nano()) / 1e9
}
