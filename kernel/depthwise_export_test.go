package kernel

// Test hooks: run the depthwise kernels on a forced instruction set.

// DepthwiseFusedISA is DepthwiseFused on the path isa (ISAPortable: the
// pure-Go loop).
func (p *Im2colPlan) DepthwiseFusedISA(isa ISA, dst, src, w []float32, multiplier, m0, m1 int, ep *DepthwiseEpilogue, scratch []float32) error {
	return p.depthwiseFused(isa, dst, src, w, multiplier, m0, m1, ep, scratch)
}

// DepthwiseBackwardISA is DepthwiseBackward on the path isa.
func (p *Im2colPlan) DepthwiseBackwardISA(isa ISA, dsrc, dw, dy, src, w []float32, multiplier, c0, c1 int) error {
	return p.depthwiseBackward(isa, dsrc, dw, dy, src, w, multiplier, c0, c1, make([]float32, p.DepthwiseBackwardScratch()))
}

// DepthwiseVectorized reports whether isa has a vector kernel for the
// plan's forward and backward planes, so the tests know the vector path,
// not the Go fallback, produced what they checked.
func (p *Im2colPlan) DepthwiseVectorized(isa ISA) (fwd, bwd bool) {
	try := func(l dwLayout, a dwArgs) bool {
		par := [3]float32{}
		return dwPlaneSIMD(isa, &a, make([]float32, a.oh*a.ow), make([]float32, l.size()), make([]float32, a.kh*a.kw), &par, false)
	}
	lf, af := p.forwardLayout(isa)
	lb, ab := p.backwardLayout()
	return try(lf, af), try(lb, ab)
}

// DepthwisePlanesISA is DepthwisePlanes on the path isa.
func (p *Im2colPlan) DepthwisePlanesISA(isa ISA, dst, src, w []float32, channels, multiplier, p0, p1 int, ep *DepthwiseEpilogue, scratch []float32) error {
	return p.depthwisePlanes(isa, dst, src, w, channels, multiplier, p0, p1, 0, p.oh, ep, scratch)
}

// DepthwiseBackwardPlanesISA is DepthwiseBackwardPlanes on the path isa.
func (p *Im2colPlan) DepthwiseBackwardPlanesISA(isa ISA, dsrc, dw, dy, src, w []float32, images, channels, multiplier, c0, c1 int, setDX bool) error {
	return p.dwBackwardPlanes(isa, dsrc, dw, dy, src, w, images, channels, multiplier, c0, c1, make([]float32, p.DepthwiseBackwardScratch()), setDX)
}

// DepthwiseRowsISA is DepthwiseRows on the path isa.
func (p *Im2colPlan) DepthwiseRowsISA(isa ISA, dst, src, w []float32, channels, multiplier, p0, p1, oy0, oy1 int, ep *DepthwiseEpilogue, scratch []float32) error {
	return p.depthwisePlanes(isa, dst, src, w, channels, multiplier, p0, p1, oy0, oy1, ep, scratch)
}
