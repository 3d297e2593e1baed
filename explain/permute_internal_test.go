package explain

import (
	"testing"

	"heedmap/tensor"
)

// NCHW → NHWC → NCHW is the identity, and NHWC element (n, h, w, c) is
// NCHW element (n, c, h, w).
func TestPermute(t *testing.T) {
	x := tensor.New(2, 3, 4, 5)
	for i := range x.F32 {
		x.F32[i] = float32(i)
	}
	y := permute(x, [4]int{0, 2, 3, 1})
	if y.Shape[1] != 4 || y.Shape[2] != 5 || y.Shape[3] != 3 {
		t.Fatalf("shape %v", y.Shape)
	}
	n, c, h, w := 1, 2, 3, 4
	if got, want := y.F32[((n*4+h)*5+w)*3+c], x.F32[((n*3+c)*4+h)*5+w]; got != want {
		t.Errorf("NHWC element %v, want %v", got, want)
	}
	z := permute(y, [4]int{0, 3, 1, 2})
	for i := range z.F32 {
		if z.F32[i] != x.F32[i] {
			t.Fatalf("round trip differs at %d", i)
		}
	}
}
