package engine

import (
	"math/rand"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

func TestMoreUnaryGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(50))
	cases := []struct {
		op     string
		attrs  []*onnx.Attr
		lo, hi float64
		kinks  []float64
	}{
		{"Neg", nil, -2, 2, nil},
		{"Abs", nil, -2, 2, []float64{0}},
		{"Reciprocal", nil, 0.5, 2, nil},
		{"Log", nil, 0.3, 3, nil},
		{"Sin", nil, -3, 3, nil},
		{"Cos", nil, -3, 3, nil},
		{"Tan", nil, -1, 1, nil},
		{"Asin", nil, -0.8, 0.8, nil},
		{"Acos", nil, -0.8, 0.8, nil},
		{"Atan", nil, -3, 3, nil},
		{"Sinh", nil, -2, 2, nil},
		{"Cosh", nil, -2, 2, nil},
		{"Asinh", nil, -2, 2, nil},
		{"Acosh", nil, 1.2, 3, nil},
		{"Atanh", nil, -0.8, 0.8, nil},
		{"Softplus", nil, -4, 4, nil},
		{"Softsign", nil, -3, 3, []float64{0}},
		{"Elu", []*onnx.Attr{attrFloat("alpha", 0.7)}, -3, 3, []float64{0}},
		{"Selu", nil, -3, 3, []float64{0}},
		{"Celu", []*onnx.Attr{attrFloat("alpha", 2)}, -3, 3, []float64{0}},
		{"ThresholdedRelu", []*onnx.Attr{attrFloat("alpha", 0.5)}, -2, 2, []float64{0.5}},
		{"Floor", nil, -3, 3, []float64{-3, -2, -1, 0, 1, 2, 3}},
		{"Round", nil, -3, 3, []float64{-2.5, -1.5, -0.5, 0.5, 1.5, 2.5}},
	}
	for _, c := range cases {
		op := mustOp(t, c.op, 17, 1, c.attrs...)
		x := randAwayFrom(rng, c.lo, c.hi, 0.02, c.kinks, 3, 1, 4)
		if err := gradCheck(op, []*tensor.Tensor{x}, gradOpts{}); err != nil {
			t.Errorf("%s: %v", c.op, err)
		}
	}
}

func TestVariadicGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(51))
	for _, opType := range []string{"Max", "Min", "Sum", "Mean"} {
		op := mustOp(t, opType, 13, 1)
		// Distinct values: ties would sit on the max/min kink.
		a, b, c := randTensor(rng, -1, 1, 2, 3, 4), randTensor(rng, -1, 1, 3, 1), randTensor(rng, -1, 1, 4)
		if err := gradCheck(op, []*tensor.Tensor{a, b, c}, gradOpts{}); err != nil {
			t.Errorf("%s: %v", opType, err)
		}
		if err := gradCheck(op, []*tensor.Tensor{a}, gradOpts{}); err != nil {
			t.Errorf("%s one input: %v", opType, err)
		}
	}
}

func TestModSigns(t *testing.T) {
	// ONNX Mod: fmod=0 follows the divisor's sign (Python %), fmod=1 the
	// dividend's (C fmod): -7 mod 3 is 2 and -1 respectively.
	x, y := i64s([]int{4}, -7, 7, -7, 7), i64s([]int{4}, 3, -3, -3, 3)
	py := forward1(t, mustOp(t, "Mod", 13, 1), x, y)
	c := forward1(t, mustOp(t, "Mod", 13, 1, attrInt("fmod", 1)), x, y)
	for i, w := range []int64{2, -2, -1, 1} {
		if py.I64[i] != w {
			t.Fatalf("Mod fmod=0 = %v", py.I64)
		}
	}
	for i, w := range []int64{-1, 1, -1, 1} {
		if c.I64[i] != w {
			t.Fatalf("Mod fmod=1 = %v", c.I64)
		}
	}
}
