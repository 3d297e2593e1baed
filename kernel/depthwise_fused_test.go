package kernel_test

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"heedmap/kernel"
)

// dwISAs are the paths every depthwise test runs: the pure-Go loop
// always, and each vector ISA the CPU has.
func dwISAs() []kernel.ISA {
	isas := []kernel.ISA{kernel.ISAPortable}
	for _, isa := range []kernel.ISA{kernel.ISAAVX2, kernel.ISAAVX512} {
		if kernel.Supported(isa) {
			isas = append(isas, isa)
		}
	}
	return isas
}

// dwKernelCases covers the shapes with vector kernels (3×3 and 5×5 at
// strides 1 and 2, MobileNet/EfficientNet's "same" padding and others)
// at widths that leave every tail length of 8- and 16-lane vectors
// (1…17, 31, 33, 56 columns of output), plus shapes that take the
// generic loop (dilation, unequal strides, 7×7, 1×3).
func dwKernelCases() []dwCase {
	var cs []dwCase
	for _, k := range []int{3, 5} {
		p := k / 2
		for _, s := range []int{1, 2} {
			for _, w := range []int{1, 2, 5, 7, 8, 9, 14, 15, 16, 17, 31, 33, 56, 57} {
				h := 3 + w%5
				cs = append(cs, dwCase{2, h, w, 1, kernel.Conv2D{KH: k, KW: k, StrideH: s, StrideW: s, PadTop: p, PadLeft: p, PadBottom: p, PadRight: p}})
			}
			// No padding, asymmetric padding (TF "same" at stride 2 pads
			// after), and multiplier 2.
			cs = append(cs,
				dwCase{3, 12, 19, 1, kernel.Conv2D{KH: k, KW: k, StrideH: s, StrideW: s}},
				dwCase{3, 11, 20, 1, kernel.Conv2D{KH: k, KW: k, StrideH: s, StrideW: s, PadTop: p - 1 + s%2, PadLeft: p - 1 + s%2, PadBottom: p, PadRight: p}},
				dwCase{2, 9, 23, 2, kernel.Conv2D{KH: k, KW: k, StrideH: s, StrideW: s, PadTop: p, PadLeft: p, PadBottom: p, PadRight: p}},
			)
		}
	}
	return append(cs,
		dwCase{2, 10, 13, 1, kernel.Conv2D{KH: 3, KW: 3, DilationH: 2, DilationW: 2, PadTop: 2, PadLeft: 2, PadBottom: 2, PadRight: 2}},
		dwCase{2, 10, 13, 1, kernel.Conv2D{KH: 3, KW: 3, StrideH: 1, StrideW: 2, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}},
		dwCase{2, 16, 18, 1, kernel.Conv2D{KH: 7, KW: 7, StrideH: 2, StrideW: 2, PadTop: 3, PadLeft: 3, PadBottom: 3, PadRight: 3}},
		dwCase{3, 7, 8, 1, kernel.Conv2D{KH: 1, KW: 3, PadLeft: 1, PadRight: 1}},
		dwCase{1, 3, 3, 1, kernel.Conv2D{KH: 5, KW: 5, PadTop: 3, PadLeft: 3, PadBottom: 3, PadRight: 3}}, // pads beyond the filter
	)
}

// dwEpilogues are the fused epilogues as the ONNX operators define them
// (Relu: max(0, x); Clip: min(max, max(min, x)); MobileNetV2's ReLU6 is
// Clip(0, 6)), applied after the bias of Conv.
var dwEpilogues = []struct {
	name   string
	bias   bool
	lo, hi float32
}{
	{"none", false, float32(math.Inf(-1)), float32(math.Inf(1))},
	{"bias", true, float32(math.Inf(-1)), float32(math.Inf(1))},
	{"bias+relu", true, 0, float32(math.Inf(1))},
	{"relu6", false, 0, 6},
	{"bias+clip", true, -0.5, 0.75},
}

// TestDepthwiseFusedMatchesDefinition compares every path of
// DepthwiseFused with the ONNX Conv definition (group = C, computed in
// float64 by directConv) followed by the bias and activation as the ONNX
// Conv, Relu and Clip operators define them.
func TestDepthwiseFusedMatchesDefinition(t *testing.T) {
	r := rand.New(rand.NewPCG(31, 32))
	vec := map[kernel.ISA]int{}
	for i, tc := range dwKernelCases() {
		p, g, oh, ow, m := tc.plan(t)
		x := randSlice(r, tc.c*tc.h*tc.w)
		w := randSlice(r, m*g.KH*g.KW)
		bias := randSlice(r, m)
		conv := directConv(x, 1, tc.c, tc.h, tc.w, w, m, tc.c, g, oh, ow)
		for _, isa := range dwISAs() {
			if f, _ := p.DepthwiseVectorized(isa); f {
				vec[isa]++
			}
			for _, e := range dwEpilogues {
				ep := kernel.DepthwiseEpilogue{Lo: e.lo, Hi: e.hi}
				want := make([]float32, len(conv))
				for j, v := range conv {
					if e.bias {
						v += bias[j/(oh*ow)]
					}
					want[j] = min(e.hi, max(e.lo, v))
				}
				if e.bias {
					ep.Bias = bias
				}
				got := make([]float32, m*oh*ow)
				for j := range got {
					got[j] = float32(math.NaN()) // overwritten, not accumulated
				}
				scratch := make([]float32, p.DepthwiseScratch())
				for j := range scratch {
					scratch[j] = 1e30 // contents must not matter
				}
				// Two channel ranges, the second starting mid-channel when
				// the multiplier is 2.
				for _, rg := range [][2]int{{0, m/2 + 1}, {m/2 + 1, m}} {
					if err := p.DepthwiseFusedISA(isa, got, x, w, tc.mult, rg[0], rg[1], &ep, scratch); err != nil {
						t.Fatal(err)
					}
				}
				if err := closeTo(got, want, 1e-5, 1e-5); err != nil {
					t.Fatalf("case %d (%+v, %d×%d) %v %s: %v", i, g, oh, ow, isa, e.name, err)
				}
			}
		}
	}
	// The vector kernels must have taken the 3×3/5×5 stride-1/2 cases.
	for _, isa := range dwISAs()[1:] {
		if vec[isa] < 4*17 {
			t.Errorf("%v: vector kernels ran %d cases, want at least %d", isa, vec[isa], 4*17)
		}
	}
}

// TestDepthwiseFusedKeepsNaN: a NaN input gives a NaN output through
// ReLU and Clip, as Go's max and min (the ops' forward loops) keep it.
func TestDepthwiseFusedKeepsNaN(t *testing.T) {
	for _, isa := range dwISAs() {
		p, err := kernel.NewIm2col(kernel.Conv2D{C: 1, H: 5, W: 21, KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1})
		if err != nil {
			t.Fatal(err)
		}
		x := make([]float32, 5*21)
		x[2*21+19] = float32(math.NaN())
		w := []float32{1, 1, 1, 1, 1, 1, 1, 1, 1}
		y := make([]float32, 5*21)
		ep := kernel.DepthwiseEpilogue{Lo: 0, Hi: 6}
		if err := p.DepthwiseFusedISA(isa, y, x, w, 1, 0, 1, &ep, make([]float32, p.DepthwiseScratch())); err != nil {
			t.Fatal(err)
		}
		if v := y[2*21+20]; !math.IsNaN(float64(v)) {
			t.Errorf("%v: output next to a NaN input is %v, want NaN", isa, v)
		}
		if v := y[2*21+10]; v != 0 {
			t.Errorf("%v: output away from the NaN is %v, want 0", isa, v)
		}
	}
}

// dwBackwardDirect is the gradient of the ONNX Conv definition at
// group = C written out: every output (oh, ow) that tap (kh, kw) links to
// input (ih, iw) adds dy·w to dx and dy·x to dw.
func dwBackwardDirect(x, w, dy []float32, c, h, wd, mult int, g kernel.Conv2D, oh, ow int) (dx, dw []float32) {
	dx64 := make([]float64, c*h*wd)
	dw64 := make([]float64, c*mult*g.KH*g.KW)
	for mo := 0; mo < c*mult; mo++ {
		ch := mo / mult
		for i := 0; i < oh; i++ {
			for j := 0; j < ow; j++ {
				gv := float64(dy[(mo*oh+i)*ow+j])
				for kh := 0; kh < g.KH; kh++ {
					for kw := 0; kw < g.KW; kw++ {
						ih := i*g.StrideH - g.PadTop + kh*g.DilationH
						iw := j*g.StrideW - g.PadLeft + kw*g.DilationW
						if ih < 0 || ih >= h || iw < 0 || iw >= wd {
							continue
						}
						t := (mo*g.KH+kh)*g.KW + kw
						dx64[(ch*h+ih)*wd+iw] += gv * float64(w[t])
						dw64[t] += gv * float64(x[(ch*h+ih)*wd+iw])
					}
				}
			}
		}
	}
	dx, dw = make([]float32, len(dx64)), make([]float32, len(dw64))
	for i, v := range dx64 {
		dx[i] = float32(v)
	}
	for i, v := range dw64 {
		dw[i] = float32(v)
	}
	return dx, dw
}

// TestDepthwiseBackwardMatchesDefinition checks the input and filter
// gradients of every path against dwBackwardDirect, accumulating onto
// nonzero gradients as the contract says.
func TestDepthwiseBackwardMatchesDefinition(t *testing.T) {
	r := rand.New(rand.NewPCG(41, 42))
	vec := map[kernel.ISA]int{}
	for i, tc := range append(dwKernelCases(), dwBaseCases...) {
		p, g, oh, ow, m := tc.plan(t)
		x := randSlice(r, tc.c*tc.h*tc.w)
		w := randSlice(r, m*g.KH*g.KW)
		dy := randSlice(r, m*oh*ow)
		wantDX, wantDW := dwBackwardDirect(x, w, dy, tc.c, tc.h, tc.w, tc.mult, g, oh, ow)
		dx0, dw0 := randSlice(r, len(x)), randSlice(r, len(w))
		for j := range wantDX {
			wantDX[j] += dx0[j]
		}
		for j := range wantDW {
			wantDW[j] += dw0[j]
		}
		for _, isa := range dwISAs() {
			if _, b := p.DepthwiseVectorized(isa); b {
				vec[isa]++
			}
			dx := append([]float32(nil), dx0...)
			dw := append([]float32(nil), dw0...)
			for _, rg := range [][2]int{{0, tc.c / 2}, {tc.c / 2, tc.c}} {
				if err := p.DepthwiseBackwardISA(isa, dx, dw, dy, x, w, tc.mult, rg[0], rg[1]); err != nil {
					t.Fatal(err)
				}
			}
			name := fmt.Sprintf("case %d (%+v, %d×%d) %v", i, g, oh, ow, isa)
			if err := closeTo(dx, wantDX, 1e-4, 1e-5); err != nil {
				t.Fatalf("%s dx: %v", name, err)
			}
			if err := closeTo(dw, wantDW, 1e-4, 1e-4); err != nil {
				t.Fatalf("%s dw: %v", name, err)
			}
			// dx alone: src is not read.
			dx2 := append([]float32(nil), dx0...)
			if err := p.DepthwiseBackwardISA(isa, dx2, nil, dy, nil, w, tc.mult, 0, tc.c); err != nil {
				t.Fatal(err)
			}
			if err := closeTo(dx2, wantDX, 1e-4, 1e-5); err != nil {
				t.Fatalf("%s dx only: %v", name, err)
			}
		}
	}
	for _, isa := range dwISAs()[1:] {
		if vec[isa] < 4*17 {
			t.Errorf("%v: vector kernels ran %d backward cases, want at least %d", isa, vec[isa], 4*17)
		}
	}
}

// TestDepthwiseFusedRejectsBadInput: short buffers are errors, not
// panics.
func TestDepthwiseFusedRejectsBadInput(t *testing.T) {
	p, _ := kernel.NewIm2col(kernel.Conv2D{C: 2, H: 6, W: 6, KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1})
	x, w, y := make([]float32, 72), make([]float32, 18), make([]float32, 72)
	if err := p.DepthwiseFused(y, x, w, 1, 0, 2, nil, make([]float32, p.DepthwiseScratch()-1)); err == nil {
		t.Error("short scratch accepted")
	}
	if err := p.DepthwiseFused(y, x, w, 1, 0, 2, &kernel.DepthwiseEpilogue{Bias: []float32{1}}, make([]float32, p.DepthwiseScratch())); err == nil {
		t.Error("short bias accepted")
	}
	if err := p.DepthwiseBackwardInto(x, nil, y, nil, w, 1, 0, 2, make([]float32, 10)); err == nil {
		t.Error("short backward scratch accepted")
	}
}

// TestDepthwisePlanesMatchesDefinition runs DepthwisePlanes over a batch
// of two images split into uneven plane runs (as goroutines take them)
// and compares with the ONNX Conv definition plus bias and Clip.
func TestDepthwisePlanesMatchesDefinition(t *testing.T) {
	r := rand.New(rand.NewPCG(51, 52))
	const n, c = 2, 5
	eachDepthwiseCase(t, r, n, c, []kernel.Conv2D{
		{C: 1, H: 14, W: 14, KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1},
		{C: 1, H: 15, W: 13, KH: 5, KW: 5, StrideH: 2, StrideW: 2, PadTop: 2, PadLeft: 2, PadBottom: 2, PadRight: 2},
		{C: 1, H: 9, W: 10, KH: 3, KW: 3, DilationH: 2, DilationW: 2, PadTop: 2, PadLeft: 2, PadBottom: 2, PadRight: 2},
	}, func(g kernel.Conv2D, p *kernel.Im2colPlan, mult, m, oh, ow int, x, w []float32) {
		bias := randSlice(r, m)
		want := directConv(x, n, c, g.H, g.W, w, m, c, p.Geometry(), oh, ow)
		for j := range want {
			want[j] = min(1.5, max(-0.25, want[j]+bias[j/(oh*ow)%m]))
		}
		ep := kernel.DepthwiseEpilogue{Bias: bias, Lo: -0.25, Hi: 1.5}
		for _, isa := range dwISAs() {
			got := make([]float32, len(want))
			scratch := make([]float32, p.DepthwiseScratch())
			for _, rg := range [][2]int{{0, 3}, {3, 4}, {4, n * c}} {
				if err := p.DepthwisePlanesISA(isa, got, x, w, c, mult, rg[0], rg[1], &ep, scratch); err != nil {
					t.Fatal(err)
				}
			}
			if err := closeTo(got, want, 1e-5, 1e-5); err != nil {
				t.Fatalf("%+v mult %d %v: %v", g, mult, isa, err)
			}
		}
	})
	p, _ := kernel.NewIm2col(kernel.Conv2D{C: 2, H: 4, W: 4, KH: 3, KW: 3})
	if err := p.DepthwisePlanes(make([]float32, 8), make([]float32, 32), make([]float32, 18), 2, 1, 0, 2, nil, make([]float32, p.DepthwiseScratch())); err == nil {
		t.Error("two-channel plan accepted")
	}
}

// TestDepthwiseRowsMatchesPlanes computes layers band by band of output
// rows (DepthwiseRows, as the engine's depthwise→pointwise pair takes
// them) and requires every value bit for bit equal to DepthwisePlanes over
// whole planes, on every path: stride 1 and 2 (the phased plane), 3×3 and 5×5, dilation,
// a multiplier of 2, bands of one row and uneven bands; and a band leaves
// the rows outside it untouched.
func TestDepthwiseRowsMatchesPlanes(t *testing.T) {
	r := rand.New(rand.NewPCG(53, 54))
	const n, c = 2, 3
	eachDepthwiseCase(t, r, n, c, []kernel.Conv2D{
		{C: 1, H: 20, W: 20, KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1},
		{C: 1, H: 23, W: 21, KH: 3, KW: 3, StrideH: 2, StrideW: 2, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1},
		{C: 1, H: 17, W: 19, KH: 5, KW: 5, StrideH: 2, StrideW: 2, PadTop: 2, PadLeft: 2, PadBottom: 2, PadRight: 2},
		{C: 1, H: 12, W: 40, KH: 3, KW: 3, DilationH: 2, DilationW: 2, PadTop: 2, PadLeft: 2, PadBottom: 2, PadRight: 2},
	}, func(g kernel.Conv2D, p *kernel.Im2colPlan, mult, m, oh, ow int, x, w []float32) {
		ep := kernel.DepthwiseEpilogue{Bias: randSlice(r, m), Lo: -0.25, Hi: 1.5}
		for _, isa := range dwISAs() {
			scratch := make([]float32, p.DepthwiseScratch())
			want := make([]float32, n*m*oh*ow)
			if err := p.DepthwisePlanesISA(isa, want, x, w, c, mult, 0, n*c, &ep, scratch); err != nil {
				t.Fatal(err)
			}
			for _, cuts := range [][]int{{0, 1, 2, oh}, {0, oh / 3, oh/3 + 1, oh}, {0, oh - 1, oh}} {
				got := make([]float32, len(want))
				for i := range got {
					got[i] = float32(math.NaN())
				}
				for b := 0; b+1 < len(cuts); b++ {
					if err := p.DepthwiseRowsISA(isa, got, x, w, c, mult, 0, n*c, cuts[b], cuts[b+1], &ep, scratch); err != nil {
						t.Fatal(err)
					}
					// Rows past this band are still unwritten.
					for pl := 0; pl < n*m; pl++ {
						for j := cuts[b+1] * ow; j < oh*ow; j++ {
							if v := got[pl*oh*ow+j]; !math.IsNaN(float64(v)) {
								t.Fatalf("%+v mult %d %v: band [%d, %d) wrote plane %d value %d", g, mult, isa, cuts[b], cuts[b+1], pl, j)
							}
						}
					}
				}
				for i := range want {
					if math.Float32bits(got[i]) != math.Float32bits(want[i]) {
						t.Fatalf("%+v mult %d %v bands %v: value %d is %v by bands, %v by planes", g, mult, isa, cuts, i, got[i], want[i])
					}
				}
			}
		}
	})
	p, _ := kernel.NewIm2col(kernel.Conv2D{C: 1, H: 4, W: 4, KH: 3, KW: 3})
	if err := p.DepthwiseRows(make([]float32, 8), make([]float32, 32), make([]float32, 18), 2, 1, 0, 2, 1, 3, nil, make([]float32, p.DepthwiseScratch())); err == nil {
		t.Error("rows [1, 3) of a 2-row output accepted")
	}
}

// TestDepthwiseBackwardPlanesMatchesDefinition runs the batched backward
// entry point (one-channel plan, two images, channel runs as goroutines
// take them) against dwBackwardDirect applied image by image, with the
// filter gradient summed over the images.
func TestDepthwiseBackwardPlanesMatchesDefinition(t *testing.T) {
	r := rand.New(rand.NewPCG(61, 62))
	const n, c = 2, 5
	for _, mult := range []int{1, 2} {
		for _, g := range []kernel.Conv2D{
			{C: 1, H: 14, W: 17, KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1},
			{C: 1, H: 15, W: 13, KH: 5, KW: 5, StrideH: 2, StrideW: 2, PadTop: 2, PadLeft: 2, PadBottom: 2, PadRight: 2},
			{C: 1, H: 12, W: 12, KH: 3, KW: 3, StrideH: 2, StrideW: 2, PadTop: 0, PadLeft: 0, PadBottom: 1, PadRight: 1},
			{C: 1, H: 9, W: 10, KH: 3, KW: 3, DilationH: 2, DilationW: 2, PadTop: 2, PadLeft: 2, PadBottom: 2, PadRight: 2},
		} {
			p, err := kernel.NewIm2col(g)
			if err != nil {
				t.Fatal(err)
			}
			oh, ow := p.Out()
			gc := p.Geometry()
			m := c * mult
			hw, ohw := g.H*g.W, oh*ow
			x := randSlice(r, n*c*hw)
			w := randSlice(r, m*g.KH*g.KW)
			dy := randSlice(r, n*m*ohw)
			wantDX := make([]float32, len(x))
			wantDW := make([]float32, len(w))
			for b := 0; b < n; b++ {
				dx, dw := dwBackwardDirect(x[b*c*hw:(b+1)*c*hw], w, dy[b*m*ohw:(b+1)*m*ohw], c, g.H, g.W, mult, gc, oh, ow)
				copy(wantDX[b*c*hw:], dx)
				for j, v := range dw {
					wantDW[j] += v
				}
			}
			for _, isa := range dwISAs() {
				// Accumulating onto zeros, and setting dx over garbage.
				for _, setDX := range []bool{false, true} {
					dx, dw := make([]float32, len(x)), make([]float32, len(w))
					if setDX {
						for j := range dx {
							dx[j] = float32(math.NaN())
						}
					}
					for _, rg := range [][2]int{{0, 2}, {2, 3}, {3, c}} {
						if err := p.DepthwiseBackwardPlanesISA(isa, dx, dw, dy, x, w, n, c, mult, rg[0], rg[1], setDX); err != nil {
							t.Fatal(err)
						}
					}
					if err := closeTo(dx, wantDX, 1e-4, 1e-5); err != nil {
						t.Fatalf("%+v mult %d %v setDX %v dx: %v", g, mult, isa, setDX, err)
					}
					if err := closeTo(dw, wantDW, 1e-4, 1e-4); err != nil {
						t.Fatalf("%+v mult %d %v setDX %v dw: %v", g, mult, isa, setDX, err)
					}
				}
			}
		}
	}
	p, _ := kernel.NewIm2col(kernel.Conv2D{C: 1, H: 4, W: 4, KH: 3, KW: 3})
	if err := p.DepthwiseBackwardPlanes(make([]float32, 32), nil, make([]float32, 8), nil, make([]float32, 18), 1, 2, 1, 0, 2, make([]float32, 4), false); err == nil {
		t.Error("short scratch accepted")
	}
	if err := p.DepthwiseBackwardPlanes(make([]float32, 32), nil, make([]float32, 7), nil, make([]float32, 18), 1, 2, 1, 0, 2, make([]float32, p.DepthwiseBackwardScratch()), false); err == nil {
		t.Error("short dy accepted")
	}
}

// eachDepthwiseCase calls f for each one-channel geometry of geoms at
// channel multipliers 1 and 2, with the plan, its output size and random
// inputs for n images of c channels (x) and the m = c·multiplier filters
// (w).
func eachDepthwiseCase(t *testing.T, r *rand.Rand, n, c int, geoms []kernel.Conv2D, f func(g kernel.Conv2D, p *kernel.Im2colPlan, mult, m, oh, ow int, x, w []float32)) {
	t.Helper()
	for _, mult := range []int{1, 2} {
		for _, g := range geoms {
			p, err := kernel.NewIm2col(g)
			if err != nil {
				t.Fatal(err)
			}
			oh, ow := p.Out()
			m := c * mult
			f(g, p, mult, m, oh, ow, randSlice(r, n*c*g.H*g.W), randSlice(r, m*g.KH*g.KW))
		}
	}
}
