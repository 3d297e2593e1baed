package explain

import "fmt"

// Normalization describes how preprocessing turned 0–1 RGB pixels into model
// input values, so that methods can express colours (black, a fill colour, a
// noise baseline) in model-input space:
//
//	v[c] = (rgb[src(c)] − Mean[c]) / Std[c]    when Mean or Std is set
//	v[c] = Range · rgb[src(c)]                 otherwise
//
// where src(c) is c for RGB order and 2−c for BGR. Mean and Std are on the
// 0–1 scale, so a model fed 0–255 values with mean/std in 0–255 units is
// described by dividing both by 255 (the Range factor cancels). The zero
// value means "no normalisation, 0–1 inputs, RGB order": model zero is then
// black.
type Normalization struct {
	Mean  [3]float32 // per model channel, 0–1 scale; all zero = none
	Std   [3]float32 // per model channel, 0–1 scale; zero entries mean 1
	Range float32    // pixel scale before Mean/Std: 1 (default when 0) or 255
	BGR   bool       // model channel 0 is blue
}

// Normalized reports whether a mean/std normalisation is in effect, in which
// case the model-space zero is the mean colour rather than black.
func (n Normalization) Normalized() bool {
	return n.Mean != [3]float32{}
}

// Pixel maps a 0–1 RGB colour to the model-input values of the three model
// channels (in model channel order).
func (n Normalization) Pixel(rgb [3]float32) [3]float32 {
	r := n.Range
	if r == 0 {
		r = 1
	}
	var out [3]float32
	for c := 0; c < 3; c++ {
		src := c
		if n.BGR {
			src = 2 - c
		}
		s := n.Std[c]
		if s == 0 {
			s = 1
		}
		// With Mean/Std on the 0–1 scale, the Range factor cancels; without
		// normalisation it scales 0–1 pixels to 0–Range.
		if n.Normalized() || n.Std != [3]float32{} {
			out[c] = (rgb[src] - n.Mean[c]) / s
		} else {
			out[c] = r * rgb[src]
		}
	}
	return out
}

// Validate reports a malformed normalisation.
func (n Normalization) Validate() error {
	for c, s := range n.Std {
		if s < 0 {
			return fmt.Errorf("normalization: std[%d] = %g is negative", c, s)
		}
	}
	if n.Range < 0 {
		return fmt.Errorf("normalization: range %g is negative", n.Range)
	}
	return nil
}
