package colour

import (
	"math"
	"testing"
)

func near(t *testing.T, what string, got, want, tol float64) {
	t.Helper()
	if !(math.Abs(got-want) <= tol) {
		t.Errorf("%s = %.7g, want %.7g ± %.2g", what, got, want, tol)
	}
}

// IEC 61966-2-1: the piecewise transfer function. The thresholds 0.04045
// (encoded) and 0.0031308 (linear) are the standard's and must meet
// (0.04045/12.92 = 0.0031308 to 7 digits); the end points are exact.
func TestTransferIEC61966(t *testing.T) {
	near(t, "Decode(0)", Decode(0), 0, 0)
	near(t, "Decode(1)", Decode(1), 1, 1e-12)
	near(t, "Encode(1)", Encode(1), 1, 1e-12)
	near(t, "Decode(0.04045)", Decode(0.04045), 0.0031308, 1e-7)
	// Both branches agree at the threshold (the standard's constants make
	// the curve continuous to ~1e-8).
	near(t, "power branch at 0.04045", math.Pow((0.04045+0.055)/1.055, 2.4), 0.04045/12.92, 1e-7)
	near(t, "Encode(0.0031308)", Encode(0.0031308), 0.04045, 1e-6)
	// Mid grey: encoded 0.5 is ((0.5+0.055)/1.055)^2.4 = 0.21404 linear;
	// 8-bit 128 is 0.21586 (value from memory, widely tabulated).
	near(t, "Decode(0.5)", Decode(0.5), 0.21404, 1e-5)
	near(t, "Decode(128/255)", Decode(128.0/255), 0.21586, 1e-5)
	for i := 0; i <= 1000; i++ {
		v := float64(i) / 1000
		near(t, "Encode(Decode(v))", Encode(Decode(v)), v, 1e-12)
	}
}

// IEC 61966-2-1 defines the sRGB primaries and white by chromaticity:
// R (0.64, 0.33), G (0.30, 0.60), B (0.15, 0.06), D65 (0.3127, 0.3290).
// The matrix is checked against those, not against itself.
func TestPrimariesIEC61966(t *testing.T) {
	for _, c := range []struct {
		name string
		lin  Linear
		x, y float64
	}{
		{"red", Linear{1, 0, 0}, 0.64, 0.33},
		{"green", Linear{0, 1, 0}, 0.30, 0.60},
		{"blue", Linear{0, 0, 1}, 0.15, 0.06},
		{"white", Linear{1, 1, 1}, 0.3127, 0.3290},
	} {
		X := c.lin.XYZ()
		s := X.X + X.Y + X.Z
		near(t, c.name+" x", X.X/s, c.x, 2e-4)
		near(t, c.name+" y", X.Y/s, c.y, 2e-4)
	}
	w := Linear{1, 1, 1}.XYZ()
	near(t, "white Y", w.Y, 1, 1e-12)
	// Primaries' luminances (Rec. 709 / sRGB: 0.2126, 0.7152, 0.0722).
	near(t, "red Y", Linear{1, 0, 0}.XYZ().Y, 0.2126, 1e-9)
	near(t, "green Y", Linear{0, 1, 0}.XYZ().Y, 0.7152, 1e-9)
	near(t, "blue Y", Linear{0, 0, 1}.XYZ().Y, 0.0722, 1e-9)
	// The standard's printed inverse (four decimals) agrees with ours.
	inv := [3][3]float64{{3.2406, -1.5372, -0.4986}, {-0.9689, 1.8758, 0.0415}, {0.0557, -0.2040, 1.0570}}
	for i := range 3 {
		for j := range 3 {
			near(t, "XYZ→linear matrix", xyzToLinear[i][j], inv[i][j], 1.5e-4)
		}
	}
	x := XYZ{0.3, 0.4, 0.5}
	back := x.Linear().XYZ()
	near(t, "XYZ round trip", back.X+back.Y+back.Z, 1.2, 1e-12)
}

// Ottosson 2020, "A perceptual color space for image processing": the table
// of example XYZ (D65) and OKLab pairs, printed to three decimals.
func TestOKLabOttossonTable(t *testing.T) {
	for _, c := range []struct {
		name string
		in   XYZ
		want OKLab
	}{
		{"D65 white", XYZ{0.950, 1.000, 1.089}, OKLab{1.000, 0.000, 0.000}}, // value from the OKLab post's table
		{"X", XYZ{1.000, 0.000, 0.000}, OKLab{0.450, 1.236, -0.019}},        // value from the OKLab post's table
		{"Y", XYZ{0.000, 1.000, 0.000}, OKLab{0.922, -0.671, 0.263}},        // value from the OKLab post's table
		{"Z", XYZ{0.000, 0.000, 1.000}, OKLab{0.153, -1.415, -0.449}},       // value from the OKLab post's table
	} {
		got := c.in.OKLab()
		// Half a unit in the third decimal plus float slack.
		near(t, c.name+" L", got.L, c.want.L, 6e-4)
		near(t, c.name+" a", got.A, c.want.A, 6e-4)
		near(t, c.name+" b", got.B, c.want.B, 6e-4)
		back := got.XYZ()
		near(t, c.name+" round trip X", back.X, c.in.X, 1e-9)
		near(t, c.name+" round trip Z", back.Z, c.in.Z, 1e-9)
	}
}

// White maps to L = 1, a = b = 0 (Ottosson's normalisation), through both
// the direct linear-sRGB matrix and the XYZ route; black to 0.
func TestOKLabWhiteAndRoutes(t *testing.T) {
	w := Linear{1, 1, 1}.OKLab()
	near(t, "white L", w.L, 1, 1e-6)
	near(t, "white a", w.A, 0, 1e-6)
	near(t, "white b", w.B, 0, 1e-6)
	k := Linear{}.OKLab()
	near(t, "black L", k.L, 0, 1e-12)
	// The two published routes differ only by the rounding of the sRGB
	// matrix they were built from.
	for _, c := range []Linear{{1, 0, 0}, {0, 1, 0}, {0, 0, 1}, {0.2, 0.5, 0.9}} {
		p, q := c.OKLab(), c.XYZ().OKLab()
		if d := DeltaE(p, q); d > 2e-3 {
			t.Errorf("%v: direct %v vs via XYZ %v, ΔE_OK %.2g", c, p, q, d)
		}
		back := p.Linear()
		near(t, "round trip R", back.R, c.R, 1e-9)
		near(t, "round trip B", back.B, c.B, 1e-9)
	}
}

// CIE 15: L* of the white is 100; the two branches of f meet at
// (6/29)³ = 0.008856 where L* = 8; sRGB red is L*a*b* (53.24, 80.09, 67.20)
// relative to D65 (value from memory, widely tabulated).
func TestCIELabCIE15(t *testing.T) {
	w := D65.CIELab(D65)
	near(t, "white L*", w.L, 100, 1e-9)
	near(t, "white a*", w.A, 0, 1e-9)
	e := math.Pow(6.0/29, 3)
	lo := XYZ{D65.X * e, e, D65.Z * e}.CIELab(D65)
	near(t, "L* at the branch point", lo.L, 8, 1e-9)
	near(t, "L* just below", XYZ{0, e * 0.999999, 0}.CIELab(D65).L, 8, 1e-4)
	near(t, "L* slope below (κ = 24389/27)", XYZ{0, 0.001, 0}.CIELab(D65).L, 0.001*24389/27, 1e-9)
	r := Linear{1, 0, 0}.XYZ().CIELab(D65)
	near(t, "red L*", r.L, 53.24, 0.05)
	near(t, "red a*", r.A, 80.09, 0.05)
	near(t, "red b*", r.B, 67.20, 0.05)
	back := r.XYZ(D65)
	near(t, "CIELAB round trip", back.X, Linear{1, 0, 0}.XYZ().X, 1e-12)
}

func TestClipChroma(t *testing.T) {
	// Very saturated mid-grey-lightness colour: out of gamut before, inside
	// after, with L and h unchanged and chroma reduced as little as needed.
	in := OKLCh{0.6, 0.4, 150}.Lab()
	if in.Linear().InGamut(0) {
		t.Fatal("test colour should be out of gamut")
	}
	out := ClipChroma(in)
	if !out.Linear().InGamut(1e-9) {
		t.Errorf("clipped %v still out of gamut: %v", out, out.Linear())
	}
	pi, po := in.LCh(), out.LCh()
	near(t, "L kept", po.L, pi.L, 1e-12)
	near(t, "h kept", po.H, pi.H, 1e-9)
	if !(po.C < pi.C) {
		t.Errorf("chroma not reduced: %v → %v", pi.C, po.C)
	}
	// On the gamut surface: a little more chroma leaves the gamut.
	if (OKLCh{po.L, po.C + 1e-6, po.H}).Lab().Linear().InGamut(0) {
		t.Errorf("clipped chroma %.6f is not maximal", po.C)
	}
	g := OKLab{0.5, 0.01, -0.02}
	if ClipChroma(g) != g {
		t.Error("in-gamut colour changed")
	}
}

func lutLab(r *Ramp) [256]OKLab {
	var out [256]OKLab
	for i, c := range r.LUT() {
		out[i] = SRGB{float64(c.R) / 255, float64(c.G) / 255, float64(c.B) / 255}.Linear().OKLab()
	}
	return out
}

// The sequential ramp's lightness, measured on the 8-bit entries a viewer
// actually sees, rises strictly; adjacent entries differ by well under one
// just-noticeable difference (ΔE_OK ≈ 0.02, common practice), and no step is
// more than twice the mean, so equal data steps look like equal colour steps.
func TestSequentialRamp(t *testing.T) {
	lab := lutLab(Sequential())
	checkSteps(t, "sequential", lab)
	for i := 1; i < 256; i++ {
		if !(lab[i].L > lab[i-1].L) {
			t.Errorf("lightness not increasing at %d: %.4f → %.4f", i, lab[i-1].L, lab[i].L)
		}
	}
	near(t, "dark end L", lab[0].L, 0.20, 0.005)
	near(t, "light end L", lab[255].L, 0.96, 0.005)
}

// The diverging ramp's lightness is symmetric about a light neutral centre
// and rises strictly towards it from both ends.
func TestDivergingRamp(t *testing.T) {
	lab := lutLab(Diverging())
	checkSteps(t, "diverging", lab)
	for i := 0; i < 128; i++ {
		near(t, "L symmetry", lab[i].L, lab[255-i].L, 0.004)
		if i > 0 && !(lab[i].L > lab[i-1].L) {
			t.Errorf("negative half: lightness not rising at %d", i)
		}
		if i > 0 && !(lab[255-i].L > lab[256-i].L) {
			t.Errorf("positive half: lightness not rising at %d", 255-i)
		}
	}
	for _, i := range []int{127, 128} {
		c := lab[i].LCh()
		if c.L < 0.95 || c.C > 0.005 {
			t.Errorf("centre entry %d is L %.3f C %.4f, want light neutral", i, c.L, c.C)
		}
	}
	// Two hues: the ends sit on opposite sides (blue vs red family).
	lo, hi := lab[0].LCh().H, lab[255].LCh().H
	if d := math.Abs(math.Mod(hi-lo+540, 360) - 180); d < 120 {
		t.Errorf("end hues %.0f° and %.0f° are only %.0f° apart", lo, hi, d)
	}
}

func checkSteps(t *testing.T, name string, lab [256]OKLab) {
	t.Helper()
	maxd, sum := 0.0, 0.0
	for i := 1; i < 256; i++ {
		d := DeltaE(lab[i-1], lab[i])
		sum += d
		maxd = math.Max(maxd, d)
	}
	mean := sum / 255
	if maxd > 0.02 {
		t.Errorf("%s: largest adjacent step ΔE_OK %.4f exceeds 0.02", name, maxd)
	}
	if maxd > 2*mean {
		t.Errorf("%s: largest step %.4f is more than twice the mean %.4f", name, maxd, mean)
	}
}

func TestNewRampRejects(t *testing.T) {
	bad := [][]Stop{
		nil,
		{{0, OKLCh{0.5, 0, 0}}},
		{{0.1, OKLCh{0.5, 0, 0}}, {1, OKLCh{0.6, 0, 0}}},
		{{0, OKLCh{0.5, 0, 0}}, {0, OKLCh{0.6, 0, 0}}, {1, OKLCh{0.6, 0, 0}}},
		{{0, OKLCh{1.5, 0, 0}}, {1, OKLCh{0.6, 0, 0}}},
		{{0, OKLCh{0.5, -1, 0}}, {1, OKLCh{0.6, 0, 0}}},
	}
	for i, s := range bad {
		if _, err := NewRamp("bad", s); err == nil {
			t.Errorf("case %d: no error", i)
		}
	}
	if Index(math.NaN()) != 0 || Index(-1) != 0 || Index(2) != 255 || Index(0.5) != 128 {
		t.Error("Index clamping")
	}
}
