package engine

import (
	"fmt"

	"heedmap/onnx"
	"heedmap/tensor"
)

// windowAttrs are the sliding-window attributes shared by Conv and the
// pooling operators, as written in the node. Geometry is resolved per input
// size at run time because auto_pad depends on it.
type windowAttrs struct {
	kernel    []int64 // kernel_shape; nil for Conv when taken from W
	strides   []int64
	dilations []int64
	pads      []int64 // [x1_begin, x2_begin, ..., x1_end, x2_end, ...]
	autoPad   string
	ceil      bool
}

func parseWindow(n *onnx.Node) (windowAttrs, error) {
	w := windowAttrs{
		kernel:    n.Ints("kernel_shape"),
		strides:   n.Ints("strides"),
		dilations: n.Ints("dilations"),
		pads:      n.Ints("pads"),
		autoPad:   n.String("auto_pad", "NOTSET"),
		ceil:      n.Int("ceil_mode", 0) != 0,
	}
	switch w.autoPad {
	case "NOTSET", "SAME_UPPER", "SAME_LOWER", "VALID", "":
	default:
		return w, fmt.Errorf("auto_pad %q not one of NOTSET, SAME_UPPER, SAME_LOWER, VALID", w.autoPad)
	}
	if w.autoPad != "NOTSET" && w.autoPad != "" && w.pads != nil {
		// ONNX forbids both; exporters occasionally write zero pads anyway.
		for _, p := range w.pads {
			if p != 0 {
				return w, fmt.Errorf("pads %v given together with auto_pad %s", w.pads, w.autoPad)
			}
		}
	}
	for _, v := range w.kernel {
		if v < 1 {
			return w, fmt.Errorf("kernel_shape %v has a non-positive entry", w.kernel)
		}
	}
	for _, v := range w.strides {
		if v < 1 {
			return w, fmt.Errorf("strides %v has a non-positive entry", w.strides)
		}
	}
	for _, v := range w.dilations {
		if v < 1 {
			return w, fmt.Errorf("dilations %v has a non-positive entry", w.dilations)
		}
	}
	for _, v := range w.pads {
		if v < 0 {
			return w, fmt.Errorf("pads %v has a negative entry", w.pads)
		}
	}
	return w, nil
}

// geom2 is a resolved 2-D window: a 1-D window is lifted to 2-D with a
// height of 1, so every kernel is written once.
type geom2 struct {
	ih, iw         int
	kh, kw         int
	sh, sw         int
	dh, dw         int
	pt, pl, pb, pr int
	oh, ow         int
}

// pointwise reports a 1×1 window at unit stride without padding: the
// output positions are the input's, so a convolution's column matrix is
// its input itself.
func (g geom2) pointwise() bool {
	return g.kh == 1 && g.kw == 1 && g.sh == 1 && g.sw == 1 && g.pt == 0 && g.pl == 0 && g.pb == 0 && g.pr == 0
}

// resolve computes the output geometry for spatial input dims in (length
// 1 or 2) and kernel dims k, following the ONNX output-size formulas:
// explicit pads give floor((in+pads-ek)/s)+1 (ceil with ceil_mode, dropping
// a last window that would start in the end padding, as in PyTorch);
// SAME_* give ceil(in/s) with the odd pad at the end (UPPER) or start
// (LOWER); VALID gives ceil((in-ek+1)/s).
func (w *windowAttrs) resolve(in, k []int) (geom2, error) {
	r := len(in)
	if r != 1 && r != 2 {
		return geom2{}, fmt.Errorf("%d spatial dimensions; only 1-D and 2-D windows are supported", r)
	}
	if len(k) != r {
		return geom2{}, fmt.Errorf("kernel %v for %d spatial dimensions", k, r)
	}
	get := func(a []int64, name string, def int) ([]int, error) {
		out := make([]int, r)
		for i := range out {
			out[i] = def
		}
		if a == nil {
			return out, nil
		}
		if len(a) != r {
			return nil, fmt.Errorf("%s %v for %d spatial dimensions", name, a, r)
		}
		for i, v := range a {
			out[i] = int(v)
		}
		return out, nil
	}
	s, err := get(w.strides, "strides", 1)
	if err != nil {
		return geom2{}, err
	}
	d, err := get(w.dilations, "dilations", 1)
	if err != nil {
		return geom2{}, err
	}
	pb, pe := make([]int, r), make([]int, r)
	if w.pads != nil && (w.autoPad == "NOTSET" || w.autoPad == "") {
		if len(w.pads) != 2*r {
			return geom2{}, fmt.Errorf("pads %v for %d spatial dimensions", w.pads, r)
		}
		for i := 0; i < r; i++ {
			pb[i], pe[i] = int(w.pads[i]), int(w.pads[r+i])
		}
	}
	out := make([]int, r)
	for i := 0; i < r; i++ {
		ek := (k[i]-1)*d[i] + 1
		switch w.autoPad {
		case "SAME_UPPER", "SAME_LOWER":
			out[i] = (in[i] + s[i] - 1) / s[i]
			total := max(0, (out[i]-1)*s[i]+ek-in[i])
			if w.autoPad == "SAME_UPPER" {
				pb[i] = total / 2
			} else {
				pb[i] = total - total/2
			}
			pe[i] = total - pb[i]
		case "VALID":
			if in[i] < ek {
				return geom2{}, fmt.Errorf("input size %d smaller than the dilated kernel %d", in[i], ek)
			}
			out[i] = (in[i]-ek)/s[i] + 1
		default:
			span := in[i] + pb[i] + pe[i] - ek
			if span < 0 {
				return geom2{}, fmt.Errorf("padded input size %d smaller than the dilated kernel %d", in[i]+pb[i]+pe[i], ek)
			}
			if w.ceil {
				out[i] = (span+s[i]-1)/s[i] + 1
				if (out[i]-1)*s[i] >= in[i]+pb[i] {
					out[i]--
				}
			} else {
				out[i] = span/s[i] + 1
			}
		}
	}
	if r == 1 {
		return geom2{ih: 1, iw: in[0], kh: 1, kw: k[0], sh: 1, sw: s[0], dh: 1, dw: d[0], pl: pb[0], pr: pe[0], oh: 1, ow: out[0]}, nil
	}
	return geom2{ih: in[0], iw: in[1], kh: k[0], kw: k[1], sh: s[0], sw: s[1], dh: d[0], dw: d[1],
		pt: pb[0], pl: pb[1], pb: pe[0], pr: pe[1], oh: out[0], ow: out[1]}, nil
}

// outShape is the N, C, spatial... output shape for a window result.
func (g geom2) outShape(n, c, spatial int) []int {
	if spatial == 1 {
		return []int{n, c, g.ow}
	}
	return []int{n, c, g.oh, g.ow}
}

func int64sToInts(a []int64) []int {
	out := make([]int, len(a))
	for i, v := range a {
		out[i] = int(v)
	}
	return out
}

// wantFloat checks that t is a float32 tensor of at least minRank dims with
// consistent data.
func wantFloat(t *tensor.Tensor, what string, minRank int) error {
	if t == nil {
		return fmt.Errorf("%s missing", what)
	}
	if t.DType != tensor.Float32 {
		return fmt.Errorf("%s is %s, want float32", what, t.DType)
	}
	if len(t.Shape) < minRank {
		return fmt.Errorf("%s has shape %v, want at least %d dimensions", what, t.Shape, minRank)
	}
	if len(t.F32) != tensor.Numel(t.Shape) {
		return fmt.Errorf("%s has %d values for shape %v", what, len(t.F32), t.Shape)
	}
	return nil
}
