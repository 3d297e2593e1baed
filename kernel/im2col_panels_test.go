package kernel_test

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"heedmap/kernel"
)

// TestIm2colPanelsConv checks the packed-panel lowering end to end: the
// convolution computed slab by slab with Im2colPanels and SgemmPanels
// equals the ONNX Conv definition (directConv), for every GEMM path this
// CPU has (so every panel width), slabs that start and end mid-row and
// widths that leave a partial last panel. It also checks each panel entry
// against the plain column matrix of Im2col, bit for bit.
func TestIm2colPanelsConv(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 4))
	cases := []struct {
		c, h, w, m int
		g          kernel.Conv2D
	}{
		{3, 9, 8, 5, kernel.Conv2D{KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}},
		{4, 11, 10, 13, kernel.Conv2D{KH: 3, KW: 2, StrideH: 2, StrideW: 3, PadTop: 2, PadBottom: 1, PadRight: 3}},
		{2, 12, 13, 3, kernel.Conv2D{KH: 3, KW: 3, DilationH: 2, DilationW: 3, PadTop: 2, PadLeft: 3, PadBottom: 2, PadRight: 3}},
		{3, 40, 37, 14, kernel.Conv2D{KH: 7, KW: 7, StrideH: 2, StrideW: 2, PadTop: 3, PadLeft: 3, PadBottom: 3, PadRight: 3}},
		{16, 30, 30, 25, kernel.Conv2D{KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}},
		{5, 7, 7, 4, kernel.Conv2D{KH: 1, KW: 1, StrideH: 2, StrideW: 2}},
		{2, 3, 3, 2, kernel.Conv2D{KH: 5, KW: 5, PadTop: 2, PadLeft: 2, PadBottom: 2, PadRight: 2}},
	}
	for _, isa := range []kernel.ISA{kernel.ISAPortable, kernel.ISAAVX2, kernel.ISAAVX512} {
		if !kernel.Supported(isa) {
			continue
		}
		gemm, err := kernel.New(kernel.Options{ISA: isa, Threads: 1})
		if err != nil {
			t.Fatal(err)
		}
		nr := gemm.PanelWidth()
		for i, tc := range cases {
			g := tc.g
			g.C, g.H, g.W = tc.c, tc.h, tc.w
			plan, err := kernel.NewIm2col(g)
			if err != nil {
				t.Fatal(err)
			}
			oh, ow := plan.Out()
			rows, cols := plan.Shape()
			x := randSlice(r, tc.c*tc.h*tc.w)
			wt := randSlice(r, tc.m*rows)
			full := make([]float32, rows*cols)
			if err := plan.Im2col(full, x); err != nil {
				t.Fatal(err)
			}
			y := make([]float32, tc.m*cols)
			for j0 := 0; j0 < cols; {
				j1 := min(cols, j0+1+r.IntN(3*nr))
				np := (j1 - j0 + nr - 1) / nr
				panels := make([]float32, np*rows*nr)
				for k := range panels {
					panels[k] = 99 // every entry must be overwritten
				}
				if err := plan.Im2colPanels(panels, x, tc.c, j0, j1, nr); err != nil {
					t.Fatal(err)
				}
				if msg := panelsMismatch(panels, full, rows, cols, j0, j1, nr, np); msg != "" {
					t.Fatalf("%v case %d slab [%d,%d): %s", isa, i, j0, j1, msg)
				}
				// A plan made for one channel serves any channel count.
				g1 := g
				g1.C = 1
				plan1, err := kernel.NewIm2col(g1)
				if err != nil {
					t.Fatal(err)
				}
				again := make([]float32, len(panels))
				if err := plan1.Im2colPanels(again, x, tc.c, j0, j1, nr); err != nil {
					t.Fatal(err)
				}
				for k := range again {
					if again[k] != panels[k] {
						t.Fatalf("%v case %d: one-channel plan differs at %d", isa, i, k)
					}
				}
				// The padded-input lowering writes the same panels, on the
				// vector path and on the pure-Go one.
				ph, pw := plan.PaddedShape()
				// Both start dirty, as a reused buffer does: the
				// padding must be written, not assumed.
				padded := make([]float32, tc.c*ph*pw)
				phased := make([]float32, tc.c*ph*pw)
				for k := range padded {
					padded[k], phased[k] = float32(math.NaN()), float32(math.NaN())
				}
				if err := plan.Pad(padded, x, 0, tc.c); err != nil {
					t.Fatal(err)
				}
				if err := plan.PadPhased(phased, x, 0, tc.c); err != nil {
					t.Fatal(err)
				}
				// Padding by bands of rows, vector and pure-Go, writes
				// the same planes.
				for _, pl := range []*kernel.Im2colPlan{plan, plan.PortableLoops()} {
					for _, want := range []struct {
						f    func(d []float32, r0, r1 int) error
						full []float32
					}{
						{func(d []float32, r0, r1 int) error { return pl.PadRows(d, x, tc.c, r0, r1) }, padded},
						{func(d []float32, r0, r1 int) error { return pl.PadRowsPhased(d, x, tc.c, r0, r1) }, phased},
					} {
						bands := make([]float32, len(want.full))
						for k := range bands {
							bands[k] = float32(math.NaN())
						}
						for _, r := range [][2]int{{0, 1}, {1, ph / 2}, {ph / 2, ph}} {
							if err := want.f(bands, r[0], r[1]); err != nil {
								t.Fatal(err)
							}
						}
						for k := range bands {
							if math.Float32bits(bands[k]) != math.Float32bits(want.full[k]) {
								t.Fatalf("%v case %d: padding by row bands differs at %d: %v, want %v", isa, i, k, bands[k], want.full[k])
							}
						}
					}
				}
				for _, pl := range []*kernel.Im2colPlan{plan, plan.PortableLoops()} {
					for _, lower := range []struct {
						name string
						f    func([]float32) error
					}{
						{"padded", func(d []float32) error { return pl.Im2colPanelsPadded(d, padded, 1, tc.c, j0, j1, nr) }},
						{"phased", func(d []float32) error { return pl.Im2colPanelsPhased(d, phased, 1, tc.c, j0, j1, nr) }},
					} {
						clear(again)
						if err := lower.f(again); err != nil {
							t.Fatal(err)
						}
						for k := range again {
							if again[k] != panels[k] {
								t.Fatalf("%v case %d slab [%d,%d): %s lowering differs at %d: %v, want %v", isa, i, j0, j1, lower.name, k, again[k], panels[k])
							}
						}
					}
				}
				gemm.SgemmPanels(tc.m, j1-j0, rows, wt, rows, panels, y[j0:], cols)
				j0 = j1
			}
			want := directConv(x, 1, tc.c, tc.h, tc.w, wt, tc.m, 1, plan.Geometry(), oh, ow)
			if err := closeTo(y, want, 1e-5, 1e-5); err != nil {
				t.Fatalf("%v case %d: %v", isa, i, err)
			}
		}
	}
}

// TestIm2colPanelsRejects checks the argument errors.
func TestIm2colPanelsRejects(t *testing.T) {
	plan, err := kernel.NewIm2col(kernel.Conv2D{C: 2, H: 5, W: 5, KH: 3, KW: 3})
	if err != nil {
		t.Fatal(err)
	}
	x := make([]float32, 2*5*5)
	buf := make([]float32, 18*32)
	for _, tc := range []struct {
		name       string
		dst, src   []float32
		j0, j1, nr int
	}{
		{"columns out of range", buf, x, 0, 10, 32},
		{"reversed columns", buf, x, 5, 2, 32},
		{"panel width 0", buf, x, 0, 9, 0},
		{"panel width too large", buf, x, 0, 9, 65},
		{"short destination", buf[:10], x, 0, 9, 32},
		{"short image", buf, x[:10], 0, 9, 32},
		{"short image for the channel count", buf, x[:40], 0, 9, 32},
	} {
		if err := plan.Im2colPanels(tc.dst, tc.src, 2, tc.j0, tc.j1, tc.nr); err == nil {
			t.Errorf("%s: no error", tc.name)
		}
	}
	if err := plan.Im2colPanels(buf, x, 0, 0, 9, 32); err == nil {
		t.Error("zero channels: no error")
	}
}

// BenchmarkIm2colPanels lowers the 64-channel 56×56 3×3 layer of a
// ResNet-18 into 32-wide panels, one 512-column slab at a time (the
// engine's slab size for this layer), reporting bytes written per second.
func BenchmarkIm2colPanels(b *testing.B) {
	for _, tc := range []struct {
		name string
		g    kernel.Conv2D
	}{
		{"56x56s1", kernel.Conv2D{C: 64, H: 56, W: 56, KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}},
		{"56x56s2", kernel.Conv2D{C: 64, H: 56, W: 56, KH: 3, KW: 3, StrideH: 2, StrideW: 2, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}},
		{"14x14s1", kernel.Conv2D{C: 256, H: 14, W: 14, KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}},
	} {
		plan, err := kernel.NewIm2col(tc.g)
		if err != nil {
			b.Fatal(err)
		}
		x := make([]float32, tc.g.C*tc.g.H*tc.g.W)
		ph, pw := plan.PaddedShape()
		padded := make([]float32, tc.g.C*ph*pw)
		for _, v := range []struct {
			name  string
			lower func(dst []float32, j0, j1 int) error
		}{
			{"direct", func(dst []float32, j0, j1 int) error { return plan.Im2colPanels(dst, x, tc.g.C, j0, j1, 32) }},
			{"padded", func(dst []float32, j0, j1 int) error {
				return plan.Im2colPanelsPadded(dst, padded, 1, tc.g.C, j0, j1, 32)
			}},
			{"phased", func(dst []float32, j0, j1 int) error {
				return plan.Im2colPanelsPhased(dst, padded, 1, tc.g.C, j0, j1, 32)
			}},
		} {
			lower := v.lower
			b.Run(tc.name+"/"+v.name, func(b *testing.B) {
				rows, cols := plan.Shape()
				const nr = 32
				slab := min(cols, 512)
				dst := make([]float32, rows*(slab+nr-1)/nr*nr)
				b.SetBytes(int64(4 * rows * cols))
				for b.Loop() {
					for j0 := 0; j0 < cols; j0 += slab {
						if err := lower(dst, j0, min(j0+slab, cols)); err != nil {
							b.Fatal(err)
						}
					}
				}
			})
		}
	}
}

// TestIm2colPanelsPaddedBatch checks the several-image form: the panels of
// a batch are those of the images' column matrices side by side, with
// slabs that straddle image boundaries, on the vector and pure-Go paths.
func TestIm2colPanelsPaddedBatch(t *testing.T) {
	r := rand.New(rand.NewPCG(5, 6))
	for _, g := range []kernel.Conv2D{
		{C: 3, H: 6, W: 5, KH: 3, KW: 3},
		{C: 2, H: 9, W: 9, KH: 3, KW: 3, StrideH: 2, StrideW: 2},
		{C: 4, H: 7, W: 6, KH: 1, KW: 1},
		{C: 2, H: 8, W: 40, KH: 2, KW: 3, DilationW: 2},
	} {
		plan, err := kernel.NewIm2col(g)
		if err != nil {
			t.Fatal(err)
		}
		const images, nr = 3, 32
		rows, ohw := plan.Shape()
		x := randSlice(r, images*g.C*g.H*g.W)
		full := make([]float32, images*rows*ohw) // row-major rows × images·ohw
		one := make([]float32, rows*ohw)
		for i := 0; i < images; i++ {
			if err := plan.Im2col(one, x[i*g.C*g.H*g.W:]); err != nil {
				t.Fatal(err)
			}
			for row := 0; row < rows; row++ {
				copy(full[row*images*ohw+i*ohw:], one[row*ohw:(row+1)*ohw])
			}
		}
		cols := images * ohw
		for j0 := 0; j0 < cols; {
			j1 := min(cols, j0+1+r.IntN(2*nr))
			np := (j1 - j0 + nr - 1) / nr
			for _, pl := range []*kernel.Im2colPlan{plan, plan.PortableLoops()} {
				got := make([]float32, np*rows*nr)
				if err := pl.Im2colPanelsPadded(got, x, images, g.C, j0, j1, nr); err != nil {
					t.Fatal(err)
				}
				if msg := panelsMismatch(got, full, rows, cols, j0, j1, nr, np); msg != "" {
					t.Fatalf("%+v slab [%d,%d): %s", g, j0, j1, msg)
				}
			}
			j0 = j1
		}
	}
}

// panelsMismatch describes the first entry of np panels of rows × nr
// values that is not the column matrix full (cols columns) at columns j0 +
// q·nr + j, or 0 past j1; "" when every entry matches.
func panelsMismatch(panels, full []float32, rows, cols, j0, j1, nr, np int) string {
	for q := 0; q < np; q++ {
		for row := 0; row < rows; row++ {
			for j := 0; j < nr; j++ {
				var want float32
				if col := j0 + q*nr + j; col < j1 {
					want = full[row*cols+col]
				}
				if got := panels[(q*rows+row)*nr+j]; got != want {
					return fmt.Sprintf("panel %d entry (%d,%d) = %v, want %v", q, row, j, got, want)
				}
			}
		}
	}
	return ""
}
