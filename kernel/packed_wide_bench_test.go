package kernel_test

import (
	"fmt"
	"testing"

	"heedmap/kernel"
)

// BenchmarkConvWide compares, on one core, the two stride-1 convolution
// paths of ResNet-18's 3×3 layers that have maps at least 28 wide: "panels"
// pads the input, lowers each column slab with Im2colPanelsPadded and
// multiplies it with SgemmPanels (the engine's slab path); "wide" pads the
// input once and multiplies each slab of wide columns with SgemmWide, then
// copies its valid columns out. Reported as GFLOP/s of the convolution
// (2·M·K·OH·OW per pass, the discarded wide columns not counted).
func BenchmarkConvWide(b *testing.B) {
	gemm, err := kernel.New(kernel.Options{Threads: 1})
	if err != nil {
		b.Fatal(err)
	}
	nr := gemm.PanelWidth()
	pad1 := kernel.Conv2D{KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}
	for _, tc := range []struct{ c, hw, m int }{{64, 56, 64}, {128, 28, 128}} {
		g := pad1
		g.C, g.H, g.W = tc.c, tc.hw, tc.hw
		plan, err := kernel.NewIm2col(g)
		if err != nil {
			b.Fatal(err)
		}
		kk, cols := plan.Shape()
		oh, ow := plan.Out()
		ph, pw := plan.PaddedShape()
		x := make([]float32, tc.c*tc.hw*tc.hw)
		for i := range x {
			x[i] = float32(i%7) - 3
		}
		wt := make([]float32, tc.m*kk)
		for i := range wt {
			wt[i] = float32(i%5) - 2
		}
		y := make([]float32, tc.m*cols)
		padded := make([]float32, tc.c*ph*pw+kernel.WideSlack)
		flops := 2 * float64(tc.m) * float64(kk) * float64(cols)
		report := func(b *testing.B) {
			b.ReportMetric(flops*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
		}
		name := fmt.Sprintf("%dch%dx%d", tc.c, tc.hw, tc.hw)
		b.Run(name+"/panels", func(b *testing.B) {
			nb := max(nr, min(512, (128<<10)/kk/nr*nr)) // the engine's slab width
			buf := make([]float32, kk*(nb+nr-1)/nr*nr)
			for b.Loop() {
				if err := plan.Pad(padded, x, 0, tc.c); err != nil {
					b.Fatal(err)
				}
				for j0 := 0; j0 < cols; j0 += nb {
					j1 := min(cols, j0+nb)
					if err := plan.Im2colPanelsPadded(buf, padded, 1, tc.c, j0, j1, nr); err != nil {
						b.Fatal(err)
					}
					gemm.SgemmPanels(tc.m, j1-j0, kk, wt, kk, buf, y[j0:], cols)
				}
			}
			report(b)
		})
		for _, rows := range []int{8, 16, 28} {
			b.Run(fmt.Sprintf("%s/wide%d", name, rows), func(b *testing.B) {
				cb := make([]float32, tc.m*rows*pw)
				for b.Loop() {
					if err := plan.Pad(padded, x, 0, tc.c); err != nil {
						b.Fatal(err)
					}
					for r0 := 0; r0 < oh; r0 += rows {
						r1 := min(oh, r0+rows)
						w0, w1 := r0*pw, (r1-1)*pw+ow
						if err := gemm.SgemmWide(plan, tc.c, tc.m, wt, kk, padded, w0, w1, cb, w1-w0); err != nil {
							b.Fatal(err)
						}
						for mo := 0; mo < tc.m; mo++ {
							for r := r0; r < r1; r++ {
								copy(y[mo*cols+r*ow:mo*cols+(r+1)*ow], cb[mo*(w1-w0)+(r-r0)*pw:])
							}
						}
					}
				}
				report(b)
			})
		}
	}
}
