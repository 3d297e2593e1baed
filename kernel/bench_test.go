package kernel

import (
	"fmt"
	"math/rand/v2"
	"runtime"
	"testing"

	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/blas32"
)

// benchShapes are square sizes and the im2col GEMMs of ResNet-18's
// convolutions at batch 1 on a 224×224 input: m = output channels,
// k = input channels × kernel area, n = output pixels.
var benchShapes = []struct {
	name    string
	m, n, k int
}{
	{"sq64", 64, 64, 64},
	{"sq256", 256, 256, 256},
	{"sq1024", 1024, 1024, 1024},
	{"r18conv1_m64k147n12544", 64, 12544, 147},
	{"r18layer1_m64k576n3136", 64, 3136, 576},
	{"r18layer2_m128k1152n784", 128, 784, 1152},
	{"r18layer3_m256k2304n196", 256, 196, 2304},
	{"r18layer4_m512k4608n49", 512, 49, 4608},
}

// BenchmarkSgemm runs every path of this package, single- and two-threaded,
// and gonum's blas32.Gemm (its pure-Go SGEMM, which uses its own
// goroutines) on the same operands in the same process, so the GFLOP/s
// columns compare directly. Run with
//
//	go test ./kernel -run '^$' -bench Sgemm -benchtime 1s
func BenchmarkSgemm(b *testing.B) {
	for _, s := range benchShapes {
		r := rand.New(rand.NewPCG(5, 6))
		a, bm, c := newMat(r, s.m, s.k, 0), newMat(r, s.k, s.n, 0), newMat(r, s.m, s.n, 0)
		flops := 2 * float64(s.m) * float64(s.n) * float64(s.k)
		report := func(b *testing.B) {
			b.ReportMetric(flops*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
		}
		for _, isa := range []ISA{ISAPortable, ISAAVX2, ISAAVX512} {
			if !Supported(isa) {
				continue
			}
			for _, th := range []int{1, 2} {
				g, err := New(Options{ISA: isa, Threads: th})
				if err != nil {
					b.Fatal(err)
				}
				b.Run(fmt.Sprintf("%s/%v/t%d", s.name, isa, th), func(b *testing.B) {
					for b.Loop() {
						g.Sgemm(false, false, s.m, s.n, s.k, 1, a.v, a.ld, bm.v, bm.ld, 0, c.v, c.ld)
					}
					report(b)
				})
			}
		}
		b.Run(fmt.Sprintf("%s/gonum/t%d", s.name, runtime.GOMAXPROCS(0)), func(b *testing.B) {
			ga := blas32.General{Rows: s.m, Cols: s.k, Stride: a.ld, Data: a.v}
			gb := blas32.General{Rows: s.k, Cols: s.n, Stride: bm.ld, Data: bm.v}
			gc := blas32.General{Rows: s.m, Cols: s.n, Stride: c.ld, Data: c.v}
			for b.Loop() {
				blas32.Gemm(blas.NoTrans, blas.NoTrans, 1, ga, gb, 0, gc)
			}
			report(b)
		})
	}
}

// BenchmarkMicroKernel measures each path's register-tile kernel alone on
// L1-resident packed panels (kc = 256): the ceiling the blocked GEMM can
// approach on one core.
func BenchmarkMicroKernel(b *testing.B) {
	for _, isa := range []ISA{ISAPortable, ISAAVX2, ISAAVX512} {
		if !Supported(isa) {
			continue
		}
		g, err := New(Options{ISA: isa, Threads: 1})
		if err != nil {
			b.Fatal(err)
		}
		mr, nr, k := g.cfg.mr, g.cfg.nr, g.cfg.kc
		r := rand.New(rand.NewPCG(7, 8))
		a, bp := newMat(r, 1, mr*k, 0).v, newMat(r, 1, nr*k, 0).v
		c := make([]float32, mr*nr)
		b.Run(isa.String(), func(b *testing.B) {
			for b.Loop() {
				g.cfg.kernel(k, a, bp, c, nr, 1, 1, true)
			}
			b.ReportMetric(2*float64(mr*nr*k)*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
		})
	}
}
