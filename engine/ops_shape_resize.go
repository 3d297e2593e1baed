package engine

// Resize (opsets 10–19) and the older Upsample.
//
// Every interpolation mode ONNX defines is separable: the reference
// implementation interpolates along the innermost axis first and then
// along each outer axis in turn. So the plan here is, per axis, a small
// table of taps (source index and weight for each output index): 1 tap
// for nearest, 2 for linear, 4 for cubic. Forward applies the axes one
// after another; Backward applies the transposed tables in reverse order,
// which gives the exact adjoint for every mode (nearest routes each output
// gradient to the one input it copied). Axes whose table is the identity
// are skipped.
//
// Coordinates follow the ONNX operator specification and its reference
// implementation: x_original is computed in float64 from the float32 scale
// (or size ratio), and "length_resized" in align_corners and
// tf_crop_and_resize is scale·length_original, which is fractional when a
// scale does not divide evenly (as the conformance data expects).

import (
	"fmt"
	"math"

	"heedmap/onnx"
	"heedmap/tensor"
)

func init() {
	register("Resize", buildResize)
	register("Upsample", buildUpsample)
}

type resizeMode uint8

const (
	resizeNearest resizeMode = iota
	resizeLinear
	resizeCubic
)

type resizeOp struct {
	opset       int64
	mode        resizeMode
	coord       string
	nearest     string
	cubicA      float64
	exclude     bool
	extrapolate float32
	axes        []int64 // opset 18; nil means all axes
	aspect      string  // opset 18 keep_aspect_ratio_policy
	upsample    bool    // Upsample: scales in attribute (opset 7) or input 1 (opset 9)
	attrScales  []float32
}

func buildResize(n *onnx.Node, env *Env) (Op, error) {
	r := &resizeOp{
		opset:       env.Opset,
		coord:       n.String("coordinate_transformation_mode", "half_pixel"),
		nearest:     n.String("nearest_mode", "round_prefer_floor"),
		cubicA:      float64(n.Float("cubic_coeff_a", -0.75)),
		exclude:     n.Int("exclude_outside", 0) != 0,
		extrapolate: n.Float("extrapolation_value", 0),
		axes:        n.Ints("axes"),
		aspect:      n.String("keep_aspect_ratio_policy", "stretch"),
	}
	switch m := n.String("mode", "nearest"); m {
	case "nearest":
		r.mode = resizeNearest
	case "linear", "bilinear", "trilinear":
		r.mode = resizeLinear
	case "cubic", "bicubic":
		r.mode = resizeCubic
	default:
		return nil, fmt.Errorf("Resize: unknown mode %q", m)
	}
	if env.Opset < 11 {
		// Resize-10 has neither attribute: it scales asymmetrically and
		// takes the floor for nearest, like Upsample.
		r.coord, r.nearest = "asymmetric", "floor"
		if r.mode == resizeCubic {
			return nil, fmt.Errorf("Resize: cubic mode needs opset 11")
		}
	}
	switch r.coord {
	case "half_pixel", "half_pixel_symmetric", "pytorch_half_pixel", "align_corners", "asymmetric", "tf_half_pixel_for_nn", "tf_crop_and_resize":
	default:
		return nil, fmt.Errorf("Resize: unknown coordinate_transformation_mode %q", r.coord)
	}
	switch r.nearest {
	case "round_prefer_floor", "round_prefer_ceil", "floor", "ceil":
	default:
		return nil, fmt.Errorf("Resize: unknown nearest_mode %q", r.nearest)
	}
	switch r.aspect {
	case "stretch", "not_larger", "not_smaller":
	default:
		return nil, fmt.Errorf("Resize: unknown keep_aspect_ratio_policy %q", r.aspect)
	}
	if n.Int("antialias", 0) != 0 {
		return nil, fmt.Errorf("Resize: antialias=1 is not supported")
	}
	return r, nil
}

// buildUpsample handles the deprecated Upsample (opsets 7–9): asymmetric
// coordinates, floor for nearest.
func buildUpsample(n *onnx.Node, env *Env) (Op, error) {
	r := &resizeOp{opset: env.Opset, coord: "asymmetric", nearest: "floor", upsample: true}
	switch m := n.String("mode", "nearest"); m {
	case "nearest":
	case "linear", "bilinear":
		r.mode = resizeLinear
	default:
		return nil, fmt.Errorf("Upsample: unknown mode %q", m)
	}
	if env.Opset < 9 {
		if r.attrScales = n.Floats("scales"); r.attrScales == nil {
			return nil, fmt.Errorf("Upsample: missing attribute scales")
		}
	}
	return r, nil
}

// resizeAxis is the tap table of one axis.
type resizeAxis struct {
	in, out int
	taps    int
	idx     []int     // out*taps source indices, already clamped
	w       []float32 // out*taps weights
	outside []bool    // tf_crop_and_resize: output index takes the extrapolation value
}

// plan computes the output shape and the per-axis tap tables (nil for
// identity axes).
func (r *resizeOp) plan(in []*tensor.Tensor) ([]int, []*resizeAxis, error) {
	x := in[0]
	rank := len(x.Shape)
	var roi []float64
	var scales []float64
	var sizes []int64
	switch {
	case r.upsample && r.attrScales != nil:
		for _, s := range r.attrScales {
			scales = append(scales, float64(s))
		}
	case r.upsample || r.opset < 11:
		s := shOptional(in, 1)
		if s == nil || s.DType != tensor.Float32 {
			return nil, nil, fmt.Errorf("Resize: scales input must be float")
		}
		for _, v := range s.F32 {
			scales = append(scales, float64(v))
		}
	default:
		if t := shOptional(in, 1); t != nil && t.Len() > 0 {
			if t.DType != tensor.Float32 {
				return nil, nil, fmt.Errorf("Resize: roi must be float, got %s", t)
			}
			for _, v := range t.F32 {
				roi = append(roi, float64(v))
			}
		}
		if t := shOptional(in, 2); t != nil && t.Len() > 0 {
			if t.DType != tensor.Float32 {
				return nil, nil, fmt.Errorf("Resize: scales must be float, got %s", t)
			}
			for _, v := range t.F32 {
				scales = append(scales, float64(v))
			}
		}
		if t := shOptional(in, 3); t != nil && t.Len() > 0 {
			var err error
			if sizes, err = shInts(t, "Resize: sizes"); err != nil {
				return nil, nil, err
			}
		}
	}
	if (scales == nil) == (sizes == nil) {
		return nil, nil, fmt.Errorf("Resize: exactly one of scales and sizes must be given")
	}
	// Axes the scales/sizes/roi refer to (opset 18 axes attribute).
	axes := make([]int, 0, rank)
	if r.axes != nil {
		for _, a := range r.axes {
			ax, err := shAxis(a, rank)
			if err != nil {
				return nil, nil, fmt.Errorf("Resize: %v", err)
			}
			axes = append(axes, ax)
		}
	} else {
		for d := 0; d < rank; d++ {
			axes = append(axes, d)
		}
	}
	k := len(axes)
	if (scales != nil && len(scales) != k) || (sizes != nil && len(sizes) != k) {
		return nil, nil, fmt.Errorf("Resize: scales/sizes length does not match %d axes", k)
	}
	if roi != nil && len(roi) != 2*k {
		return nil, nil, fmt.Errorf("Resize: roi has %d values for %d axes", len(roi), k)
	}
	scale := make([]float64, rank) // per axis, 1 where not resized
	outShape := append([]int(nil), x.Shape...)
	roiLo, roiHi := make([]float64, rank), make([]float64, rank)
	for d := range roiHi {
		roiHi[d] = 1
	}
	for i, d := range axes {
		if roi != nil {
			roiLo[d], roiHi[d] = roi[i], roi[k+i]
		}
	}
	for d := range scale {
		scale[d] = 1
	}
	if scales != nil {
		for i, d := range axes {
			if scales[i] <= 0 {
				return nil, nil, fmt.Errorf("Resize: non-positive scale %g", scales[i])
			}
			scale[d] = scales[i]
			span := 1.0
			if r.coord == "tf_crop_and_resize" {
				span = roiHi[d] - roiLo[d]
			}
			outShape[d] = int(float64(x.Shape[d]) * span * scales[i])
		}
	} else {
		if r.aspect != "stretch" {
			s := math.Inf(1)
			if r.aspect == "not_smaller" {
				s = math.Inf(-1)
			}
			for i, d := range axes {
				v := float64(sizes[i]) / float64(x.Shape[d])
				if r.aspect == "not_larger" {
					s = math.Min(s, v)
				} else {
					s = math.Max(s, v)
				}
			}
			for _, d := range axes {
				scale[d] = s
				outShape[d] = int(math.Floor(s*float64(x.Shape[d]) + 0.5))
			}
		} else {
			for i, d := range axes {
				if sizes[i] < 0 {
					return nil, nil, fmt.Errorf("Resize: negative size %d", sizes[i])
				}
				outShape[d] = int(sizes[i])
				scale[d] = float64(sizes[i]) / float64(x.Shape[d])
			}
		}
	}
	plan := make([]*resizeAxis, rank)
	for d := 0; d < rank; d++ {
		ax, err := r.axisPlan(x.Shape[d], outShape[d], scale[d], roiLo[d], roiHi[d])
		if err != nil {
			return nil, nil, err
		}
		plan[d] = ax
	}
	return outShape, plan, nil
}

// axisPlan builds one axis's taps; nil when the axis maps identically.
func (r *resizeOp) axisPlan(in, out int, scale, roiLo, roiHi float64) (*resizeAxis, error) {
	if in == 0 && out > 0 {
		return nil, fmt.Errorf("Resize: cannot resize an empty axis")
	}
	taps := 1
	switch r.mode {
	case resizeLinear:
		taps = 2
	case resizeCubic:
		taps = 4
	}
	ax := &resizeAxis{in: in, out: out, taps: taps, idx: make([]int, out*taps), w: make([]float32, out*taps)}
	outW := scale * float64(in) // "length_resized" as the reference computes it
	identity := in == out
	for j := 0; j < out; j++ {
		xo, outside := r.coordinate(float64(j), scale, float64(in), outW, float64(out), roiLo, roiHi)
		if outside {
			if ax.outside == nil {
				ax.outside = make([]bool, out)
			}
			ax.outside[j] = true
			identity = false
			continue
		}
		i0 := math.Floor(xo)
		ratio := xo - i0
		base := int(i0)
		ids := ax.idx[j*taps : (j+1)*taps]
		ws := ax.w[j*taps : (j+1)*taps]
		switch r.mode {
		case resizeNearest:
			pick := base
			if ratio > 0 {
				up := false
				switch r.nearest {
				case "round_prefer_floor":
					up = ratio > 0.5
				case "round_prefer_ceil":
					up = ratio >= 0.5
				case "ceil":
					up = true
				}
				if up {
					pick++
				}
			}
			ids[0], ws[0] = pick, 1
		case resizeLinear:
			ids[0], ws[0] = base, float32(1-ratio)
			ids[1], ws[1] = base+1, float32(ratio)
		case resizeCubic:
			c := cubicCoeffs(ratio, r.cubicA)
			sum := 0.0
			for t := 0; t < 4; t++ {
				ids[t] = base - 1 + t
				if r.exclude && (ids[t] < 0 || ids[t] >= in) {
					c[t] = 0
				}
				sum += c[t]
			}
			for t := 0; t < 4; t++ {
				if r.exclude {
					c[t] /= sum
				}
				ws[t] = float32(c[t])
			}
		}
		for t := range ids {
			ids[t] = max(0, min(in-1, ids[t]))
			if ws[t] != 0 && (ids[t] != j || ws[t] != 1) {
				identity = false
			}
		}
	}
	if identity {
		return nil, nil
	}
	return ax, nil
}

// coordinate maps output index x to the input coordinate.
func (r *resizeOp) coordinate(x, scale, in, outW, outInt, roiLo, roiHi float64) (float64, bool) {
	switch r.coord {
	case "align_corners":
		if outW == 1 {
			return 0, false
		}
		return x * (in - 1) / (outW - 1), false
	case "asymmetric":
		return x / scale, false
	case "tf_half_pixel_for_nn":
		return (x + 0.5) / scale, false
	case "pytorch_half_pixel":
		if outW == 1 {
			return -0.5, false
		}
		return (x+0.5)/scale - 0.5, false
	case "half_pixel_symmetric":
		adj := outInt / outW
		center := in / 2
		return center*(1-adj) + (x+0.5)/scale - 0.5, false
	case "tf_crop_and_resize":
		var xo float64
		if outW == 1 {
			xo = (roiHi - roiLo) * (in - 1) / 2
		} else {
			xo = x * (roiHi - roiLo) * (in - 1) / (outW - 1)
		}
		xo += roiLo * (in - 1)
		return xo, xo < 0 || xo > in-1
	}
	return (x+0.5)/scale - 0.5, false // half_pixel
}

// cubicCoeffs are the Keys cubic convolution weights for the four taps
// floor(x)-1 … floor(x)+2 at fractional offset t (R. Keys, "Cubic
// convolution interpolation for digital image processing", IEEE Trans.
// ASSP 29(6), 1981), with ONNX's default a = -0.75.
func cubicCoeffs(t, a float64) [4]float64 {
	w := func(d float64) float64 {
		d = math.Abs(d)
		switch {
		case d <= 1:
			return ((a+2)*d-(a+3))*d*d + 1
		case d < 2:
			return ((a*d-5*a)*d+8*a)*d - 4*a
		}
		return 0
	}
	return [4]float64{w(t + 1), w(t), w(1 - t), w(2 - t)}
}

// resizeApply resamples src (shape) along axis d with table ax.
func resizeApply(src []float32, shape []int, d int, ax *resizeAxis, extrap float32) ([]float32, []int) {
	outer := tensor.Numel(shape[:d])
	inner := tensor.Numel(shape[d+1:])
	dst := make([]float32, outer*ax.out*inner)
	for o := 0; o < outer; o++ {
		s := src[o*ax.in*inner : (o+1)*ax.in*inner]
		for j := 0; j < ax.out; j++ {
			row := dst[(o*ax.out+j)*inner : (o*ax.out+j+1)*inner]
			if ax.outside != nil && ax.outside[j] {
				for i := range row {
					row[i] = extrap
				}
				continue
			}
			for t := 0; t < ax.taps; t++ {
				w := ax.w[j*ax.taps+t]
				if w == 0 {
					continue
				}
				sr := s[ax.idx[j*ax.taps+t]*inner:]
				for i := range row {
					row[i] += w * sr[i]
				}
			}
		}
	}
	out := append([]int(nil), shape...)
	out[d] = ax.out
	return dst, out
}

// resizeAdjoint is the transpose of resizeApply: it maps a gradient of the
// resampled shape back to the shape before axis d was resampled.
func resizeAdjoint(g []float32, shape []int, d int, ax *resizeAxis) ([]float32, []int) {
	outer := tensor.Numel(shape[:d])
	inner := tensor.Numel(shape[d+1:])
	dst := make([]float32, outer*ax.in*inner)
	for o := 0; o < outer; o++ {
		gs := dst[o*ax.in*inner : (o+1)*ax.in*inner]
		for j := 0; j < ax.out; j++ {
			if ax.outside != nil && ax.outside[j] {
				continue
			}
			row := g[(o*ax.out+j)*inner : (o*ax.out+j+1)*inner]
			for t := 0; t < ax.taps; t++ {
				w := ax.w[j*ax.taps+t]
				if w == 0 {
					continue
				}
				sr := gs[ax.idx[j*ax.taps+t]*inner:]
				for i, v := range row {
					sr[i] += w * v
				}
			}
		}
	}
	in := append([]int(nil), shape...)
	in[d] = ax.in
	return dst, in
}

func (r *resizeOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	if err := shNeed(in, 1, "Resize"); err != nil {
		return nil, err
	}
	x := in[0]
	if x.DType != tensor.Float32 {
		return nil, fmt.Errorf("Resize: only float input is supported, got %s", x)
	}
	outShape, plan, err := r.plan(in)
	if err != nil {
		return nil, err
	}
	data, shape := x.F32, x.Shape
	for d := len(plan) - 1; d >= 0; d-- { // innermost axis first, as the reference nests
		if plan[d] != nil {
			data, shape = resizeApply(data, shape, d, plan[d], r.extrapolate)
		}
	}
	if len(data) > 0 && len(x.F32) > 0 && &data[0] == &x.F32[0] {
		data = append([]float32(nil), data...)
	}
	return []*tensor.Tensor{{DType: tensor.Float32, Shape: outShape, F32: data}}, nil
}

func (r *resizeOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	grads := make([]*tensor.Tensor, len(in))
	g := gradOut[0]
	if g == nil {
		return grads, nil
	}
	_, plan, err := r.plan(in)
	if err != nil {
		return nil, err
	}
	data, shape := g.F32, g.Shape
	for d := 0; d < len(plan); d++ { // reverse of the forward order
		if plan[d] != nil {
			data, shape = resizeAdjoint(data, shape, d, plan[d])
		}
	}
	grads[0] = &tensor.Tensor{DType: tensor.Float32, Shape: append([]int(nil), in[0].Shape...), F32: ownCopy(data, g.F32)}
	return grads, nil
}

// BackwardNeeds: roi, scales and sizes; X contributes only its shape.
func (r *resizeOp) BackwardNeeds() (in, out []int) { return []int{1, 2, 3}, nil }
