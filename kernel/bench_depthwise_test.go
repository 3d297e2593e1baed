package kernel_test

import (
	"fmt"
	"math/rand/v2"
	"syscall"
	"testing"

	"heedmap/kernel"
)

// dwBenchShapes are MobileNetV2 (3×3) and EfficientNet-B0 (5×5) depthwise
// layers at 224×224 input: channels, input size, kernel, stride.
var dwBenchShapes = []struct {
	c, hw, k, s int
}{
	{32, 112, 3, 1},
	{96, 112, 3, 2},
	{144, 56, 3, 1},
	{144, 56, 3, 2},
	{384, 14, 3, 1},
	{960, 7, 3, 1},
	{240, 28, 5, 1},
	{144, 56, 5, 2},
}

// BenchmarkDepthwiseFused measures the fused depthwise forward (bias and
// ReLU6 applied in the kernel) on each path, over one image's planes.
// GFLOP/s counts 2·KH·KW per output; GB/s counts the compulsory traffic,
// input read once and output written once.
func BenchmarkDepthwiseFused(b *testing.B) {
	for _, sh := range dwBenchShapes {
		pad := sh.k / 2
		p, err := kernel.NewIm2col(kernel.Conv2D{C: 1, H: sh.hw, W: sh.hw, KH: sh.k, KW: sh.k, StrideH: sh.s, StrideW: sh.s, PadTop: pad, PadLeft: pad, PadBottom: pad, PadRight: pad})
		if err != nil {
			b.Fatal(err)
		}
		oh, ow := p.Out()
		r := rand.New(rand.NewPCG(1, 2))
		x, w := randSlice(r, sh.c*sh.hw*sh.hw), randSlice(r, sh.c*sh.k*sh.k)
		y := make([]float32, sh.c*oh*ow)
		ep := kernel.DepthwiseEpilogue{Bias: randSlice(r, sh.c), Lo: 0, Hi: 6}
		scratch := make([]float32, p.DepthwiseScratch())
		for _, isa := range dwISAs() {
			b.Run(fmt.Sprintf("c%d_%dx%d_k%d_s%d/%v", sh.c, sh.hw, sh.hw, sh.k, sh.s, isa), func(b *testing.B) {
				c0 := cpuSec()
				for b.Loop() {
					if err := p.DepthwisePlanesISA(isa, y, x, w, sh.c, 1, 0, sh.c, &ep, scratch); err != nil {
						b.Fatal(err)
					}
				}
				reportDW(b, c0, 2*float64(sh.k*sh.k*len(y)), 4*float64(len(x)+len(y)))
			})
		}
	}
}

// BenchmarkDepthwiseBackward measures the input gradient (the attribution
// case: constant weights) on each path as the engine runs it (the batched
// entry point, dx set rather than added to), with the same counts as the
// forward pass: at stride 2 the kernels also multiply the zeros between
// the spread output gradients (see backwardLayout), which these useful
// FLOP/s do not count.
func BenchmarkDepthwiseBackward(b *testing.B) {
	for _, sh := range dwBenchShapes {
		pad := sh.k / 2
		p, err := kernel.NewIm2col(kernel.Conv2D{C: 1, H: sh.hw, W: sh.hw, KH: sh.k, KW: sh.k, StrideH: sh.s, StrideW: sh.s, PadTop: pad, PadLeft: pad, PadBottom: pad, PadRight: pad})
		if err != nil {
			b.Fatal(err)
		}
		oh, ow := p.Out()
		r := rand.New(rand.NewPCG(1, 2))
		dx, w := make([]float32, sh.c*sh.hw*sh.hw), randSlice(r, sh.c*sh.k*sh.k)
		dy := randSlice(r, sh.c*oh*ow)
		for _, isa := range dwISAs() {
			b.Run(fmt.Sprintf("c%d_%dx%d_k%d_s%d/%v", sh.c, sh.hw, sh.hw, sh.k, sh.s, isa), func(b *testing.B) {
				c0 := cpuSec()
				for b.Loop() {
					if err := p.DepthwiseBackwardPlanesISA(isa, dx, nil, dy, nil, w, 1, sh.c, 1, 0, sh.c, true); err != nil {
						b.Fatal(err)
					}
				}
				reportDW(b, c0, 2*float64(sh.k*sh.k*len(dy)), 4*float64(len(dy)+len(dx)))
			})
		}
	}
}

func reportDW(b *testing.B, c0, flops, bytes float64) {
	n := float64(b.N)
	b.ReportMetric(flops*n/b.Elapsed().Seconds()/1e9, "GFLOP/s")
	b.ReportMetric(bytes*n/b.Elapsed().Seconds()/1e9, "GB/s")
	// Per CPU second, which a loaded machine disturbs less.
	b.ReportMetric(flops*n/(cpuSec()-c0)/1e9, "GFLOP/cpu-s")
}

// BenchmarkDepthwise3x3 measures one MobileNetV2-style depthwise layer
// (144 channels, 56×56, 3×3, pad 1, stride 1 and 2) through the plain
// entry point (which allocates its scratch per call) in GFLOP/s,
// counting 2·KH·KW per output.
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
