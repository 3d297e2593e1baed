package engine

import (
	"math/rand"
	"testing"

	"heedmap/onnx"
	"heedmap/tensor"
)

// Resize is linear in X for every mode (nearest copies, linear and cubic
// mix with fixed weights), so central differences are exact up to float32
// rounding and the checker needs no kink avoidance.
func TestResizeGradients(t *testing.T) {
	rng := rand.New(rand.NewSource(40))
	x := randTensor(rng, -1, 1, 1, 2, 3, 4)
	f32 := func(v ...float32) *tensor.Tensor { return tensor.FromFloat32(v, len(v)) }
	sizes := func(v ...int64) *tensor.Tensor { return i64s([]int{len(v)}, v...) }
	cases := []struct {
		name  string
		attrs []*onnx.Attr
		in    []*tensor.Tensor // roi, scales, sizes
	}{
		{"nearest up scales", []*onnx.Attr{attrString("mode", "nearest")}, []*tensor.Tensor{nil, f32(1, 1, 2, 1.5)}},
		{"nearest down sizes ceil", []*onnx.Attr{attrString("mode", "nearest"), attrString("nearest_mode", "ceil")}, []*tensor.Tensor{nil, nil, sizes(1, 2, 2, 3)}},
		{"nearest asymmetric floor", []*onnx.Attr{attrString("mode", "nearest"), attrString("coordinate_transformation_mode", "asymmetric"), attrString("nearest_mode", "floor")}, []*tensor.Tensor{nil, f32(1, 1, 3, 2)}},
		{"linear half_pixel up", []*onnx.Attr{attrString("mode", "linear")}, []*tensor.Tensor{nil, f32(1, 1, 2, 3)}},
		{"linear half_pixel down", []*onnx.Attr{attrString("mode", "linear")}, []*tensor.Tensor{nil, f32(1, 1, 0.6, 0.5)}},
		{"linear align_corners sizes", []*onnx.Attr{attrString("mode", "linear"), attrString("coordinate_transformation_mode", "align_corners")}, []*tensor.Tensor{nil, nil, sizes(1, 2, 5, 7)}},
		{"linear asymmetric", []*onnx.Attr{attrString("mode", "linear"), attrString("coordinate_transformation_mode", "asymmetric")}, []*tensor.Tensor{nil, f32(1, 1, 2, 2)}},
		{"linear pytorch_half_pixel to 1", []*onnx.Attr{attrString("mode", "linear"), attrString("coordinate_transformation_mode", "pytorch_half_pixel")}, []*tensor.Tensor{nil, nil, sizes(1, 2, 1, 3)}},
		{"cubic exclude_outside", []*onnx.Attr{attrString("mode", "cubic"), attrInt("exclude_outside", 1), attrFloat("cubic_coeff_a", -0.5)}, []*tensor.Tensor{nil, f32(1, 1, 2, 2)}},
		{"tf_crop_and_resize extrapolation", []*onnx.Attr{attrString("mode", "linear"), attrString("coordinate_transformation_mode", "tf_crop_and_resize"), attrFloat("extrapolation_value", 5)},
			[]*tensor.Tensor{f32(0, 0, -0.2, 0.1, 1, 1, 0.8, 1.3), nil, sizes(1, 2, 3, 3)}},
	}
	for _, c := range cases {
		op := mustOp(t, "Resize", 13, 1, c.attrs...)
		in := append([]*tensor.Tensor{x}, c.in...)
		for len(in) < 4 {
			in = append(in, nil)
		}
		if err := gradCheck(op, in, gradOpts{Wrt: []int{0}}); err != nil {
			t.Errorf("Resize %s: %v", c.name, err)
		}
	}
	// Opset 18: axes attribute with keep_aspect_ratio_policy.
	op := mustOp(t, "Resize", 18, 1, attrString("mode", "linear"), attrInts("axes", 2, 3), attrString("keep_aspect_ratio_policy", "not_larger"))
	y := forward1(t, op, x, nil, nil, sizes(6, 6))
	// not_larger: scale = min(6/3, 6/4) = 1.5, so 3×4 becomes round(4.5)×6 = 5×6
	// (ONNX Resize-18 definition: round half up).
	if !shapeEq(y.Shape, []int{1, 2, 5, 6}) {
		t.Errorf("keep_aspect_ratio_policy not_larger: shape %v, want [1 2 5 6]", y.Shape)
	}
	checkGrad(t, op, []*tensor.Tensor{x, nil, nil, sizes(6, 6)}, gradOpts{Wrt: []int{0}})

	// Opset 10 and Upsample-9 (scales input), Upsample-7 (attribute).
	checkGrad(t, mustOp(t, "Resize", 10, 1, attrString("mode", "linear")), []*tensor.Tensor{x, f32(1, 1, 2, 2)}, gradOpts{Wrt: []int{0}})
	checkGrad(t, mustOp(t, "Upsample", 9, 1), []*tensor.Tensor{x, f32(1, 1, 2, 3)}, gradOpts{Wrt: []int{0}})
	up7 := mustOp(t, "Upsample", 7, 1, &onnx.Attr{Name: "scales", Type: onnx.AttrFloats, Floats: []float32{1, 1, 2, 2}})
	y = forward1(t, up7, x)
	// Nearest ×2 repeats each pixel into a 2×2 block.
	if !shapeEq(y.Shape, []int{1, 2, 6, 8}) || y.F32[8+1] != x.F32[0] || y.F32[2*8+2] != x.F32[4+1] {
		t.Errorf("Upsample-7 nearest: shape %v", y.Shape)
	}

	if _, err := lookupBuild("Resize", 13, attrString("mode", "linear"), attrString("coordinate_transformation_mode", "bogus")); err == nil {
		t.Error("unknown coordinate_transformation_mode accepted")
	}
	if _, err := op.Forward([]*tensor.Tensor{x, nil, f32(1, 1, 2, 2), sizes(1, 1, 2, 2)}); err == nil {
		t.Error("both scales and sizes accepted")
	}
}

func TestResizeBilinearHalfPixelWorkedExample(t *testing.T) {
	// 1×1×2×2 upsampled ×2 with half_pixel linear interpolation; each output
	// pixel centre maps to (x+0.5)/2-0.5 in input coordinates, so the first
	// row samples columns -0.25, 0.25, 0.75, 1.25 (clamped at the edges).
	// Checked against PyTorch 1.13 (Debian python3-torch):
	//   /usr/bin/python3 -c "import torch; print(torch.nn.functional.interpolate(
	//     torch.tensor([[[[1.,2.],[3.,4.]]]]), scale_factor=2, mode='bilinear',
	//     align_corners=False))"
	// prints exactly the matrix below.
	x := tensor.FromFloat32([]float32{1, 2, 3, 4}, 1, 1, 2, 2)
	op := mustOp(t, "Resize", 13, 1, attrString("mode", "linear"))
	y := forward1(t, op, x, nil, tensor.FromFloat32([]float32{1, 1, 2, 2}, 4))
	want := []float32{
		1, 1.25, 1.75, 2,
		1.5, 1.75, 2.25, 2.5,
		2.5, 2.75, 3.25, 3.5,
		3, 3.25, 3.75, 4,
	}
	for i := range want {
		if d := y.F32[i] - want[i]; d > 1e-6 || d < -1e-6 {
			t.Fatalf("bilinear ×2 = %v, want %v", y.F32, want)
		}
	}
}
