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

// directConv is the ONNX Conv operator's definition written out as loops
// (onnx/docs/Operators.md, Conv): for image n and output channel m in
// group gi,
//
//	Y[n,m,oh,ow] = Σ_{c<Cg,kh,kw} X[n, gi·Cg+c, oh·sh−pt+kh·dh, ow·sw−pl+kw·dw]·W[m,c,kh,kw]
//
// with X zero outside the image, accumulated in float64.
func directConv(x []float32, n, c, h, w int, wt []float32, m, group int, g kernel.Conv2D, oh, ow int) []float32 {
	cg, mg := c/group, m/group
	y := make([]float32, n*m*oh*ow)
	for b := 0; b < n; b++ {
		for mo := 0; mo < m; mo++ {
			gi := mo / mg
			for i := 0; i < oh; i++ {
				for j := 0; j < ow; j++ {
					var s float64
					for ci := 0; ci < cg; ci++ {
						for kh := 0; kh < g.KH; kh++ {
							for kw := 0; kw < g.KW; kw++ {
								ih := i*g.StrideH - g.PadTop + kh*g.DilationH
								iw := j*g.StrideW - g.PadLeft + kw*g.DilationW
								if ih < 0 || ih >= h || iw < 0 || iw >= w {
									continue
								}
								xv := x[((b*c+gi*cg+ci)*h+ih)*w+iw]
								wv := wt[((mo*cg+ci)*g.KH+kh)*g.KW+kw]
								s += float64(xv) * float64(wv)
							}
						}
					}
					y[((b*m+mo)*oh+i)*ow+j] = float32(s)
				}
			}
		}
	}
	return y
}

// convViaIm2col is how an operator lowers Conv: per image and group, one
// im2col and one GEMM Yg = Wg·col.
func convViaIm2col(t *testing.T, gemm kernel.GEMM, x []float32, n, c, h, w int, wt []float32, m, group int, g kernel.Conv2D) ([]float32, int, int) {
	t.Helper()
	cg, mg := c/group, m/group
	g.C, g.H, g.W = cg, h, w
	p, err := kernel.NewIm2col(g)
	if err != nil {
		t.Fatal(err)
	}
	oh, ow := p.Out()
	kk, ohw := p.Shape()
	col := make([]float32, kk*ohw)
	y := make([]float32, n*m*ohw)
	for b := 0; b < n; b++ {
		for gi := 0; gi < group; gi++ {
			xg := x[(b*c+gi*cg)*h*w : (b*c+(gi+1)*cg)*h*w]
			if err := p.Im2col(col, xg); err != nil {
				t.Fatal(err)
			}
			yg := y[(b*m+gi*mg)*ohw : (b*m+(gi+1)*mg)*ohw]
			gemm.Sgemm(false, false, mg, ohw, kk, 1, wt[gi*mg*kk:(gi+1)*mg*kk], kk, col, ohw, 0, yg, ohw)
		}
	}
	return y, oh, ow
}

func randSlice(r *rand.Rand, n int) []float32 {
	v := make([]float32, n)
	for i := range v {
		v[i] = float32(r.NormFloat64())
	}
	return v
}

func TestIm2colMatchesDirectConv(t *testing.T) {
	r := rand.New(rand.NewPCG(7, 8))
	cases := []struct {
		n, c, h, w, m, group int
		g                    kernel.Conv2D
	}{
		{1, 3, 7, 7, 4, 1, kernel.Conv2D{KH: 3, KW: 3}},
		{2, 3, 9, 8, 5, 1, kernel.Conv2D{KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}},
		{1, 4, 11, 10, 6, 2, kernel.Conv2D{KH: 3, KW: 2, StrideH: 2, StrideW: 3, PadTop: 2, PadLeft: 0, PadBottom: 1, PadRight: 3}},
		{1, 2, 12, 13, 3, 1, kernel.Conv2D{KH: 3, KW: 3, DilationH: 2, DilationW: 3, PadTop: 2, PadLeft: 3, PadBottom: 2, PadRight: 3}},
		{1, 6, 8, 8, 6, 6, kernel.Conv2D{KH: 3, KW: 3, StrideH: 2, StrideW: 2, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}},
		{1, 3, 16, 16, 8, 1, kernel.Conv2D{KH: 7, KW: 7, StrideH: 2, StrideW: 2, PadTop: 3, PadLeft: 3, PadBottom: 3, PadRight: 3}},
		{1, 8, 5, 5, 4, 1, kernel.Conv2D{KH: 1, KW: 1}},
		{1, 2, 3, 3, 2, 1, kernel.Conv2D{KH: 5, KW: 5, PadTop: 2, PadLeft: 2, PadBottom: 2, PadRight: 2}}, // kernel wider than image
		{1, 1, 4, 4, 1, 1, kernel.Conv2D{KH: 2, KW: 2, StrideH: 5, StrideW: 5, PadTop: 4, PadLeft: 4, PadBottom: 4, PadRight: 4}},
	}
	for i, tc := range cases {
		x := randSlice(r, tc.n*tc.c*tc.h*tc.w)
		wt := randSlice(r, tc.m*(tc.c/tc.group)*tc.g.KH*tc.g.KW)
		for _, gemm := range []kernel.GEMM{kernel.Naive{}, kernel.Best()} {
			got, oh, ow := convViaIm2col(t, gemm, x, tc.n, tc.c, tc.h, tc.w, wt, tc.m, tc.group, tc.g)
			g := tc.g
			for _, v := range []*int{&g.StrideH, &g.StrideW, &g.DilationH, &g.DilationW} {
				if *v == 0 {
					*v = 1
				}
			}
			// Output size from the ONNX Conv shape formula.
			wantOH := (tc.h+g.PadTop+g.PadBottom-((g.KH-1)*g.DilationH+1))/g.StrideH + 1
			wantOW := (tc.w+g.PadLeft+g.PadRight-((g.KW-1)*g.DilationW+1))/g.StrideW + 1
			if oh != wantOH || ow != wantOW {
				t.Fatalf("case %d: output %dx%d, want %dx%d", i, oh, ow, wantOH, wantOW)
			}
			want := directConv(x, tc.n, tc.c, tc.h, tc.w, wt, tc.m, tc.group, g, oh, ow)
			if err := closeTo(got, want, 1e-5, 1e-5); err != nil {
				t.Fatalf("case %d (%T): %v", i, gemm, err)
			}
		}
	}
}

func closeTo(got, want []float32, rtol, atol float64) error {
	if len(got) != len(want) {
		return fmt.Errorf("got %d values, want %d", len(got), len(want))
	}
	for i := range got {
		d := math.Abs(float64(got[i]) - float64(want[i]))
		if !(d <= atol+rtol*math.Abs(float64(want[i]))) {
			return fmt.Errorf("value %d = %v, want %v", i, got[i], want[i])
		}
	}
	return nil
}

// TestCol2imIsAdjoint checks ⟨im2col(x), y⟩ = ⟨x, col2im(y)⟩, the
// definition of the transpose of a linear map, which is what makes Col2im
// the input gradient of the lowered convolution.
func TestCol2imIsAdjoint(t *testing.T) {
	r := rand.New(rand.NewPCG(9, 10))
	for _, g := range []kernel.Conv2D{
		{C: 3, H: 9, W: 8, KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1},
		{C: 2, H: 11, W: 10, KH: 3, KW: 2, StrideH: 2, StrideW: 3, DilationH: 2, PadTop: 2, PadBottom: 1, PadRight: 3},
		{C: 1, H: 5, W: 5, KH: 1, KW: 1},
	} {
		p, err := kernel.NewIm2col(g)
		if err != nil {
			t.Fatal(err)
		}
		rows, cols := p.Shape()
		x := randSlice(r, g.C*g.H*g.W)
		y := randSlice(r, rows*cols)
		col := make([]float32, rows*cols)
		if err := p.Im2col(col, x); err != nil {
			t.Fatal(err)
		}
		back := make([]float32, len(x))
		if err := p.Col2im(back, y); err != nil {
			t.Fatal(err)
		}
		var lhs, rhs, abs float64
		for i := range col {
			lhs += float64(col[i]) * float64(y[i])
			abs += math.Abs(float64(col[i]) * float64(y[i]))
		}
		for i := range x {
			rhs += float64(x[i]) * float64(back[i])
		}
		// Col2im sums at most KH·KW terms per pixel in float32, so each
		// pixel is off by at most KH·KW·u·Σ|terms| (u = 2⁻²⁴); summed over
		// pixels against |x| that is KH·KW·u·Σ|col·y|.
		if math.Abs(lhs-rhs) > float64(g.KH*g.KW+1)*0x1p-24*abs {
			t.Errorf("%+v: <im2col x, y> = %v, <x, col2im y> = %v", g, lhs, rhs)
		}
	}
}

// col2imReference plans g, draws a random column matrix y and returns the
// pure-Go Col2im of y added onto a copy of init: the reference for the
// vector path and for the split forms.
func col2imReference(t *testing.T, r *rand.Rand, g kernel.Conv2D, init []float32) (p *kernel.Im2colPlan, y, want []float32) {
	t.Helper()
	p, err := kernel.NewIm2col(g)
	if err != nil {
		t.Fatal(err)
	}
	rows, cols := p.Shape()
	y = randSlice(r, rows*cols)
	want = append([]float32(nil), init...)
	if err := p.PortableLoops().Col2im(want, y); err != nil {
		t.Fatal(err)
	}
	return p, y, want
}

// TestCol2imRowsMatchesCol2im checks that Col2imRows over any division of
// the image rows, on the vector path (kernel.AddStride2 at column stride
// 2), gives the pure-Go Col2im's result bit for bit (the row ranges only
// partition the work; each position still sums its entries in tap order)
// and touches nothing outside its rows.
func TestCol2imRowsMatchesCol2im(t *testing.T) {
	r := rand.New(rand.NewPCG(19, 20))
	for _, g := range []kernel.Conv2D{
		{C: 3, H: 16, W: 16, KH: 7, KW: 7, StrideH: 2, StrideW: 2, PadTop: 3, PadLeft: 3, PadBottom: 3, PadRight: 3},
		{C: 2, H: 40, W: 75, KH: 3, KW: 3, StrideH: 2, StrideW: 2, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1},
		{C: 2, H: 11, W: 10, KH: 3, KW: 2, StrideH: 2, StrideW: 3, DilationH: 2, PadTop: 2, PadBottom: 1, PadRight: 3},
		{C: 2, H: 9, W: 7, KH: 3, KW: 3, StrideH: 3, StrideW: 1, PadTop: 1, PadBottom: 2},
	} {
		init := randSlice(r, g.C*g.H*g.W)
		p, y, want := col2imReference(t, r, g, init)
		for _, cuts := range [][]int{{0, g.H}, {0, 1, g.H}, {0, 3, 4, 8, g.H}, {0, g.H - 1, g.H}} {
			got := append([]float32(nil), init...)
			for i := 0; i+1 < len(cuts); i++ {
				if err := p.Col2imRows(got, y, cuts[i], cuts[i+1]); err != nil {
					t.Fatal(err)
				}
			}
			for i := range got {
				if math.Float32bits(got[i]) != math.Float32bits(want[i]) {
					t.Fatalf("%+v, rows cut at %v: value %d = %v, Col2im %v", g, cuts, i, got[i], want[i])
				}
			}
		}
		// One range alone leaves every other row as it was.
		got := append([]float32(nil), init...)
		if err := p.Col2imRows(got, y, 2, 5); err != nil {
			t.Fatal(err)
		}
		for i := range got {
			if y := i / g.W % g.H; (y < 2 || y >= 5) && got[i] != init[i] {
				t.Fatalf("%+v: rows [2, 5) changed value %d (row %d)", g, i, y)
			}
		}
	}
}

// TestCol2imOutRows checks the banded form: one band of every output row
// is Col2im bit for bit, and bands of a few rows, each given only its
// columns, sum to Col2im's result up to the order of the float32 sums
// (within KH·KW roundings of the float64 sum of the same entries).
func TestCol2imOutRows(t *testing.T) {
	r := rand.New(rand.NewPCG(21, 22))
	for _, g := range []kernel.Conv2D{
		{C: 3, H: 23, W: 20, KH: 7, KW: 7, StrideH: 2, StrideW: 2, PadTop: 3, PadLeft: 3, PadBottom: 3, PadRight: 3},
		{C: 2, H: 11, W: 10, KH: 3, KW: 2, StrideH: 2, StrideW: 3, DilationH: 2, PadTop: 2, PadBottom: 1, PadRight: 3},
	} {
		p, y, want := col2imReference(t, r, g, make([]float32, g.C*g.H*g.W))
		rows, cols := p.Shape()
		dw := max(g.DilationW, 1)
		ow := (g.W+g.PadLeft+g.PadRight-((g.KW-1)*dw+1))/g.StrideW + 1
		oh := cols / ow
		// The same entries summed in float64, and their magnitudes.
		exact, mag := make([]float64, len(want)), make([]float64, len(want))
		for k, v := range y {
			e := make([]float32, rows*cols)
			e[k] = 1
			one := make([]float32, len(want))
			if err := p.PortableLoops().Col2im(one, e); err != nil {
				t.Fatal(err)
			}
			for i, u := range one {
				if u != 0 {
					exact[i] += float64(v)
					mag[i] += math.Abs(float64(v))
				}
			}
		}
		band := func(dst []float32, oh0, oh1 int) {
			sub := make([]float32, rows*(oh1-oh0)*ow)
			for k := 0; k < rows; k++ {
				copy(sub[k*(oh1-oh0)*ow:], y[k*cols+oh0*ow:k*cols+oh1*ow])
			}
			if err := p.Col2imOutRows(dst, sub, oh0, oh1); err != nil {
				t.Fatal(err)
			}
		}
		whole := make([]float32, len(want))
		band(whole, 0, oh)
		for i := range whole {
			if math.Float32bits(whole[i]) != math.Float32bits(want[i]) {
				t.Fatalf("%+v: one band differs from Col2im at %d: %v, want %v", g, i, whole[i], want[i])
			}
		}
		banded := make([]float32, len(want))
		for oh0 := 0; oh0 < oh; oh0 += 3 {
			band(banded, oh0, min(oh0+3, oh))
		}
		for i := range banded {
			if d := math.Abs(float64(banded[i]) - exact[i]); d > float64(g.KH*g.KW)*0x1p-24*mag[i] {
				t.Fatalf("%+v: banded value %d = %v, float64 sum %v", g, i, banded[i], exact[i])
			}
		}
	}
}

func TestIm2colRejectsBadInput(t *testing.T) {
	for _, g := range []kernel.Conv2D{
		{C: 0, H: 4, W: 4, KH: 3, KW: 3},
		{C: 1, H: 2, W: 4, KH: 3, KW: 3},
		{C: 1, H: 4, W: 4, KH: 3, KW: 3, PadTop: -1},
		{C: 1, H: 4, W: 4, KH: 3, KW: 3, StrideW: -2},
	} {
		if _, err := kernel.NewIm2col(g); err == nil {
			t.Errorf("%+v accepted", g)
		}
	}
	p, err := kernel.NewIm2col(kernel.Conv2D{C: 1, H: 4, W: 4, KH: 3, KW: 3})
	if err != nil {
		t.Fatal(err)
	}
	if err := p.Im2col(make([]float32, 35), make([]float32, 16)); err == nil {
		t.Error("short column buffer accepted")
	}
	if err := p.Im2col(make([]float32, 36), make([]float32, 15)); err == nil {
		t.Error("short image accepted")
	}
}

// TestIm2colONNXConformance runs Im2col + GEMM on ONNX's own Conv test
// cases (Debian package libonnx-testdata: node/test_*conv* and
// pytorch-converted/test_Conv2d*) and compares with their expected outputs
// using the ONNX backend test tolerances rtol=1e-3, atol=1e-7 (common
// practice in onnx/backend/test).
func TestIm2colONNXConformance(t *testing.T) {
	const root = "/usr/share/libonnx-testdata/data"
	var dirs []string
	for _, pat := range []string{"node/test_basic_conv_with*", "node/test_conv_with_*", "pytorch-converted/test_Conv2d*"} {
		m, _ := filepath.Glob(filepath.Join(root, pat))
		dirs = append(dirs, m...)
	}
	if len(dirs) == 0 {
		t.Skip("ONNX test data not installed (apt-get install libonnx-testdata)")
	}
	for _, dir := range dirs {
		t.Run(filepath.Base(dir), func(t *testing.T) {
			runONNXConv(t, dir)
		})
	}
}

func runONNXConv(t *testing.T, dir string) {
	model, err := onnx.Load(filepath.Join(dir, "model.onnx"))
	if err != nil {
		t.Fatal(err)
	}
	if len(model.Graph.Nodes) != 1 || model.Graph.Nodes[0].OpType != "Conv" {
		t.Skipf("%s: not a single Conv node", dir)
	}
	node := model.Graph.Nodes[0]
	inputs := map[string]*tensor.Tensor{}
	for name, v := range model.Graph.Initializers {
		inputs[name] = v
	}
	set := filepath.Join(dir, "test_data_set_0")
	entries, err := os.ReadDir(set)
	if err != nil {
		t.Fatal(err)
	}
	var want *tensor.Tensor
	var fed []*tensor.Tensor
	for _, e := range entries {
		v, _, err := onnx.LoadTensor(filepath.Join(set, e.Name()))
		if err != nil {
			t.Fatal(err)
		}
		switch {
		case strings.HasPrefix(e.Name(), "output_0"):
			want = v
		case strings.HasPrefix(e.Name(), "input_"):
			fed = append(fed, v) // ReadDir sorts by name: input_0, input_1, ...
		}
	}
	// Graph inputs that are not initializers are fed in order.
	i := 0
	for _, in := range model.Graph.Inputs {
		if _, ok := inputs[in.Name]; ok {
			continue
		}
		if i >= len(fed) {
			t.Fatalf("no data for input %s", in.Name)
		}
		inputs[in.Name] = fed[i]
		i++
	}
	x, w := inputs[node.Inputs[0]], inputs[node.Inputs[1]]
	if len(x.Shape) != 4 {
		t.Skipf("%d-D input", len(x.Shape)-2)
	}
	n, c, h, wd := x.Shape[0], x.Shape[1], x.Shape[2], x.Shape[3]
	m, kh, kw := w.Shape[0], w.Shape[2], w.Shape[3]
	group := int(node.Int("group", 1))
	g := kernel.Conv2D{KH: kh, KW: kw, StrideH: 1, StrideW: 1, DilationH: 1, DilationW: 1}
	if s := node.Ints("strides"); s != nil {
		g.StrideH, g.StrideW = int(s[0]), int(s[1])
	}
	if d := node.Ints("dilations"); d != nil {
		g.DilationH, g.DilationW = int(d[0]), int(d[1])
	}
	if p := node.Ints("pads"); p != nil { // ONNX order: begins then ends
		g.PadTop, g.PadLeft, g.PadBottom, g.PadRight = int(p[0]), int(p[1]), int(p[2]), int(p[3])
	}
	switch ap := node.String("auto_pad", "NOTSET"); ap {
	case "SAME_UPPER", "SAME_LOWER":
		// ONNX: output = ceil(in/stride), total pad split evenly, the odd
		// one at the end (UPPER) or the beginning (LOWER).
		same := func(in, k, s, d int) (lo, hi int) {
			out := (in + s - 1) / s
			total := max(0, (out-1)*s+(k-1)*d+1-in)
			if ap == "SAME_UPPER" {
				return total / 2, total - total/2
			}
			return total - total/2, total / 2
		}
		g.PadTop, g.PadBottom = same(h, kh, g.StrideH, g.DilationH)
		g.PadLeft, g.PadRight = same(wd, kw, g.StrideW, g.DilationW)
	case "NOTSET", "VALID":
	default:
		t.Fatalf("auto_pad %q", ap)
	}
	got, oh, ow := convViaIm2col(t, kernel.Best(), x.F32, n, c, h, wd, w.F32, m, group, g)
	if len(node.Inputs) > 2 && node.Inputs[2] != "" {
		bias := inputs[node.Inputs[2]].F32
		for b := 0; b < n; b++ {
			for mo := 0; mo < m; mo++ {
				row := got[(b*m+mo)*oh*ow : (b*m+mo+1)*oh*ow]
				for j := range row {
					row[j] += bias[mo]
				}
			}
		}
	}
	if fmt.Sprint(want.Shape) != fmt.Sprint([]int{n, m, oh, ow}) {
		t.Fatalf("output shape %v, want %v", []int{n, m, oh, ow}, want.Shape)
	}
	if err := closeTo(got, want.F32, 1e-3, 1e-7); err != nil {
		t.Fatal(err)
	}
	if group != c {
		return
	}
	// Depthwise cases also go through the direct depthwise kernel.
	g.C, g.H, g.W = c, h, wd
	p, err := kernel.NewIm2col(g)
	if err != nil {
		t.Fatal(err)
	}
	dw := make([]float32, n*m*oh*ow)
	for b := 0; b < n; b++ {
		img := x.F32[b*c*h*wd : (b+1)*c*h*wd]
		out := dw[b*m*oh*ow : (b+1)*m*oh*ow]
		if err := p.Depthwise(out, img, w.F32, m/c); err != nil {
			t.Fatal(err)
		}
		if len(node.Inputs) > 2 && node.Inputs[2] != "" {
			for mo, bv := range inputs[node.Inputs[2]].F32 {
				for j := range oh * ow {
					out[mo*oh*ow+j] += bv
				}
			}
		}
	}
	if err := closeTo(dw, want.F32, 1e-3, 1e-7); err != nil {
		t.Fatalf("Depthwise: %v", err)
	}
}

// TestDepthwiseMatchesDirectConv compares Depthwise with the ONNX Conv
// definition at group = C, with channel multipliers 1 and 3.
func TestDepthwiseMatchesDirectConv(t *testing.T) {
	r := rand.New(rand.NewPCG(11, 12))
	for i, tc := range append(dwBaseCases[:len(dwBaseCases):len(dwBaseCases)], []dwCase{
		// Three-tap rows (the fused row loop): dilated, strided, and
		// narrower than the filter span.
		{2, 9, 14, 1, kernel.Conv2D{KH: 3, KW: 3, StrideW: 2, DilationW: 2, PadTop: 1, PadLeft: 2, PadBottom: 1, PadRight: 2}},
		{2, 4, 2, 2, kernel.Conv2D{KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}},
		{3, 7, 8, 1, kernel.Conv2D{KH: 1, KW: 3, PadLeft: 1, PadRight: 1}},
		{2, 5, 57, 1, kernel.Conv2D{KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}},
	}...) {
		p, g, oh, ow, m := tc.plan(t)
		x := randSlice(r, tc.c*tc.h*tc.w)
		w := randSlice(r, m*g.KH*g.KW)
		got := make([]float32, m*oh*ow)
		for j := range got {
			got[j] = float32(math.NaN()) // dst is overwritten, not accumulated
		}
		want := directConv(x, 1, tc.c, tc.h, tc.w, w, m, tc.c, g, oh, ow)
		// The plan as used (SIMD rows where the CPU has them) and the
		// pure-Go loops.
		for _, pp := range []*kernel.Im2colPlan{p, p.PortableLoops()} {
			if err := pp.Depthwise(got, x, w, tc.mult); err != nil {
				t.Fatal(err)
			}
			if err := closeTo(got, want, 1e-5, 1e-5); err != nil {
				t.Fatalf("case %d: %v", i, err)
			}
		}
	}
	p, _ := kernel.NewIm2col(kernel.Conv2D{C: 2, H: 4, W: 4, KH: 3, KW: 3})
	if err := p.Depthwise(make([]float32, 8), make([]float32, 32), make([]float32, 18), 1); err != nil {
		t.Fatal(err)
	}
	if err := p.Depthwise(make([]float32, 8), make([]float32, 32), make([]float32, 17), 1); err == nil {
		t.Error("short weights accepted")
	}
	if err := p.Depthwise(make([]float32, 8), make([]float32, 32), make([]float32, 18), 0); err == nil {
		t.Error("multiplier 0 accepted")
	}
}

// TestIm2colColsMatchesIm2col checks every column slab against the
// corresponding columns of the whole column matrix (which
// TestIm2colMatchesDirectConv checks against the ONNX Conv definition).
func TestIm2colColsMatchesIm2col(t *testing.T) {
	for i, g := range []kernel.Conv2D{
		{C: 3, H: 9, W: 9, KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1},
		{C: 2, H: 12, W: 11, KH: 3, KW: 3, StrideH: 2, StrideW: 2, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1},
		{C: 2, H: 10, W: 13, KH: 5, KW: 3, StrideW: 3, DilationH: 2, PadTop: 3, PadBottom: 1, PadRight: 2},
		{C: 3, H: 15, W: 15, KH: 7, KW: 7, StrideH: 2, StrideW: 2, PadTop: 3, PadLeft: 3, PadBottom: 3, PadRight: 3},
		{C: 4, H: 6, W: 6, KH: 1, KW: 1, StrideH: 2, StrideW: 2},
	} {
		p, err := kernel.NewIm2col(g)
		if err != nil {
			t.Fatal(err)
		}
		rows, cols := p.Shape()
		r := rand.New(rand.NewPCG(uint64(i), 7))
		src := randSlice(r, g.C*g.H*g.W)
		full := make([]float32, rows*cols)
		if err := p.Im2col(full, src); err != nil {
			t.Fatal(err)
		}
		for _, width := range []int{1, 5, 32, cols} {
			for j0 := 0; j0 < cols; j0 += width {
				j1 := min(j0+width, cols)
				w := j1 - j0
				got := make([]float32, rows*w)
				for k := range got {
					got[k] = float32(math.NaN()) // every entry must be written
				}
				if err := p.Im2colCols(got, src, j0, j1); err != nil {
					t.Fatal(err)
				}
				for rr := 0; rr < rows; rr++ {
					for c := 0; c < w; c++ {
						if got[rr*w+c] != full[rr*cols+j0+c] {
							t.Fatalf("case %d, cols [%d,%d): row %d col %d = %v, want %v", i, j0, j1, rr, j0+c, got[rr*w+c], full[rr*cols+j0+c])
						}
					}
				}
			}
		}
	}
}
