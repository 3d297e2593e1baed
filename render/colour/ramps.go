package colour

// The two ramps heedmap draws attribution maps with. The control points are
// heedmap's own, chosen in OKLCh (L, C, h in degrees):
//
// Sequential, for unsigned maps (0 → max). Lightness rises linearly from
// 0.20 to 0.96 so magnitude reads as brightness even in greyscale; the hue
// turns from indigo through plum, rose and amber to a pale lemon, keeping
// chroma moderate so that gamut clipping stays small:
//
//	T     L     C     h
//	0.00  0.20  0.07  275
//	0.25  0.39  0.13  320
//	0.50  0.58  0.16  10
//	0.75  0.77  0.15  60
//	1.00  0.96  0.09  105
//
// Diverging, for signed maps (−max → 0 → +max). Two hues, blue for negative
// and vermilion for positive, meet at a light neutral grey; lightness is the
// same function of |T − 0.5| on both sides, so neither sign looks stronger:
//
//	T     L      C     h
//	0.00  0.36   0.13  255
//	0.25  0.665  0.10  245
//	0.50  0.97   0.00  (none)
//	0.75  0.665  0.11  40
//	1.00  0.36   0.15  28
var (
	sequential = mustRamp("heedmap sequential", []Stop{
		{0.00, OKLCh{0.20, 0.07, 275}},
		{0.25, OKLCh{0.39, 0.13, 320}},
		{0.50, OKLCh{0.58, 0.16, 10}},
		{0.75, OKLCh{0.77, 0.15, 60}},
		{1.00, OKLCh{0.96, 0.09, 105}},
	})
	diverging = mustRamp("heedmap diverging", []Stop{
		{0.00, OKLCh{0.36, 0.13, 255}},
		{0.25, OKLCh{0.665, 0.10, 245}},
		{0.50, OKLCh{0.97, 0.00, 0}},
		{0.75, OKLCh{0.665, 0.11, 40}},
		{1.00, OKLCh{0.36, 0.15, 28}},
	})
)

// Sequential returns the ramp for unsigned maps.
func Sequential() *Ramp { return sequential }

// Diverging returns the ramp for signed maps; T = 0.5 is zero.
func Diverging() *Ramp { return diverging }

func mustRamp(name string, stops []Stop) *Ramp {
	r, err := NewRamp(name, stops)
	if err != nil {
		panic(err) // fixed tables above; reached only by a programming error
	}
	return r
}
