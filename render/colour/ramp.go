package colour

import (
	"fmt"
	"image/color"
	"math"
)

// Stop is a ramp control point: a colour in OKLCh at position T in [0, 1].
type Stop struct {
	T float64
	OKLCh
}

// Ramp is a colour ramp sampled once into a 256-entry sRGB lookup table.
// Between stops L, C and h are interpolated linearly (h along the shorter
// arc), then each sample is brought into the sRGB gamut by ClipChroma, so
// the lightness profile is exactly the piecewise-linear one of the stops.
// A Ramp is immutable and safe for concurrent use.
type Ramp struct {
	name  string
	stops []Stop
	lut   [256]color.NRGBA
}

// NewRamp samples the stops into a lookup table. Stops must start at T = 0,
// end at T = 1, increase strictly, and have L in [0, 1] and C ≥ 0.
func NewRamp(name string, stops []Stop) (*Ramp, error) {
	if len(stops) < 2 {
		return nil, fmt.Errorf("colour: ramp %q: need at least 2 stops, got %d", name, len(stops))
	}
	if stops[0].T != 0 || stops[len(stops)-1].T != 1 {
		return nil, fmt.Errorf("colour: ramp %q: stops must span T = 0 to 1", name)
	}
	for i, s := range stops {
		if i > 0 && !(s.T > stops[i-1].T) {
			return nil, fmt.Errorf("colour: ramp %q: stop %d: T %.4g does not increase", name, i, s.T)
		}
		if !(s.L >= 0 && s.L <= 1) || !(s.C >= 0) || math.IsNaN(s.H) {
			return nil, fmt.Errorf("colour: ramp %q: stop %d: L %.4g, C %.4g, h %.4g out of range", name, i, s.L, s.C, s.H)
		}
	}
	r := &Ramp{name: name, stops: append([]Stop(nil), stops...)}
	for i := range r.lut {
		b := ClipChroma(r.sample(float64(i) / 255).Lab()).Linear().Bytes()
		r.lut[i] = color.NRGBA{b[0], b[1], b[2], 255}
	}
	return r, nil
}

// sample interpolates the stops at t in [0, 1] without gamut clipping.
func (r *Ramp) sample(t float64) OKLCh {
	k := 1
	for k < len(r.stops)-1 && t > r.stops[k].T {
		k++
	}
	p, q := r.stops[k-1], r.stops[k]
	u := (t - p.T) / (q.T - p.T)
	hp, hq := p.H, q.H
	// An achromatic stop has no hue; borrow the neighbour's so the chroma
	// fades without a hue swing.
	if p.C == 0 {
		hp = hq
	}
	if q.C == 0 {
		hq = hp
	}
	dh := math.Mod(hq-hp+540, 360) - 180 // shorter arc, in [-180, 180)
	h := math.Mod(hp+u*dh+360, 360)
	return OKLCh{p.L + u*(q.L-p.L), p.C + u*(q.C-p.C), h}
}

// Name returns the ramp's name.
func (r *Ramp) Name() string { return r.name }

// Stops returns a copy of the control points.
func (r *Ramp) Stops() []Stop { return append([]Stop(nil), r.stops...) }

// LUT returns a copy of the 256-entry table; entry i is the ramp at i/255.
func (r *Ramp) LUT() [256]color.NRGBA { return r.lut }

// Entry returns table entry i, clamped to [0, 255].
func (r *Ramp) Entry(i int) color.NRGBA {
	return r.lut[max(0, min(255, i))]
}

// At returns the table entry nearest to t, with t clamped to [0, 1];
// NaN maps to entry 0.
func (r *Ramp) At(t float64) color.NRGBA { return r.lut[Index(t)] }

// Index maps t in [0, 1] to the nearest table index, clamping outside
// values; NaN maps to 0.
func Index(t float64) int {
	if !(t > 0) {
		return 0
	}
	if t >= 1 {
		return 255
	}
	return int(math.Round(t * 255))
}
