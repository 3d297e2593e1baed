package explain

import (
	"context"
	"fmt"
	"math"
	"strconv"

	"heedmap/tensor"
)

// Method is one attribution method. Attribute explains target's score for
// a single image x [1, C, H, W] in model-input space (already preprocessed).
// Methods are deterministic: the same options (including Seed), network and
// input give byte-identical maps, whatever the batch size.
type Method interface {
	Name() string
	Attribute(ctx context.Context, net Network, x *tensor.Tensor, target Target) (*Result, error)
}

// Result is an attribution in model-input space.
type Result struct {
	Method string
	Target Target // resolved: Classes filled in
	// Map is the method's map as its paper defines it: signed and summed
	// over channels, except the plain gradient and SmoothGrad over it, whose
	// map is the maximum over channels of |gradient| (Simonyan et al. 2014).
	Map Map
	// Signed is the signed channel sum for methods with per-channel
	// attributions (equal to Map for all but the gradient family); for
	// Grad-CAM, RISE and occlusion it equals Map. Signed is the method
	// output as the tool defines it for every method (float32, model-input
	// space, signed, summed over channels): the map to save as NPY.
	Signed Map
	// Channels holds per-channel attributions [1, C, H, W] where the method
	// has them, else nil.
	Channels *tensor.Tensor
	// Score is the target's score at x.
	Score float64
	// Baseline and Gap: integrated gradients' score at the baseline and
	// completeness gap |Σ IG − (F(x) − F(x′))| / |F(x) − F(x′)|; NaN for
	// other methods.
	Baseline, Gap float64
	// Coarse is Grad-CAM's map at the layer's resolution, before upsampling.
	Coarse *Map
	// Warnings are conditions a user should be told about.
	Warnings []string
	// Params are the settings the method used, defaults resolved, in a
	// fixed order, so that every output can state them (the target and
	// score kind are in Target). Settings that cannot change the map, such
	// as the batch size, are left out.
	Params []Param
}

// Param is one named setting of a method, formatted for a report.
type Param struct{ Name, Value string }

// Param returns the value of the named setting and whether it is present.
func (r *Result) Param(name string) (string, bool) {
	for _, p := range r.Params {
		if p.Name == name {
			return p.Value, true
		}
	}
	return "", false
}

func (r *Result) param(name string, v any) {
	var s string
	switch v := v.(type) {
	case float64:
		s = strconv.FormatFloat(v, 'g', -1, 64)
	case float32:
		s = strconv.FormatFloat(float64(v), 'g', -1, 32)
	default:
		s = fmt.Sprint(v)
	}
	r.Params = append(r.Params, Param{name, s})
}

func newResult(name string, t Target, score float64) *Result {
	return &Result{Method: name, Target: t, Score: score, Baseline: math.NaN(), Gap: math.NaN()}
}

// NewResult returns a Result for a method implemented outside this package
// (e.g. occlusion), with Baseline and Gap NaN.
func NewResult(method string, t Target, score float64) *Result { return newResult(method, t, score) }

// AddParam records a setting on r (see Result.Params); floats are written
// in their shortest exact form.
func (r *Result) AddParam(name string, v any) { r.param(name, v) }

// geometry validates x against the network and returns C, H, W.
func geometry(net Network, x *tensor.Tensor) (c, h, w int, err error) {
	if x == nil || x.DType != tensor.Float32 || len(x.Shape) != 4 || x.Shape[0] != 1 {
		return 0, 0, 0, fmt.Errorf("explain: input must be a float [1, C, H, W] tensor, got %v", x)
	}
	if len(x.F32) != x.Len() {
		return 0, 0, 0, fmt.Errorf("explain: input %v has %d values", x, len(x.F32))
	}
	in := net.InputShape()
	if len(in) != 4 {
		return 0, 0, 0, fmt.Errorf("explain: network input shape %v is not 4-D", in)
	}
	for i := 1; i < 4; i++ {
		if in[i] > 0 && in[i] != x.Shape[i] {
			return 0, 0, 0, fmt.Errorf("explain: input %v does not fit the network input shape %v", x, in)
		}
	}
	return x.Shape[1], x.Shape[2], x.Shape[3], nil
}

// requestedBatch is the batch asked for: the network's fixed batch if it
// has one, else the requested size (default 16).
func requestedBatch(net Network, want int) int {
	if n := net.InputShape()[0]; n > 0 {
		return n
	}
	if want <= 0 {
		return 16
	}
	return want
}

// BatchSizer is implemented by networks that measure how much memory one
// image takes in a pass. MaxBatch is the largest batch whose activations
// fit the network's budget (at least 1), or 0 while no pass of that kind
// (forward only, or forward for a gradient) has been measured.
type BatchSizer interface {
	MaxBatch(backward bool) int
}

// batchSize is the batch to use: requestedBatch, capped by what a
// BatchSizer network says fits its budget. A network with a fixed batch
// keeps it. When the network sizes batches but has not measured a pass of
// this kind, batchSize returns 1 and probe: the caller runs one image and
// asks again with probe false, which then falls back to the request.
func batchSize(net Network, want int, backward, probe bool) (int, bool) {
	b := requestedBatch(net, want)
	s, ok := net.(BatchSizer)
	if !ok || net.InputShape()[0] > 0 {
		return b, false
	}
	switch m := s.MaxBatch(backward); {
	case m > 0:
		return min(b, m), false
	case probe && b > 1:
		return 1, true
	}
	return b, false
}

// batcher hands out the input batches of one method's n evaluations:
// batchSize's size, probed with one image first when the network sizes its
// batches, in one buffer reused from batch to batch.
type batcher struct {
	net      Network
	want     int
	backward bool
	img      []int
	size     int
	b, m     int // batch size; images in the last batch handed out
	probe    bool
	buf      *tensor.Tensor
}

func newBatcher(net Network, img []int, want int, backward bool) *batcher {
	bt := &batcher{net: net, want: want, backward: backward, img: img, size: tensor.Numel(img)}
	bt.b, bt.probe = batchSize(net, want, backward, true)
	return bt
}

// next fills the batch of images start, start+1, ... (at most n in all)
// with fill and returns it with the number of real images in it. A network
// with a fixed batch gets the last image repeated to fill it.
func (bt *batcher) next(start, n int, fill func(i int, dst []float32)) (*tensor.Tensor, int) {
	if bt.m > 0 && bt.probe {
		bt.b, bt.probe = batchSize(bt.net, bt.want, bt.backward, false)
	}
	if bt.buf == nil || bt.buf.Shape[0] < bt.b {
		bt.buf = tensor.New(append([]int{bt.b}, bt.img...)...)
	}
	m := min(bt.b, n-start)
	x := bt.buf
	if bt.net.InputShape()[0] <= 0 && x.Shape[0] != m {
		x = tensor.FromFloat32(bt.buf.F32[:m*bt.size], append([]int{m}, bt.img...)...)
	}
	for j := 0; j < x.Shape[0]; j++ {
		fill(start+min(j, m-1), x.F32[j*bt.size:(j+1)*bt.size])
	}
	bt.m = m
	return x, m
}

// ran is the number of images in the last batch handed out.
func (bt *batcher) ran() int { return bt.m }

// ForwardScores evaluates n inputs of one image's shape img = (C, H, W),
// written by fill(i, dst), through net.Forward in batches, and returns the
// target's score for each. Batches of a network with a fixed batch size are
// padded with copies of the last input. target must be resolved.
func ForwardScores(ctx context.Context, net Network, n int, img []int, batch int, fill func(i int, dst []float32), target Target) ([]float64, error) {
	bt := newBatcher(net, img, batch, false)
	out := make([]float64, 0, n)
	for start := 0; start < n; start += bt.ran() {
		if err := ctx.Err(); err != nil {
			return nil, err
		}
		x, m := bt.next(start, n, fill)
		logits, err := net.Forward(ctx, x)
		if err != nil {
			return nil, err
		}
		s, err := target.Scores(logits)
		if err != nil {
			return nil, err
		}
		if len(s) < m {
			return nil, fmt.Errorf("explain: network returned %d rows for a batch of %d", len(s), m)
		}
		out = append(out, s[:m]...)
	}
	return out, nil
}

// gradients runs n inputs written by fill through net.Gradient in batches
// and hands each input's gradients to visit (slices into the batch result,
// valid only during the call). target must be resolved.
func gradients(ctx context.Context, net Network, n int, img []int, batch int, fill func(i int, dst []float32), target Target, layer string,
	visit func(i int, logits, grad, act, actGrad []float32) error) error {
	bt := newBatcher(net, img, batch, true)
	size := tensor.Numel(img)
	seed := target.Seed()
	for start := 0; start < n; start += bt.ran() {
		if err := ctx.Err(); err != nil {
			return err
		}
		x, m := bt.next(start, n, fill)
		g, err := net.Gradient(ctx, x, seed, layer)
		if err != nil {
			return err
		}
		if g.Input == nil || len(g.Input.F32) != len(x.F32) {
			return fmt.Errorf("explain: network returned no input gradient of shape %v", x.Shape)
		}
		_, k, err := logitsShape(g.Logits)
		if err != nil {
			return err
		}
		var al, agl int
		if layer != "" {
			if g.Layer == nil || g.LayerGrad == nil || len(g.Layer.F32) != len(g.LayerGrad.F32) || len(g.Layer.F32)%x.Shape[0] != 0 {
				return fmt.Errorf("explain: network returned no activation/gradient for layer %q", layer)
			}
			al = len(g.Layer.F32) / x.Shape[0]
			agl = al
		}
		for j := 0; j < m; j++ {
			var act, actGrad []float32
			if layer != "" {
				act, actGrad = g.Layer.F32[j*al:(j+1)*al], g.LayerGrad.F32[j*agl:(j+1)*agl]
			}
			if err := visit(start+j, g.Logits.F32[j*k:(j+1)*k], g.Input.F32[j*size:(j+1)*size], act, actGrad); err != nil {
				return err
			}
		}
		// visit's slices are dead now: the next batch may reuse them.
		if r, ok := net.(gradientRecycler); ok {
			r.recycle(g)
		}
	}
	return nil
}

// Logits runs one image x [1, C, H, W] forward and returns its logits. A
// network with a fixed batch size gets the image repeated; row 0 is read.
func Logits(ctx context.Context, net Network, x *tensor.Tensor) ([]float32, error) {
	in := x
	if b := net.InputShape()[0]; b > 1 {
		in = tensor.New(append([]int{b}, x.Shape[1:]...)...)
		for j := 0; j < b; j++ {
			copy(in.F32[j*len(x.F32):], x.F32)
		}
	}
	logits, err := net.Forward(ctx, in)
	if err != nil {
		return nil, err
	}
	if _, _, err := logitsShape(logits); err != nil {
		return nil, err
	}
	return logits.F32[:logits.Shape[1]], nil
}

// resolve runs x forward once and resolves the target on its logits.
func resolve(ctx context.Context, net Network, x *tensor.Tensor, target Target) (Target, float64, error) {
	logits, err := Logits(ctx, net, x)
	if err != nil {
		return target, 0, err
	}
	t, err := target.Resolve(logits)
	if err != nil {
		return t, 0, err
	}
	return t, t.Eval(logits, nil), nil
}

// channelSum is Σ_c a[c, y, x] over a [C, H, W] slice of float64.
func channelSum(a []float64, c, h, w int) Map {
	m := Map{W: w, H: h, Data: make([]float32, h*w)}
	for i := range m.Data {
		var s float64
		for k := 0; k < c; k++ {
			s += a[k*h*w+i]
		}
		m.Data[i] = float32(s)
	}
	return m
}

// maxAbs is max_c |a[c, y, x]|.
func maxAbs(a []float64, c, h, w int) Map {
	m := Map{W: w, H: h, Data: make([]float32, h*w)}
	for i := range m.Data {
		var s float64
		for k := 0; k < c; k++ {
			s = math.Max(s, math.Abs(a[k*h*w+i]))
		}
		m.Data[i] = float32(s)
	}
	return m
}

func toTensor(a []float64, c, h, w int) *tensor.Tensor {
	t := tensor.New(1, c, h, w)
	for i, v := range a {
		t.F32[i] = float32(v)
	}
	return t
}
