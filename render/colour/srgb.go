// Package colour holds the colour science behind heedmap's renders: the sRGB
// transfer function and primaries (IEC 61966-2-1), CIE XYZ, CIELAB (CIE 15),
// OKLab (Ottosson 2020), gamut clipping, and the two colour ramps used for
// attribution maps, sampled once into 256-entry sRGB lookup tables.
//
// All arithmetic is float64; the ramps are computed once at package
// initialisation and are read-only afterwards, so every function here is safe
// for concurrent use.
package colour

import "math"

// SRGB is a colour in gamma-encoded sRGB, each channel nominally in [0, 1].
type SRGB struct{ R, G, B float64 }

// Linear is a colour in linear-light sRGB (the sRGB primaries, D65 white),
// each channel nominally in [0, 1]; values outside that range are
// out of gamut.
type Linear struct{ R, G, B float64 }

// XYZ is a CIE 1931 tristimulus value scaled so that the D65 white has Y = 1.
type XYZ struct{ X, Y, Z float64 }

// D65 is the sRGB reference white, the row sums of the IEC 61966-2-1 matrix.
var D65 = XYZ{0.9505, 1.0000, 1.0890}

// Decode applies the sRGB transfer function of IEC 61966-2-1, mapping an
// encoded value to linear light: v/12.92 up to 0.04045, ((v+0.055)/1.055)^2.4
// above. Negative input is mirrored so that the function is odd, which keeps
// out-of-gamut intermediate values invertible.
func Decode(v float64) float64 {
	if v < 0 {
		return -Decode(-v)
	}
	if v <= 0.04045 {
		return v / 12.92
	}
	return math.Pow((v+0.055)/1.055, 2.4)
}

// Encode is the inverse of Decode: 12.92·v up to 0.0031308, and
// 1.055·v^(1/2.4) − 0.055 above.
func Encode(v float64) float64 {
	if v < 0 {
		return -Encode(-v)
	}
	if v <= 0.0031308 {
		return 12.92 * v
	}
	return 1.055*math.Pow(v, 1/2.4) - 0.055
}

// Linear decodes c to linear light.
func (c SRGB) Linear() Linear { return Linear{Decode(c.R), Decode(c.G), Decode(c.B)} }

// SRGB encodes c with the sRGB transfer function. It does not clip.
func (c Linear) SRGB() SRGB { return SRGB{Encode(c.R), Encode(c.G), Encode(c.B)} }

// XYZ converts linear sRGB to CIE XYZ with the IEC 61966-2-1 matrix (D65).
func (c Linear) XYZ() XYZ {
	return XYZ{
		0.4124*c.R + 0.3576*c.G + 0.1805*c.B,
		0.2126*c.R + 0.7152*c.G + 0.0722*c.B,
		0.0193*c.R + 0.1192*c.G + 0.9505*c.B,
	}
}

// Linear converts CIE XYZ to linear sRGB with the inverse of the
// IEC 61966-2-1 matrix. The inverse is computed from the forward matrix
// rather than taken from the standard's rounded four-digit inverse, so that
// round trips are exact to float64 precision.
func (x XYZ) Linear() Linear {
	m := &xyzToLinear
	return Linear{
		m[0][0]*x.X + m[0][1]*x.Y + m[0][2]*x.Z,
		m[1][0]*x.X + m[1][1]*x.Y + m[1][2]*x.Z,
		m[2][0]*x.X + m[2][1]*x.Y + m[2][2]*x.Z,
	}
}

// InGamut reports whether every channel lies in [-eps, 1+eps].
func (c Linear) InGamut(eps float64) bool {
	return c.R >= -eps && c.R <= 1+eps && c.G >= -eps && c.G <= 1+eps && c.B >= -eps && c.B <= 1+eps
}

// Bytes encodes c to 8-bit sRGB, clamping each channel to [0, 1] and
// rounding to nearest.
func (c Linear) Bytes() [3]uint8 {
	s := c.SRGB()
	return [3]uint8{to8(s.R), to8(s.G), to8(s.B)}
}

func to8(v float64) uint8 {
	if !(v > 0) { // also catches NaN
		return 0
	}
	if v >= 1 {
		return 255
	}
	return uint8(math.Round(v * 255))
}

var linearToXYZ = [3][3]float64{
	{0.4124, 0.3576, 0.1805},
	{0.2126, 0.7152, 0.0722},
	{0.0193, 0.1192, 0.9505},
}

var xyzToLinear = invert3(linearToXYZ)

// invert3 inverts a 3×3 matrix by the adjugate; only used on the fixed,
// well-conditioned colour matrices of this package.
func invert3(m [3][3]float64) [3][3]float64 {
	c00 := m[1][1]*m[2][2] - m[1][2]*m[2][1]
	c01 := m[1][2]*m[2][0] - m[1][0]*m[2][2]
	c02 := m[1][0]*m[2][1] - m[1][1]*m[2][0]
	det := m[0][0]*c00 + m[0][1]*c01 + m[0][2]*c02
	inv := 1 / det
	return [3][3]float64{
		{c00 * inv, (m[0][2]*m[2][1] - m[0][1]*m[2][2]) * inv, (m[0][1]*m[1][2] - m[0][2]*m[1][1]) * inv},
		{c01 * inv, (m[0][0]*m[2][2] - m[0][2]*m[2][0]) * inv, (m[0][2]*m[1][0] - m[0][0]*m[1][2]) * inv},
		{c02 * inv, (m[0][1]*m[2][0] - m[0][0]*m[2][1]) * inv, (m[0][0]*m[1][1] - m[0][1]*m[1][0]) * inv},
	}
}
