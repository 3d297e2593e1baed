package kernel_test

import (
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"heedmap/kernel"
	"heedmap/onnx"
	"heedmap/tensor"
)

// convWide computes one image's stride-1 convolution with SgemmWide, in
// slabs of wide columns that start and end anywhere (mid-row, mid-tile),
// and copies the valid columns (ox < OW) into the M×OH·OW output. The
// padded buffer starts as NaN, slack included: no valid column may read a
// value Pad did not write.
func convWide(t *testing.T, gemm *kernel.Packed, plan *kernel.Im2colPlan, x, wt []float32, c, m int, r *rand.Rand) []float32 {
	t.Helper()
	ph, pw := plan.PaddedShape()
	oh, ow := plan.Out()
	padded := make([]float32, c*ph*pw+kernel.WideSlack)
	for i := range padded {
		padded[i] = float32(math.NaN())
	}
	if err := plan.Pad(padded, x, 0, c); err != nil {
		t.Fatal(err)
	}
	kk, _ := plan.Shape()
	nWide := (oh-1)*pw + ow
	y := make([]float32, m*oh*ow)
	nr := gemm.PanelWidth()
	for w0 := 0; w0 < nWide; {
		w1 := min(nWide, w0+1+r.IntN(4*nr))
		ldc := w1 - w0 + r.IntN(3)
		cb := make([]float32, m*ldc)
		if err := gemm.SgemmWide(plan, c, m, wt, kk, padded, w0, w1, cb, ldc); err != nil {
			t.Fatal(err)
		}
		for o := w0; o < w1; o++ {
			oy, ox := o/pw, o%pw
			if ox >= ow {
				continue
			}
			for mo := 0; mo < m; mo++ {
				y[mo*oh*ow+oy*ow+ox] = cb[mo*ldc+o-w0]
			}
		}
		w0 = w1
	}
	return y
}

// TestSgemmWideMatchesPanels checks the wide-grid convolution against the
// packed-panel one (Im2colPanelsPadded + SgemmPanels), bit for bit since
// the accumulation order is the same, and against the ONNX Conv definition
// (directConv) within float rounding, on every GEMM path: row counts that
// end in each kind of edge tile (exact 4 and 8, padded 1, 6 and 11 rows,
// more than one mc block), K over one k block, dilation, no padding.
func TestSgemmWideMatchesPanels(t *testing.T) {
	r := rand.New(rand.NewPCG(21, 22))
	pad1 := kernel.Conv2D{KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}
	cases := []struct {
		c, h, w, m int
		g          kernel.Conv2D
	}{
		{40, 10, 12, 64, pad1}, // K = 360: two k blocks; 64 = 5·12 + 4
		{8, 9, 30, 128, pad1},  // 128 = 10·12 + 8
		{30, 7, 9, 13, pad1},   // one row left: padded 4-row edge
		{5, 6, 33, 30, pad1},   // six rows left: padded 8-row edge
		{3, 5, 8, 23, pad1},    // eleven rows left: padded 12-row tile
		{4, 6, 7, 200, pad1},   // two mc blocks (192 + 8)
		{3, 12, 13, 7, kernel.Conv2D{KH: 3, KW: 3, DilationH: 2, DilationW: 3, PadTop: 2, PadLeft: 3, PadBottom: 1, PadRight: 3}},
		{6, 8, 11, 12, kernel.Conv2D{KH: 5, KW: 2}},
		{2, 3, 3, 5, kernel.Conv2D{KH: 5, KW: 5, PadTop: 2, PadLeft: 2, PadBottom: 2, PadRight: 2}},
	}
	for _, isa := range []kernel.ISA{kernel.ISAPortable, kernel.ISAAVX2, kernel.ISAAVX512} {
		if !kernel.Supported(isa) {
			t.Logf("%v not supported; not tested", isa)
			continue
		}
		gemm, err := kernel.New(kernel.Options{ISA: isa, Threads: 1})
		if err != nil {
			t.Fatal(err)
		}
		nr := gemm.PanelWidth()
		for i, tc := range cases {
			t.Run(fmt.Sprintf("%v/%d", isa, i), func(t *testing.T) {
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
				got := convWide(t, gemm, plan, x, wt, tc.c, tc.m, r)

				ph, pw := plan.PaddedShape()
				padded := make([]float32, tc.c*ph*pw)
				if err := plan.Pad(padded, x, 0, tc.c); err != nil {
					t.Fatal(err)
				}
				panels := make([]float32, (cols+nr-1)/nr*nr*rows)
				if err := plan.Im2colPanelsPadded(panels, padded, 1, tc.c, 0, cols, nr); err != nil {
					t.Fatal(err)
				}
				want := make([]float32, tc.m*cols)
				gemm.SgemmPanels(tc.m, cols, rows, wt, rows, panels, want, cols)
				for k := range want {
					if math.Float32bits(got[k]) != math.Float32bits(want[k]) {
						t.Fatalf("output %d (channel %d) = %v, panel path %v", k, k/cols, got[k], want[k])
					}
				}
				// Higham's bound for a float32 dot product of length K in
				// any order, γ_K·Σ|x||w| with γ_K ≈ K·2⁻²⁴ (Accuracy and
				// Stability of Numerical Algorithms, 2nd ed., §3.1), plus
				// the reference's own rounding.
				def := directConv(x, 1, tc.c, tc.h, tc.w, wt, tc.m, 1, plan.Geometry(), oh, ow)
				mag := directConv(absSlice(x), 1, tc.c, tc.h, tc.w, absSlice(wt), tc.m, 1, plan.Geometry(), oh, ow)
				for k := range def {
					if d := math.Abs(float64(got[k]) - float64(def[k])); d > float64(rows+4)*0x1p-24*float64(mag[k]) {
						t.Fatalf("output %d = %v, ONNX Conv definition %v (|Σ| bound %v)", k, got[k], def[k], mag[k])
					}
				}
			})
		}
	}
}

// TestSgemmWideONNX runs the stride-1, one-group Conv cases of the ONNX
// operator test data (Debian libonnx-testdata, node/test_basic_conv_* and
// node/test_conv_with_*) through SgemmWide, with the ONNX backend test
// tolerances rtol=1e-3, atol=1e-7 (common practice in onnx/backend/test).
func TestSgemmWideONNX(t *testing.T) {
	const root = "/usr/share/libonnx-testdata/data/node"
	var dirs []string
	for _, pat := range []string{"test_basic_conv_with*", "test_conv_with_*"} {
		m, _ := filepath.Glob(filepath.Join(root, pat))
		dirs = append(dirs, m...)
	}
	if len(dirs) == 0 {
		t.Skip("ONNX test data not installed (apt-get install libonnx-testdata)")
	}
	r := rand.New(rand.NewPCG(5, 6))
	ran := 0
	for _, dir := range dirs {
		model, err := onnx.Load(filepath.Join(dir, "model.onnx"))
		if err != nil {
			t.Fatal(err)
		}
		node := model.Graph.Nodes[0]
		if s := node.Ints("strides"); (s != nil && (s[0] != 1 || s[1] != 1)) || node.Int("group", 1) != 1 ||
			node.String("auto_pad", "NOTSET") != "NOTSET" || len(node.Inputs) > 2 {
			continue
		}
		set := filepath.Join(dir, "test_data_set_0")
		entries, err := os.ReadDir(set)
		if err != nil {
			t.Fatal(err)
		}
		var ins []*tensor.Tensor
		var want *tensor.Tensor
		for _, e := range entries {
			v, _, err := onnx.LoadTensor(filepath.Join(set, e.Name()))
			if err != nil {
				t.Fatal(err)
			}
			if strings.HasPrefix(e.Name(), "output_0") {
				want = v
			} else if strings.HasPrefix(e.Name(), "input_") {
				ins = append(ins, v)
			}
		}
		x, w := ins[0], ins[1]
		g := kernel.Conv2D{C: x.Shape[1], H: x.Shape[2], W: x.Shape[3], KH: w.Shape[2], KW: w.Shape[3]}
		if d := node.Ints("dilations"); d != nil {
			g.DilationH, g.DilationW = int(d[0]), int(d[1])
		}
		if p := node.Ints("pads"); p != nil {
			g.PadTop, g.PadLeft, g.PadBottom, g.PadRight = int(p[0]), int(p[1]), int(p[2]), int(p[3])
		}
		plan, err := kernel.NewIm2col(g)
		if err != nil {
			t.Fatal(err)
		}
		for _, isa := range []kernel.ISA{kernel.ISAPortable, kernel.ISAAVX512} {
			if !kernel.Supported(isa) {
				continue
			}
			gemm, _ := kernel.New(kernel.Options{ISA: isa, Threads: 1})
			n, m := x.Shape[0], w.Shape[0]
			chw, ohw := g.C*g.H*g.W, want.Len()/(n*m)
			for b := range n {
				got := convWide(t, gemm, plan, x.F32[b*chw:(b+1)*chw], w.F32, g.C, m, r)
				if err := closeTo(got, want.F32[b*m*ohw:(b+1)*m*ohw], 1e-3, 1e-7); err != nil {
					t.Fatalf("%s %v: %v", filepath.Base(dir), isa, err)
				}
			}
		}
		ran++
	}
	if ran == 0 {
		t.Fatal("no stride-1 Conv case found in the ONNX test data")
	}
	t.Logf("%d ONNX Conv cases", ran)
}

// TestSgemmWideRejects checks the argument errors: a strided plan, a
// padded input without the slack, short weights and output.
func TestSgemmWideRejects(t *testing.T) {
	g := kernel.Conv2D{C: 2, H: 6, W: 6, KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}
	plan, err := kernel.NewIm2col(g)
	if err != nil {
		t.Fatal(err)
	}
	g2 := g
	g2.StrideH, g2.StrideW = 2, 2
	strided, err := kernel.NewIm2col(g2)
	if err != nil {
		t.Fatal(err)
	}
	gemm := kernel.Best()
	ph, pw := plan.PaddedShape()
	padded := make([]float32, 2*ph*pw+kernel.WideSlack)
	wt := make([]float32, 4*18)
	c := make([]float32, 4*46)
	for name, f := range map[string]func() error{
		"strided":   func() error { return gemm.SgemmWide(strided, 2, 4, wt, 18, padded, 0, 40, c, 40) },
		"no slack":  func() error { return gemm.SgemmWide(plan, 2, 4, wt, 18, padded[:2*ph*pw], 0, 46, c, 46) },
		"short A":   func() error { return gemm.SgemmWide(plan, 2, 4, wt[:70], 18, padded, 0, 40, c, 40) },
		"short C":   func() error { return gemm.SgemmWide(plan, 2, 4, wt, 18, padded, 0, 40, c[:150], 40) },
		"bad range": func() error { return gemm.SgemmWide(plan, 2, 4, wt, 18, padded, 10, 5, c, 40) },
	} {
		if err := f(); err == nil {
			t.Errorf("%s: no error", name)
		}
	}
	if err := gemm.SgemmWide(plan, 2, 4, wt, 18, padded, 0, 46, c[:4*46], 46); err != nil {
		t.Errorf("valid call: %v", err)
	}
}

func absSlice(v []float32) []float32 {
	a := make([]float32, len(v))
	for i, x := range v {
		a[i] = float32(math.Abs(float64(x)))
	}
	return a
}
