package engine

import (
	"math"
	"runtime"

	"heedmap/kernel"
)

// epilogue is what a convolution applies to its output after the matrix
// product: the bias and, when fused (fuse.go), an activation.
type epilogue struct {
	bias   []float32 // per output channel; nil for none
	act    actKind
	lo, hi float32 // Clip bounds
	// res, when set, is added before the activation (a fused residual
	// Add, fuse.go); it is laid out like the output slice apply is given.
	res []float32
}

type actKind uint8

const (
	actNone actKind = iota
	actRelu
	actClip
)

// apply runs the epilogue on rows [m0, m1) of one image's M×N output,
// columns [j0, j1) (a row stride of n), with the kernel package's vector
// loop: Relu is max(v, 0) and Clip min(hi, max(lo, v)) exactly as those
// operators' forward kernels compute them.
func (e *epilogue) apply(y []float32, n, m0, m1, j0, j1 int) {
	if e.empty() {
		return
	}
	lo, hi := e.bounds()
	if e.res != nil {
		for m := m0; m < m1; m++ {
			// −0 is the additive identity (x + −0 = x, −0 included), so
			// a convolution without bias keeps its exact output.
			bv := float32(math.Copysign(0, -1))
			if e.bias != nil {
				bv = e.bias[m]
			}
			kernel.BiasAddClamp(y[m*n+j0:m*n+j1], e.res[m*n+j0:m*n+j1], bv, lo, hi)
		}
		return
	}
	for m := m0; m < m1; m++ {
		var bv float32
		if e.bias != nil {
			bv = e.bias[m]
		}
		kernel.BiasClamp(y[m*n+j0:m*n+j1], bv, lo, hi)
	}
}

// channels returns what a kernel that applies the epilogue itself needs
// for output channels [m0, m1): their biases (nil for none), the value to
// add instead of a missing bias (−0 before a residual, which keeps a
// bias-free convolution's exact output as apply does, 0 otherwise), the
// residual laid out as for apply (nil for none) and the clamp bounds. A nil
// epilogue adds nothing and clamps to ±∞.
func (e *epilogue) channels(m0, m1 int) (bias []float32, noBias float32, res []float32, lo, hi float32) {
	if e == nil {
		inf := float32(math.Inf(1))
		return nil, 0, nil, -inf, inf
	}
	if e.bias != nil {
		bias = e.bias[m0:m1]
	} else if e.res != nil {
		noBias = float32(math.Copysign(0, -1))
	}
	lo, hi = e.bounds()
	return bias, noBias, e.res, lo, hi
}

// empty reports whether the epilogue changes nothing.
func (e *epilogue) empty() bool {
	return e == nil || (e.bias == nil && e.act == actNone && e.res == nil)
}

// at returns the epilogue for an output slice that starts off values into
// the output its residual was laid out for.
func (e *epilogue) at(off int) *epilogue {
	if e == nil || e.res == nil || off == 0 {
		return e
	}
	sub := *e
	sub.res = sub.res[off:]
	return &sub
}

// bounds returns the clamp interval of the activation.
func (e *epilogue) bounds() (lo, hi float32) {
	inf := float32(math.Inf(1))
	switch e.act {
	case actRelu:
		return 0, inf
	case actClip:
		return e.lo, e.hi
	}
	return -inf, inf
}

// slabCols is the target size, in floats, of one column slab: 128 Ki
// floats (512 KiB) sits in a Zen 4/5 core's 1 MiB L2 next to the packed
// weights, so the slab is still cached when the GEMM packs it.
const slabFloats = 128 << 10

// useSlabs reports whether a convolution of this shape is lowered slab by
// slab: only when there are enough output positions for two cores to
// take four 32-column slabs each (slabMinPositions). With fewer (late
// layers, N = 49 … 196) panelForward or the row-panel path lowers the
// whole (small) column matrix once and splits the much larger M instead.
// The rule reads only the shape, not the number of cores: the paths do
// not all round alike (rowForwardKSplit), and a layer's result should not
// depend on the machine it ran on.
func (op *convOp) useSlabs(kk, ohw int) bool {
	return op.gemm1 != nil && ohw >= slabMinPositions && kk >= 8
}

// slabMinPositions is the fewest output positions the slab path takes.
const slabMinPositions = 8 * 32

// forGroup returns the epilogue of the output channels starting at mOff
// (a group's slice of the bias).
func (e *epilogue) forGroup(mOff int) *epilogue {
	if e == nil || e.bias == nil || mOff == 0 {
		return e
	}
	sub := *e
	sub.bias = sub.bias[mOff:]
	return &sub
}

// claimTasks runs f(0) … f(tasks−1) on up to GOMAXPROCS goroutines (the
// caller's included), each taking the next unclaimed task, so a core slowed
// by other work on a shared machine does fewer tasks instead of holding up
// the rest. It returns the first error. It is claimPhases with one phase.
func claimTasks(tasks int, f func(t int) error) error {
	return (*team)(nil).run([]int{tasks}, func(_, t int) error { return f(t) })
}

// slabForward computes one image and group, Yg (mg×ohw) = Wg·col, by
// slabs of columns: each goroutine claims the next slab, lowers it with
// Im2colPanels straight into the GEMM's packed-panel layout in its own
// cache-sized buffer, multiplies it with the single-threaded SgemmPanels
// and applies the epilogue to it while it is hot. Both cores are busy on
// every such convolution, the full column matrix (7 MiB for a 64-channel
// 56×56 3×3 layer) is never written out, and no value is copied twice.
func (op *convOp) slabForward(plan *kernel.Im2colPlan, xg []float32, cg int, g geom2, wg []float32, mg, kk int, yg []float32, ep *epilogue, mOff int) error {
	ohw := g.oh * g.ow
	nr := op.gemm1.PanelWidth()
	nb := max(nr, min(512, slabFloats/kk/nr*nr))
	// Slabs of whole panels, at most nb columns, tapering toward the
	// middle (taper), so the last one claimed leaves the other core
	// little to wait for.
	slabs := newCappedTaper((ohw+nr-1)/nr, runtime.GOMAXPROCS(0), nb/nr)
	ep = ep.forGroup(mOff)
	padded, padTasks, release := op.padPlan(plan, xg, cg, true)
	defer release()
	pointwise := g.pointwise()
	return op.team.run([]int{padTasks, slabs.tasks}, func(phase, s int) error {
		if phase == 0 {
			return padded.pad(s, padTasks, xg, cg)
		}
		p0, p1 := slabs.bounds(s)
		j0, j1 := p0*nr, min(p1*nr, ohw)
		w := j1 - j0
		// A pointwise layer's columns are its input: multiplied where
		// they lie, without packing (about a tenth of a MobileNetV2
		// forward pass at batch 1 went to packing them).
		if pointwise && op.gemm1.SgemmUnpacked(mg, w, kk, wg, kk, xg[j0:], ohw, yg[j0:], ohw) {
			ep.apply(yg, ohw, 0, mg, j0, j1)
			return nil
		}
		buf := op.scr.get(kk * ((w + nr - 1) / nr * nr))
		defer op.scr.put(buf)
		if err := padded.lower(*buf, 1, cg, j0, j1, nr); err != nil {
			return err
		}
		op.gemm1.SgemmPanels(mg, w, kk, wg, kk, *buf, yg[j0:], ohw)
		ep.apply(yg, ohw, 0, mg, j0, j1)
		return nil
	})
}

// panelForward computes one image and group with few output positions
// (N = OH·OW too small for slabs): the whole column matrix is lowered once
// into packed panels, split over the cores by panel, and the product is
// then split by blocks of output channels, each multiplied with
// SgemmPanels and given its epilogue while hot. Lowering once matters
// here: a GEMM that splits M packs its B operand once per block.
func (op *convOp) panelForward(plan *kernel.Im2colPlan, xg []float32, cg int, g geom2, wg []float32, mg, kk int, yg []float32, ep *epilogue, mOff int) error {
	ohw := g.oh * g.ow
	nr := op.gemm1.PanelWidth()
	mr, _ := op.gemm1.Tile()
	np := (ohw + nr - 1) / nr
	buf := op.scr.get(kk * np * nr)
	defer op.scr.put(buf)
	panels := *buf
	padded, padTasks, release := op.padPlan(plan, xg, cg, true)
	defer release()
	ep = ep.forGroup(mOff)
	// Fill: about 2 tasks per core, whole panels each.
	fills := min(np, 2*runtime.GOMAXPROCS(0))
	tiles := (mg + mr - 1) / mr
	blocks := min(tiles, 3*runtime.GOMAXPROCS(0))
	return op.team.run([]int{padTasks, fills, blocks}, func(phase, t int) error {
		switch phase {
		case 0:
			return padded.pad(t, padTasks, xg, cg)
		case 1:
			q0, q1 := np*t/fills, np*(t+1)/fills
			return padded.lower(panels[q0*kk*nr:q1*kk*nr], 1, cg, q0*nr, min(q1*nr, ohw), nr)
		}
		m0 := min(mg, tiles*t/blocks*mr)
		m1 := min(mg, tiles*(t+1)/blocks*mr)
		if m0 == m1 {
			return nil
		}
		op.gemm1.SgemmPanels(m1-m0, ohw, kk, wg[m0*kk:], kk, panels, yg[m0*ohw:], ohw)
		ep.apply(yg, ohw, m0, m1, 0, ohw)
		return nil
	})
}

// batchForward computes a one-group convolution of nImg images whose
// output maps are small (the layers panelForward takes one image at a
// time, and the incremental evaluator's batches of window patches): the
// images' columns are lowered side by side
// (Im2colPanelsPadded over several images) in slabs wide enough that the
// weights are streamed only a few times, each slab multiplied at once into
// a scratch block and copied to its images' output planes with the
// epilogue. With 7×7 maps a single image fills only 49 of the 64 columns
// of its two 32-wide panels; a batch of them wastes almost nothing.
func (op *convOp) batchForward(plan *kernel.Im2colPlan, x []float32, nImg, c int, g geom2, w []float32, m, kk int, y []float32, ep *epilogue) error {
	ohw := g.oh * g.ow
	cols := nImg * ohw
	nr := op.gemm1.PanelWidth()
	workers := runtime.GOMAXPROCS(0)
	nb := min(1024, max(nr, (cols+3*workers-1)/(3*workers)))
	nb = (nb + nr - 1) / nr * nr
	padded, padTasks, release := op.padPlan(plan, x, nImg*c, false)
	defer release()
	return op.team.run([]int{padTasks, (cols + nb - 1) / nb}, func(phase, s int) error {
		if phase == 0 {
			return padded.pad(s, padTasks, x, nImg*c)
		}
		j0 := s * nb
		j1 := min(j0+nb, cols)
		wd := j1 - j0
		buf := op.scr.get(kk * ((wd + nr - 1) / nr * nr))
		defer op.scr.put(buf)
		if err := padded.lower(*buf, nImg, c, j0, j1, nr); err != nil {
			return err
		}
		cb := op.scr.get(m * wd)
		defer op.scr.put(cb)
		op.gemm1.SgemmPanels(m, wd, kk, w, kk, *buf, *cb, wd)
		// Scatter: column j of the block is output position (j0+j) mod
		// ohw of image (j0+j) / ohw.
		for j := j0; j < j1; {
			img, o := j/ohw, j%ohw
			end := min(j1, (img+1)*ohw)
			yi := y[img*m*ohw:]
			for mo := 0; mo < m; mo++ {
				copy(yi[mo*ohw+o:mo*ohw+o+end-j], (*cb)[mo*wd+j-j0:mo*wd+end-j0])
			}
			ep.at(img*m*ohw).apply(yi, ohw, 0, m, o, o+end-j)
			j = end
		}
		return nil
	})
}

// paddedInput is a convolution input laid out for lowering: zero-padded
// as the plan's PaddedShape and, for a column stride above 1, split by
// column phase (kernel.Im2colPlan.PadPhased), so every panel row is a
// unit-stride copy.
type paddedInput struct {
	plan   *kernel.Im2colPlan
	data   []float32
	phased bool
	// byRows: the pad tasks split the padded rows rather than the planes,
	// for slabForward, whose tasks then split output positions alike
	// (see phaseState.claim).
	byRows bool
}

// lower writes packed panels of columns [j0, j1) from the input.
func (in paddedInput) lower(dst []float32, images, channels, j0, j1, nr int) error {
	if in.phased {
		return in.plan.Im2colPanelsPhased(dst, in.data, images, channels, j0, j1, nr)
	}
	return in.plan.Im2colPanelsPadded(dst, in.data, images, channels, j0, j1, nr)
}

// padPlan prepares the lowering input of the planes channel planes of xg
// (one image's channels, or several images' side by side): xg itself
// when the plan has neither padding nor a column stride (tasks is then
// 0), else a pooled buffer that the returned number of pad tasks fill
// (paddedInput.pad), and a function that hands the buffer back. The tasks
// split the padded rows when byRows, else the planes. Rows suit the slab
// path, whose next phase splits output rows: on ResNet-18 at batch 1 its
// 56×56 layers took 10–19 % less time, where padding the row-panel path's
// input by rows made its 14×14 and 7×7 layers 1–8 % slower.
func (op *convOp) padPlan(plan *kernel.Im2colPlan, xg []float32, planes int, byRows bool) (in paddedInput, tasks int, release func()) {
	phased := plan.Geometry().StrideW > 1
	if !plan.NeedsPad() && !phased {
		return paddedInput{plan: plan, data: xg}, 0, func() {}
	}
	ph, pw := plan.PaddedShape()
	buf := op.scr.get(planes * ph * pw)
	in = paddedInput{plan: plan, data: *buf, phased: phased, byRows: byRows}
	tasks = min(planes, 2*runtime.GOMAXPROCS(0))
	if in.byRows {
		tasks = min(ph, 2*runtime.GOMAXPROCS(0))
	}
	return in, tasks, func() { op.scr.put(buf) }
}

// pad runs pad task t of tasks: a share of the padded rows of all planes
// planes of xg, or a share of the planes.
func (in paddedInput) pad(t, tasks int, xg []float32, planes int) error {
	if in.byRows {
		ph, _ := in.plan.PaddedShape()
		r0, r1 := ph*t/tasks, ph*(t+1)/tasks
		if in.phased {
			return in.plan.PadRowsPhased(in.data, xg, planes, r0, r1)
		}
		return in.plan.PadRows(in.data, xg, planes, r0, r1)
	}
	c0, c1 := planes*t/tasks, planes*(t+1)/tasks
	if in.phased {
		return in.plan.PadPhased(in.data, xg, c0, c1)
	}
	return in.plan.Pad(in.data, xg, c0, c1)
}
