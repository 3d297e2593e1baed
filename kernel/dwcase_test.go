package kernel_test

import (
	"testing"

	"heedmap/kernel"
)

// dwCase is one depthwise-convolution geometry: c channels of h×w, a
// channel multiplier and the kernel, stride, dilation and padding in g.
type dwCase struct {
	c, h, w, mult int
	g             kernel.Conv2D
}

// dwBaseCases are the geometries both depthwise tests cover: same
// padding, stride 2 with multiplier 3, asymmetric padding with dilation,
// and a filter larger than the image.
var dwBaseCases = []dwCase{
	{4, 9, 9, 1, kernel.Conv2D{KH: 3, KW: 3, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}},
	{3, 12, 11, 3, kernel.Conv2D{KH: 3, KW: 3, StrideH: 2, StrideW: 2, PadTop: 1, PadLeft: 1, PadBottom: 1, PadRight: 1}},
	{2, 10, 13, 2, kernel.Conv2D{KH: 5, KW: 3, StrideW: 3, DilationH: 2, PadTop: 3, PadLeft: 0, PadBottom: 1, PadRight: 2}},
	{1, 3, 3, 1, kernel.Conv2D{KH: 5, KW: 5, PadTop: 2, PadLeft: 2, PadBottom: 2, PadRight: 2}},
}

// plan builds the case's im2col plan and returns it with the completed
// geometry, the output size and the number of output channels.
func (tc dwCase) plan(t *testing.T) (p *kernel.Im2colPlan, g kernel.Conv2D, oh, ow, m int) {
	t.Helper()
	g = tc.g
	g.C, g.H, g.W = tc.c, tc.h, tc.w
	p, err := kernel.NewIm2col(g)
	if err != nil {
		t.Fatal(err)
	}
	oh, ow = p.Out()
	return p, p.Geometry(), oh, ow, tc.c * tc.mult
}
