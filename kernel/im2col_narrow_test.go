package kernel_test

import (
	"math/rand/v2"
	"testing"

	"heedmap/kernel"
)

// TestIm2colPanelsNarrow checks the padded and phased lowerings into
// panels narrower than the 32-wide micro-kernel tile (the 12- and 4-row
// packed A panels of Packed.SgemmRowPanels, and the 16-wide AVX2 tile),
// on the vector loop and the pure-Go one, against the plain column matrix
// of Im2col (itself checked against ONNX's Conv test data, im2col_test.go).
func TestIm2colPanelsNarrow(t *testing.T) {
	r := rand.New(rand.NewPCG(13, 14))
	for _, g := range []kernel.Conv2D{
		{C: 5, H: 7, W: 7, KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1},
		{C: 3, H: 14, W: 14, KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1},
		{C: 4, H: 13, W: 11, KH: 3, KW: 3, StrideH: 2, StrideW: 2, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1},
		{C: 6, H: 7, W: 9, KH: 1, KW: 1},
	} {
		plan, err := kernel.NewIm2col(g)
		if err != nil {
			t.Fatal(err)
		}
		rows, cols := plan.Shape()
		x := randSlice(r, g.C*g.H*g.W)
		full := make([]float32, rows*cols)
		if err := plan.Im2col(full, x); err != nil {
			t.Fatal(err)
		}
		ph, pw := plan.PaddedShape()
		padded := make([]float32, g.C*ph*pw)
		if err := plan.Pad(padded, x, 0, g.C); err != nil {
			t.Fatal(err)
		}
		phased := make([]float32, g.C*ph*pw)
		if err := plan.PadPhased(phased, x, 0, g.C); err != nil {
			t.Fatal(err)
		}
		for _, nr := range []int{1, 4, 8, 12, 16} {
			for j0 := 0; j0 < cols; {
				j1 := min(cols, j0+1+r.IntN(3*nr))
				np := (j1 - j0 + nr - 1) / nr
				for _, pl := range []*kernel.Im2colPlan{plan, plan.PortableLoops()} {
					for _, lower := range []struct {
						name string
						f    func([]float32) error
					}{
						{"padded", func(d []float32) error { return pl.Im2colPanelsPadded(d, padded, 1, g.C, j0, j1, nr) }},
						{"phased", func(d []float32) error { return pl.Im2colPanelsPhased(d, phased, 1, g.C, j0, j1, nr) }},
					} {
						got := make([]float32, np*rows*nr+5)
						for i := range got {
							got[i] = 99 // every entry of the panels is written; the tail is not
						}
						if err := lower.f(got); err != nil {
							t.Fatal(err)
						}
						if msg := panelsMismatch(got, full, rows, cols, j0, j1, nr, np); msg != "" {
							t.Fatalf("%+v nr=%d %s slab [%d,%d): %s", g, nr, lower.name, j0, j1, msg)
						}
						for i := np * rows * nr; i < len(got); i++ {
							if got[i] != 99 {
								t.Fatalf("%+v nr=%d %s: wrote past the panels at %d", g, nr, lower.name, i)
							}
						}
					}
				}
				j0 = j1
			}
		}
	}
}
