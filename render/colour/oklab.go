package colour

import "math"

// OKLab is a colour in Ottosson's OKLab space (2020): L is perceived
// lightness with white at 1, a and b are the green–red and blue–yellow
// opponent axes. Euclidean distance approximates perceived difference.
type OKLab struct{ L, A, B float64 }

// OKLCh is OKLab in polar form: chroma C = √(a²+b²) and hue H in degrees,
// measured from the +a axis towards +b, in [0, 360).
type OKLCh struct{ L, C, H float64 }

// Ottosson's M1 (XYZ → cone-like LMS, D65) and M2 (cube-rooted LMS → Lab),
// and his direct linear-sRGB → LMS matrix (the product of the sRGB matrix and
// M1 as he published it). Both routes are kept: XYZ for the published test
// table, the direct one for rendering.
var (
	okM1 = [3][3]float64{
		{0.8189330101, 0.3618667424, -0.1288597137},
		{0.0329845436, 0.9293118715, 0.0361456387},
		{0.0482003018, 0.2643662691, 0.6338517070},
	}
	okM2 = [3][3]float64{
		{0.2104542553, 0.7936177850, -0.0040720468},
		{1.9779984951, -2.4285922050, 0.4505937099},
		{0.0259040371, 0.7827717662, -0.8086757660},
	}
	okLinearToLMS = [3][3]float64{
		{0.4122214708, 0.5363325363, 0.0514459929},
		{0.2119034982, 0.6806995451, 0.1073969566},
		{0.0883024619, 0.2817188376, 0.6299787005},
	}
	okM1Inv       = invert3(okM1)
	okM2Inv       = invert3(okM2)
	okLMSToLinear = invert3(okLinearToLMS)
)

func mul3(m *[3][3]float64, v [3]float64) [3]float64 {
	return [3]float64{
		m[0][0]*v[0] + m[0][1]*v[1] + m[0][2]*v[2],
		m[1][0]*v[0] + m[1][1]*v[1] + m[1][2]*v[2],
		m[2][0]*v[0] + m[2][1]*v[1] + m[2][2]*v[2],
	}
}

func lmsToLab(lms [3]float64) OKLab {
	v := mul3(&okM2, [3]float64{math.Cbrt(lms[0]), math.Cbrt(lms[1]), math.Cbrt(lms[2])})
	return OKLab{v[0], v[1], v[2]}
}

// lms returns the linear cone-like response; cubing undoes the cube root.
func (c OKLab) lms() [3]float64 {
	v := mul3(&okM2Inv, [3]float64{c.L, c.A, c.B})
	return [3]float64{v[0] * v[0] * v[0], v[1] * v[1] * v[1], v[2] * v[2] * v[2]}
}

// OKLab converts XYZ (D65, Y of white = 1) to OKLab with Ottosson's M1 and M2.
func (x XYZ) OKLab() OKLab { return lmsToLab(mul3(&okM1, [3]float64{x.X, x.Y, x.Z})) }

// XYZ converts OKLab back to XYZ (D65).
func (c OKLab) XYZ() XYZ {
	v := mul3(&okM1Inv, c.lms())
	return XYZ{v[0], v[1], v[2]}
}

// OKLab converts linear sRGB to OKLab with Ottosson's direct matrix.
func (c Linear) OKLab() OKLab { return lmsToLab(mul3(&okLinearToLMS, [3]float64{c.R, c.G, c.B})) }

// Linear converts OKLab to linear sRGB; the result may be out of gamut.
func (c OKLab) Linear() Linear {
	v := mul3(&okLMSToLinear, c.lms())
	return Linear{v[0], v[1], v[2]}
}

// LCh converts to polar form.
func (c OKLab) LCh() OKLCh {
	h := math.Atan2(c.B, c.A) * 180 / math.Pi
	if h < 0 {
		h += 360
	}
	return OKLCh{c.L, math.Hypot(c.A, c.B), h}
}

// Lab converts back to Cartesian OKLab.
func (c OKLCh) Lab() OKLab {
	s, co := math.Sincos(c.H * math.Pi / 180)
	return OKLab{c.L, c.C * co, c.C * s}
}

// DeltaE is the Euclidean distance in OKLab (ΔE_OK), Ottosson's
// recommended colour difference for this space.
func DeltaE(p, q OKLab) float64 {
	return math.Sqrt((p.L-q.L)*(p.L-q.L) + (p.A-q.A)*(p.A-q.A) + (p.B-q.B)*(p.B-q.B))
}

// ClipChroma maps c into the sRGB gamut by reducing chroma at constant
// lightness and hue, found by bisection on C (40 halvings, so the chroma is
// within 2⁻⁴⁰ of the gamut surface). Lightness is clamped to [0, 1] first,
// since no chroma makes an out-of-range lightness displayable. Keeping L and
// h fixed is the trade-off chosen for colour ramps: it preserves the
// lightness profile (what makes a ramp readable) at the cost of saturation.
// In-gamut colours are returned unchanged.
func ClipChroma(c OKLab) OKLab {
	c.L = math.Max(0, math.Min(1, c.L))
	if c.Linear().InGamut(0) {
		return c
	}
	p := c.LCh()
	lo, hi := 0.0, p.C
	for i := 0; i < 40; i++ {
		mid := (lo + hi) / 2
		if (OKLCh{p.L, mid, p.H}).Lab().Linear().InGamut(0) {
			lo = mid
		} else {
			hi = mid
		}
	}
	return OKLCh{p.L, lo, p.H}.Lab()
}
