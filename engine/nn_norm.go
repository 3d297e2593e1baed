package engine

import (
	"fmt"
	"math"

	"heedmap/onnx"
	"heedmap/tensor"
)

func init() {
	register("BatchNormalization", buildBatchNorm)
	register("LayerNormalization", buildLayerNorm)
	register("Softmax", buildSoftmax)
}

// batchNormOp is BatchNormalization in inference mode:
// Y = scale·(X−mean)/√(var+ε) + B per channel (axis 1).
type batchNormOp struct {
	eps   float32
	arena *arena // output buffers; nil allocates
}

func buildBatchNorm(n *onnx.Node, env *Env) (Op, error) {
	if n.Int("training_mode", 0) != 0 {
		return nil, fmt.Errorf("training_mode=1 (batch statistics) is not supported; export the model in eval mode")
	}
	if env.Opset < 6 && n.Has("is_test") && n.Int("is_test", 0) == 0 {
		return nil, fmt.Errorf("is_test=0 (batch statistics) is not supported")
	}
	if n.Int("spatial", 1) != 1 {
		return nil, fmt.Errorf("spatial=0 is not supported")
	}
	if len(n.Inputs) != 5 {
		return nil, fmt.Errorf("BatchNormalization needs 5 inputs, got %d", len(n.Inputs))
	}
	for _, o := range n.Outputs[1:] {
		if o != "" {
			return nil, fmt.Errorf("running-statistics outputs (training mode) are not supported")
		}
	}
	return &batchNormOp{eps: n.Float("epsilon", 1e-5)}, nil
}

func (op *batchNormOp) check(in []*tensor.Tensor) (c, inner int, err error) {
	x := in[0]
	if err := wantFloat(x, "X", 2); err != nil {
		return 0, 0, err
	}
	c = x.Shape[1]
	for i, name := range []string{"scale", "B", "mean", "var"} {
		if err := wantFloat(in[i+1], name, 1); err != nil {
			return 0, 0, err
		}
		if in[i+1].Len() != c {
			return 0, 0, fmt.Errorf("%s %v for %d channels", name, in[i+1].Shape, c)
		}
	}
	return c, tensor.Numel(x.Shape[2:]), nil
}

func (op *batchNormOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	c, inner, err := op.check(in)
	if err != nil {
		return nil, err
	}
	x, scale, bias, mean, vr := in[0], in[1].F32, in[2].F32, in[3].F32, in[4].F32
	y := op.arena.tensor(x.Shape...)
	nc := x.Shape[0] * c
	splitWork(nc, nc*inner, func(p0, p1 int) {
		for p := p0; p < p1; p++ {
			ch := p % c
			a := scale[ch] / float32(math.Sqrt(float64(vr[ch])+float64(op.eps)))
			b := bias[ch] - a*mean[ch]
			src, dst := x.F32[p*inner:(p+1)*inner], y.F32[p*inner:(p+1)*inner]
			for i, v := range src {
				dst[i] = a*v + b
			}
		}
	})
	return []*tensor.Tensor{y}, nil
}

func (op *batchNormOp) BackwardNeeds() (in, out []int) { return []int{0, 1, 3, 4}, nil }

// BackwardNeedsFor implements SelectiveBackward: with constant statistics
// and affine parameters, dX = dY·scale/√(var+ε) does not read X, so the
// activation feeding a BatchNormalization need not be kept.
func (op *batchNormOp) BackwardNeedsFor(need []bool) (in, out []int) {
	if need[1] || need[3] || need[4] {
		return []int{0, 1, 3, 4}, nil
	}
	return []int{1, 4}, nil
}

// BackwardFor implements SelectiveBackward.
func (op *batchNormOp) BackwardFor(in, out, gradOut []*tensor.Tensor, need []bool) ([]*tensor.Tensor, error) {
	if need[1] || need[2] || need[3] || need[4] {
		return op.Backward(in, out, gradOut)
	}
	x, dy := in[0], gradOut[0]
	c, inner := x.Shape[1], tensor.Numel(x.Shape[2:])
	scale, vr := in[1].F32, in[4].F32
	dx := op.arena.tensor(x.Shape...) // every element written below
	nc := x.Shape[0] * c
	splitWork(nc, nc*inner, func(p0, p1 int) {
		for p := p0; p < p1; p++ {
			ch := p % c
			a := float32(float64(scale[ch]) / math.Sqrt(float64(vr[ch])+float64(op.eps)))
			g, d := dy.F32[p*inner:(p+1)*inner], dx.F32[p*inner:(p+1)*inner]
			for i, v := range g {
				d[i] = a * v
			}
		}
	})
	return []*tensor.Tensor{dx, nil, nil, nil, nil}, nil
}

// Backward treats mean and var as constants of the affine map (inference
// mode), so every input gets its exact partial derivative.
func (op *batchNormOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	x, dy := in[0], gradOut[0]
	c, inner := x.Shape[1], tensor.Numel(x.Shape[2:])
	scale, mean, vr := in[1].F32, in[3].F32, in[4].F32
	dx := tensor.New(x.Shape...)
	dScale, dB, dMean, dVar := tensor.New(in[1].Shape...), tensor.New(in[2].Shape...), tensor.New(in[3].Shape...), tensor.New(in[4].Shape...)
	n := x.Shape[0]
	for ch := 0; ch < c; ch++ {
		v := float64(vr[ch]) + float64(op.eps)
		inv := 1 / math.Sqrt(v)
		a := float32(float64(scale[ch]) * inv)
		var sdy, sdyxc float64
		for b := 0; b < n; b++ {
			p := b*c + ch
			g, src, d := dy.F32[p*inner:(p+1)*inner], x.F32[p*inner:(p+1)*inner], dx.F32[p*inner:(p+1)*inner]
			for i, gv := range g {
				d[i] = a * gv
				sdy += float64(gv)
				sdyxc += float64(gv) * float64(src[i]-mean[ch])
			}
		}
		dB.F32[ch] = float32(sdy)
		dScale.F32[ch] = float32(sdyxc * inv)
		dMean.F32[ch] = float32(-sdy * float64(scale[ch]) * inv)
		dVar.F32[ch] = float32(-0.5 * float64(scale[ch]) * sdyxc * inv / v)
	}
	return []*tensor.Tensor{dx, dScale, dB, dMean, dVar}, nil
}

// layerNormOp is LayerNormalization (opset 17): each slice X[i, axis:] is
// normalised by its own mean and variance, then scaled and shifted
// (Ba, Kiros & Hinton, "Layer Normalization", 2016). Statistics are
// accumulated in float64.
type layerNormOp struct {
	axis int64
	eps  float64
}

func buildLayerNorm(n *onnx.Node, env *Env) (Op, error) {
	if len(n.Inputs) < 2 {
		return nil, fmt.Errorf("LayerNormalization needs X and Scale")
	}
	return &layerNormOp{axis: n.Int("axis", -1), eps: float64(n.Float("epsilon", 1e-5))}, nil
}

func (op *layerNormOp) split(shape []int) (outer, inner, axis int, err error) {
	axis = int(op.axis)
	if axis < 0 {
		axis += len(shape)
	}
	if axis < 0 || axis >= len(shape) {
		return 0, 0, 0, fmt.Errorf("axis %d out of range for shape %v", op.axis, shape)
	}
	return tensor.Numel(shape[:axis]), tensor.Numel(shape[axis:]), axis, nil
}

// stats returns the per-row mean and 1/√(var+ε).
func (op *layerNormOp) stats(x []float32, outer, inner int) (mean, rstd []float64) {
	mean, rstd = make([]float64, outer), make([]float64, outer)
	for r := 0; r < outer; r++ {
		row := x[r*inner : (r+1)*inner]
		var s float64
		for _, v := range row {
			s += float64(v)
		}
		m := s / float64(inner)
		var ss float64
		for _, v := range row {
			d := float64(v) - m
			ss += d * d
		}
		mean[r], rstd[r] = m, 1/math.Sqrt(ss/float64(inner)+op.eps)
	}
	return mean, rstd
}

func (op *layerNormOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	x := in[0]
	if err := wantFloat(x, "X", 1); err != nil {
		return nil, err
	}
	outer, inner, axis, err := op.split(x.Shape)
	if err != nil {
		return nil, err
	}
	if err := wantFloat(in[1], "Scale", 0); err != nil {
		return nil, err
	}
	if in[1].Len() != inner {
		return nil, fmt.Errorf("Scale %v for normalised shape %v", in[1].Shape, x.Shape[axis:])
	}
	var bias []float32
	if len(in) > 2 && in[2] != nil {
		if err := wantFloat(in[2], "B", 0); err != nil {
			return nil, err
		}
		if in[2].Len() != inner {
			return nil, fmt.Errorf("B %v for normalised shape %v", in[2].Shape, x.Shape[axis:])
		}
		bias = in[2].F32
	}
	mean, rstd := op.stats(x.F32, outer, inner)
	y := tensor.New(x.Shape...)
	statShape := append([]int(nil), x.Shape...)
	for i := axis; i < len(statShape); i++ {
		statShape[i] = 1
	}
	mt, rt := tensor.New(statShape...), tensor.New(statShape...)
	scale := in[1].F32
	for r := 0; r < outer; r++ {
		src, dst := x.F32[r*inner:(r+1)*inner], y.F32[r*inner:(r+1)*inner]
		for i, v := range src {
			h := float32((float64(v) - mean[r]) * rstd[r])
			dst[i] = h * scale[i]
			if bias != nil {
				dst[i] += bias[i]
			}
		}
		mt.F32[r], rt.F32[r] = float32(mean[r]), float32(rstd[r])
	}
	return []*tensor.Tensor{y, mt, rt}, nil
}

func (op *layerNormOp) BackwardNeeds() (in, out []int) { return []int{0, 1}, nil }

// Backward: with x̂ = (x−μ)·r, dx = r·(g − mean(g) − x̂·mean(g·x̂)) where
// g = dY·scale; dScale = Σ dY·x̂ and dB = Σ dY over the rows.
func (op *layerNormOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	x, dy := in[0], gradOut[0]
	if dy == nil {
		return nil, fmt.Errorf("gradient only flows from output Y")
	}
	outer, inner, _, err := op.split(x.Shape)
	if err != nil {
		return nil, err
	}
	mean, rstd := op.stats(x.F32, outer, inner)
	scale := in[1].F32
	dx, dScale := tensor.New(x.Shape...), tensor.New(in[1].Shape...)
	dB := make([]float64, inner)
	dS := make([]float64, inner)
	xh := make([]float64, inner)
	for r := 0; r < outer; r++ {
		src, g := x.F32[r*inner:(r+1)*inner], dy.F32[r*inner:(r+1)*inner]
		var mg, mgx float64
		for i, v := range src {
			xh[i] = (float64(v) - mean[r]) * rstd[r]
			gi := float64(g[i]) * float64(scale[i])
			mg += gi
			mgx += gi * xh[i]
			dS[i] += float64(g[i]) * xh[i]
			dB[i] += float64(g[i])
		}
		mg /= float64(inner)
		mgx /= float64(inner)
		d := dx.F32[r*inner : (r+1)*inner]
		for i := range d {
			gi := float64(g[i]) * float64(scale[i])
			d[i] = float32(rstd[r] * (gi - mg - xh[i]*mgx))
		}
	}
	for i := range dS {
		dScale.F32[i] = float32(dS[i])
	}
	res := []*tensor.Tensor{dx, dScale}
	if len(in) > 2 {
		var db *tensor.Tensor
		if in[2] != nil {
			db = tensor.New(in[2].Shape...)
			for i := range dB {
				db.F32[i] = float32(dB[i])
			}
		}
		res = append(res, db)
	}
	return res, nil
}

// softmaxOp: before opset 13 the input is coerced to 2-D at axis (default
// 1) and each row is normalised over all trailing dims together; from
// opset 13 it is normalised along the single axis (default −1).
type softmaxOp struct {
	axis   int64
	legacy bool
}

func buildSoftmax(n *onnx.Node, env *Env) (Op, error) {
	legacy := env.Opset < 13
	def := int64(-1)
	if legacy {
		def = 1
	}
	return &softmaxOp{axis: n.Int("axis", def), legacy: legacy}, nil
}

func (op *softmaxOp) layout(shape []int) (outer, n, inner int, err error) {
	axis := int(op.axis)
	if axis < 0 {
		axis += len(shape)
	}
	if axis < 0 || axis >= len(shape) && !(op.legacy && axis == len(shape)) {
		return 0, 0, 0, fmt.Errorf("axis %d out of range for shape %v", op.axis, shape)
	}
	if op.legacy {
		return tensor.Numel(shape[:axis]), tensor.Numel(shape[axis:]), 1, nil
	}
	return tensor.Numel(shape[:axis]), shape[axis], tensor.Numel(shape[axis+1:]), nil
}

func (op *softmaxOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	x := in[0]
	if err := wantFloat(x, "input", 1); err != nil {
		return nil, err
	}
	outer, n, inner, err := op.layout(x.Shape)
	if err != nil {
		return nil, err
	}
	y := tensor.New(x.Shape...)
	for o := 0; o < outer; o++ {
		for j := 0; j < inner; j++ {
			base := o*n*inner + j
			m := float32(math.Inf(-1))
			for i := 0; i < n; i++ {
				m = max(m, x.F32[base+i*inner])
			}
			var s float64
			for i := 0; i < n; i++ {
				e := math.Exp(float64(x.F32[base+i*inner] - m))
				y.F32[base+i*inner] = float32(e)
				s += e
			}
			for i := 0; i < n; i++ {
				y.F32[base+i*inner] = float32(float64(y.F32[base+i*inner]) / s)
			}
		}
	}
	return []*tensor.Tensor{y}, nil
}

func (op *softmaxOp) BackwardNeeds() (in, out []int) { return nil, []int{0} }

// Backward: dx = y ⊙ (dy − Σ dy⊙y) along the normalised group.
func (op *softmaxOp) Backward(in, out, gradOut []*tensor.Tensor) ([]*tensor.Tensor, error) {
	y, dy := out[0], gradOut[0]
	outer, n, inner, err := op.layout(y.Shape)
	if err != nil {
		return nil, err
	}
	dx := tensor.New(y.Shape...)
	for o := 0; o < outer; o++ {
		for j := 0; j < inner; j++ {
			base := o*n*inner + j
			var s float64
			for i := 0; i < n; i++ {
				k := base + i*inner
				s += float64(dy.F32[k]) * float64(y.F32[k])
			}
			for i := 0; i < n; i++ {
				k := base + i*inner
				dx.F32[k] = y.F32[k] * float32(float64(dy.F32[k])-s)
			}
		}
	}
	return []*tensor.Tensor{dx}, nil
}
