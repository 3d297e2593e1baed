package engine

import (
	"context"
	"fmt"
	"math"
	"math/rand"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

// nnCase is one single-node gradient check. Float inputs become graph
// inputs (so the node is differentiated through Run and Backward exactly as
// in a real model, including which forward values the plan retains); int64
// inputs become initializers. A nil input is an omitted optional input.
type nnCase struct {
	name  string
	op    string
	attrs map[string]*onnx.Attr
	opset int64
	in    []*tensor.Tensor
	nOut  int // node outputs (only the first is seeded); 0 means 1
	// constIn lists float inputs given as initializers (weights, as in a
	// real model): no gradient is asked for them, which exercises the
	// SelectiveBackward paths and the reduced retention they allow.
	constIn []int
}

func (c nnCase) isConst(i int) bool {
	for _, j := range c.constIn {
		if i == j {
			return true
		}
	}
	return false
}

func nnModel(c nnCase) *onnx.Model {
	g := &onnx.Graph{Initializers: map[string]*tensor.Tensor{}}
	n := &onnx.Node{Name: c.name, OpType: c.op, Attrs: c.attrs}
	for i, t := range c.in {
		name := fmt.Sprintf("x%d", i)
		switch {
		case t == nil:
			name = ""
		case t.DType == tensor.Float32 && !c.isConst(i):
			g.Inputs = append(g.Inputs, onnx.ValueInfo{Name: name, DType: tensor.Float32})
		default:
			g.Initializers[name] = t
			g.InitOrder = append(g.InitOrder, name)
		}
		n.Inputs = append(n.Inputs, name)
	}
	nOut := max(c.nOut, 1)
	for i := 0; i < nOut; i++ {
		n.Outputs = append(n.Outputs, fmt.Sprintf("y%d", i))
	}
	g.Nodes = []*onnx.Node{n}
	g.Outputs = []onnx.ValueInfo{{Name: "y0"}}
	opset := c.opset
	if opset == 0 {
		opset = 17
	}
	return &onnx.Model{Opsets: map[string]int64{"": opset}, Graph: g}
}

// nnWeightedSum evaluates Σ w⊙f(x) in float64.
func nnWeightedSum(y, w *tensor.Tensor) float64 {
	var s float64
	for i, v := range y.F32 {
		s += float64(v) * float64(w.F32[i])
	}
	return s
}

// nnGradCheck compares Backward against central differences
// (f(x+h) − f(x−h)) / 2h of the scalar Σ w⊙y0 with h = 1e-2 (forward values
// are float32, so smaller steps drown in rounding). The tolerance is
// |analytic − numeric| ≤ 1e-3 + 5e-3·|numeric|: the O(h²) truncation error
// of the central difference on these O(1) inputs is well below it, and a
// wrong derivative (a missing term, a transposed index) is far above it.
func nnGradCheck(t *testing.T, c nnCase) {
	t.Helper()
	g, err := Compile(nnModel(c))
	if err != nil {
		t.Fatalf("%s: %v", c.name, err)
	}
	inputs := map[string]*tensor.Tensor{}
	var wrt []string
	for i, x := range c.in {
		if x != nil && x.DType == tensor.Float32 && !c.isConst(i) {
			name := fmt.Sprintf("x%d", i)
			inputs[name] = x
			wrt = append(wrt, name)
		}
	}
	ctx := context.Background()
	p, err := g.Run(ctx, inputs, RunOptions{Backward: true})
	if err != nil {
		t.Fatalf("%s: forward: %v", c.name, err)
	}
	y, _ := p.Value("y0")
	rng := rand.New(rand.NewSource(7))
	w := tensor.New(y.Shape...)
	for i := range w.F32 {
		w.F32[i] = float32(rng.Float64()*2 - 1)
	}
	grads, err := p.Backward(ctx, map[string]*tensor.Tensor{"y0": w}, wrt)
	if err != nil {
		t.Fatalf("%s: backward: %v", c.name, err)
	}
	const h = 1e-2
	for _, name := range wrt {
		x := inputs[name]
		gx := grads[name]
		if !shapeEq(gx.Shape, x.Shape) {
			t.Fatalf("%s: gradient for %s has shape %v, want %v", c.name, name, gx.Shape, x.Shape)
		}
		bad := 0
		for i := range x.F32 {
			orig := x.F32[i]
			eval := func(v float32) float64 {
				x.F32[i] = v
				q, err := g.Run(ctx, inputs, RunOptions{})
				if err != nil {
					t.Fatalf("%s: %v", c.name, err)
				}
				yy, _ := q.Value("y0")
				return nnWeightedSum(yy, w)
			}
			num := (eval(orig+h) - eval(orig-h)) / (2 * h)
			x.F32[i] = orig
			got := float64(gx.F32[i])
			if math.Abs(got-num) > 1e-3+5e-3*math.Abs(num) {
				if bad < 5 {
					t.Errorf("%s: d/d%s[%d] = %.6g, central difference %.6g", c.name, name, i, got, num)
				}
				bad++
			}
		}
	}
}

func nnRand(rng *rand.Rand, shape ...int) *tensor.Tensor {
	t := tensor.New(shape...)
	for i := range t.F32 {
		t.F32[i] = float32(rng.Float64()*2 - 1)
	}
	return t
}

// spacedT returns values that are a random permutation of a grid with
// spacing 0.05 > 2h, so max-type ops keep their argmax under the ±h steps
// of the central difference.
func nnSpaced(rng *rand.Rand, shape ...int) *tensor.Tensor {
	t := tensor.New(shape...)
	for i, j := range rng.Perm(len(t.F32)) {
		t.F32[i] = float32(j)*0.05 - float32(len(t.F32))*0.025
	}
	return t
}

func nnPos(rng *rand.Rand, shape ...int) *tensor.Tensor {
	t := tensor.New(shape...)
	for i := range t.F32 {
		t.F32[i] = float32(0.5 + rng.Float64())
	}
	return t
}

func nnInts(name string, v ...int64) *onnx.Attr {
	return &onnx.Attr{Name: name, Type: onnx.AttrInts, Ints: v}
}
func nnInt(name string, v int64) *onnx.Attr {
	return &onnx.Attr{Name: name, Type: onnx.AttrInt, Int: v}
}
func nnFloat(name string, v float32) *onnx.Attr {
	return &onnx.Attr{Name: name, Type: onnx.AttrFloat, Float: v}
}
func nnStr(name, v string) *onnx.Attr {
	return &onnx.Attr{Name: name, Type: onnx.AttrString, String: v}
}

func nnAttrs(as ...*onnx.Attr) map[string]*onnx.Attr {
	m := map[string]*onnx.Attr{}
	for _, a := range as {
		m[a.Name] = a
	}
	return m
}

func TestGradCheckNN(t *testing.T) {
	rng := rand.New(rand.NewSource(1))
	cases := []nnCase{
		{name: "conv_pads_strides_dil_bias", op: "Conv", attrs: nnAttrs(nnInts("pads", 1, 0, 2, 1), nnInts("strides", 2, 1), nnInts("dilations", 1, 2)),
			in: []*tensor.Tensor{nnRand(rng, 2, 3, 6, 5), nnRand(rng, 4, 3, 3, 2), nnRand(rng, 4)}},
		{name: "conv_groups", op: "Conv", attrs: nnAttrs(nnInt("group", 2), nnInts("pads", 1, 1, 1, 1)),
			in: []*tensor.Tensor{nnRand(rng, 1, 4, 5, 5), nnRand(rng, 6, 2, 3, 3), nil}},
		{name: "conv_depthwise_multiplier", op: "Conv", attrs: nnAttrs(nnInt("group", 3), nnInts("pads", 1, 1, 0, 0), nnInts("strides", 2, 2)),
			in: []*tensor.Tensor{nnRand(rng, 2, 3, 5, 6), nnRand(rng, 6, 1, 3, 3), nnRand(rng, 6)}},
		{name: "conv_pointwise", op: "Conv",
			in: []*tensor.Tensor{nnRand(rng, 2, 3, 4, 4), nnRand(rng, 5, 3, 1, 1)}},
		{name: "conv_same_upper", op: "Conv", attrs: nnAttrs(nnStr("auto_pad", "SAME_UPPER"), nnInts("strides", 2, 2)),
			in: []*tensor.Tensor{nnRand(rng, 1, 2, 5, 6), nnRand(rng, 3, 2, 4, 3)}},
		{name: "conv_1d", op: "Conv", attrs: nnAttrs(nnInts("pads", 2, 1), nnInts("dilations", 2)),
			in: []*tensor.Tensor{nnRand(rng, 2, 3, 7), nnRand(rng, 2, 3, 3), nnRand(rng, 2)}},
		{name: "conv_const_weights", op: "Conv", attrs: nnAttrs(nnInts("pads", 0, 1, 1, 0), nnInts("strides", 1, 2)), constIn: []int{1, 2},
			in: []*tensor.Tensor{nnRand(rng, 2, 3, 5, 5), nnRand(rng, 4, 3, 2, 3), nnRand(rng, 4)}},
		{name: "conv_depthwise_const_weights", op: "Conv", attrs: nnAttrs(nnInt("group", 2), nnInts("pads", 1, 1, 1, 1)), constIn: []int{1},
			in: []*tensor.Tensor{nnRand(rng, 1, 2, 4, 4), nnRand(rng, 2, 1, 3, 3)}},
		{name: "conv_only_weights", op: "Conv", constIn: []int{0},
			in: []*tensor.Tensor{nnRand(rng, 1, 2, 4, 4), nnRand(rng, 3, 2, 3, 3), nnRand(rng, 3)}},
		{name: "gemm_const_weights", op: "Gemm", attrs: nnAttrs(nnInt("transB", 1)), constIn: []int{1, 2},
			in: []*tensor.Tensor{nnRand(rng, 2, 4), nnRand(rng, 3, 4), nnRand(rng, 3)}},
		{name: "matmul_const_left", op: "MatMul", constIn: []int{0},
			in: []*tensor.Tensor{nnRand(rng, 3, 4), nnRand(rng, 2, 4, 2)}},
		{name: "batchnorm_const_params", op: "BatchNormalization", constIn: []int{1, 2, 3, 4},
			in: []*tensor.Tensor{nnRand(rng, 2, 3, 2, 2), nnRand(rng, 3), nnRand(rng, 3), nnRand(rng, 3), nnPos(rng, 3)}},
		{name: "gemm_plain_vector_bias", op: "Gemm",
			in: []*tensor.Tensor{nnRand(rng, 3, 4), nnRand(rng, 4, 5), nnRand(rng, 5)}},
		{name: "gemm_transA_alpha_beta_matrix", op: "Gemm", attrs: nnAttrs(nnInt("transA", 1), nnFloat("alpha", 0.5), nnFloat("beta", 2)),
			in: []*tensor.Tensor{nnRand(rng, 4, 3), nnRand(rng, 4, 5), nnRand(rng, 3, 5)}},
		{name: "gemm_transB_col_bias", op: "Gemm", attrs: nnAttrs(nnInt("transB", 1)),
			in: []*tensor.Tensor{nnRand(rng, 3, 4), nnRand(rng, 5, 4), nnRand(rng, 3, 1)}},
		{name: "gemm_transAB_scalar_bias", op: "Gemm", attrs: nnAttrs(nnInt("transA", 1), nnInt("transB", 1), nnFloat("alpha", -1.5)),
			in: []*tensor.Tensor{nnRand(rng, 4, 3), nnRand(rng, 5, 4), nnRand(rng)}},
		{name: "matmul_2d", op: "MatMul", in: []*tensor.Tensor{nnRand(rng, 3, 4), nnRand(rng, 4, 2)}},
		{name: "matmul_batch_broadcast", op: "MatMul", in: []*tensor.Tensor{nnRand(rng, 2, 1, 3, 4), nnRand(rng, 3, 4, 2)}},
		{name: "matmul_1d_2d", op: "MatMul", in: []*tensor.Tensor{nnRand(rng, 4), nnRand(rng, 2, 4, 3)}},
		{name: "matmul_2d_1d", op: "MatMul", in: []*tensor.Tensor{nnRand(rng, 3, 4), nnRand(rng, 4)}},
		{name: "maxpool_pads_strides", op: "MaxPool", attrs: nnAttrs(nnInts("kernel_shape", 3, 3), nnInts("pads", 1, 1, 1, 1), nnInts("strides", 2, 2)),
			in: []*tensor.Tensor{nnSpaced(rng, 2, 2, 5, 5)}},
		{name: "maxpool_ceil_dil_indices", op: "MaxPool", attrs: nnAttrs(nnInts("kernel_shape", 2, 2), nnInt("ceil_mode", 1), nnInts("strides", 2, 2), nnInts("dilations", 1, 2)),
			in: []*tensor.Tensor{nnSpaced(rng, 1, 2, 5, 6)}, nOut: 2},
		{name: "avgpool_exclude_pad", op: "AveragePool", attrs: nnAttrs(nnInts("kernel_shape", 3, 2), nnInts("pads", 1, 0, 1, 1)),
			in: []*tensor.Tensor{nnRand(rng, 2, 2, 4, 5)}},
		{name: "avgpool_include_pad_ceil", op: "AveragePool", attrs: nnAttrs(nnInts("kernel_shape", 3, 3), nnInts("pads", 1, 1, 1, 1), nnInt("count_include_pad", 1), nnInt("ceil_mode", 1), nnInts("strides", 2, 2)),
			in: []*tensor.Tensor{nnRand(rng, 1, 2, 6, 6)}},
		{name: "avgpool_1d", op: "AveragePool", attrs: nnAttrs(nnInts("kernel_shape", 3), nnInts("strides", 2)),
			in: []*tensor.Tensor{nnRand(rng, 2, 2, 7)}},
		{name: "global_average_pool", op: "GlobalAveragePool", in: []*tensor.Tensor{nnRand(rng, 2, 3, 4, 5)}},
		{name: "global_max_pool", op: "GlobalMaxPool", in: []*tensor.Tensor{nnSpaced(rng, 2, 3, 3, 4)}},
		{name: "batchnorm_all_inputs", op: "BatchNormalization", attrs: nnAttrs(nnFloat("epsilon", 1e-3)),
			in: []*tensor.Tensor{nnRand(rng, 2, 3, 4, 2), nnRand(rng, 3), nnRand(rng, 3), nnRand(rng, 3), nnPos(rng, 3)}},
		{name: "layernorm_last_axis", op: "LayerNormalization",
			in: []*tensor.Tensor{nnRand(rng, 3, 5), nnRand(rng, 5), nnRand(rng, 5)}},
		{name: "layernorm_axis1_no_bias", op: "LayerNormalization", attrs: nnAttrs(nnInt("axis", 1), nnFloat("epsilon", 1e-3)),
			in: []*tensor.Tensor{nnRand(rng, 2, 3, 4), nnRand(rng, 3, 4)}},
		{name: "softmax_opset13_axis1", op: "Softmax", attrs: nnAttrs(nnInt("axis", 1)),
			in: []*tensor.Tensor{nnRand(rng, 2, 4, 3)}},
		{name: "softmax_opset11_flatten", op: "Softmax", opset: 11,
			in: []*tensor.Tensor{nnRand(rng, 2, 4, 3)}},
		{name: "flatten", op: "Flatten", attrs: nnAttrs(nnInt("axis", 2)), in: []*tensor.Tensor{nnRand(rng, 2, 3, 2, 2)}},
		{name: "reshape", op: "Reshape", in: []*tensor.Tensor{nnRand(rng, 2, 3, 4), tensor.FromInt64([]int64{0, -1, 2}, 3)}},
		{name: "identity", op: "Identity", in: []*tensor.Tensor{nnRand(rng, 3, 2)}},
		{name: "dropout_with_mask", op: "Dropout", in: []*tensor.Tensor{nnRand(rng, 3, 2)}, nOut: 2},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) { nnGradCheck(t, c) })
	}
}
