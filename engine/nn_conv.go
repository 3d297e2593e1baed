package engine

import (
	"fmt"

	"heedmap/kernel"
	"heedmap/onnx"
	"heedmap/tensor"
)

func init() { register("Conv", buildConv) }

// convOp is a 1-D or 2-D ONNX Conv. Grouped convolutions lower each group
// to a matrix product over an im2col buffer (Chellapilla et al., "High
// Performance Convolutional Neural Networks for Document Processing",
// 2006): memory for the column buffer is traded for one large GEMM. A 1×1
// convolution with unit stride and no padding skips im2col. Depthwise
// convolutions (one input channel per group) have too little reuse for a
// GEMM to pay off and use a direct loop instead.
type convOp struct {
	win   windowAttrs
	group int
	gemm  kernel.GEMM
	// scr lends the work buffers (im2col columns, panels, padded
	// inputs, product and expansion blocks), shared by the Graph's
	// operators (scratch.go).
	scr *scratch
	// plans caches the im2col/depthwise plan per input size, made once
	// and reused by every later call of that size.
	plans planCache
	arena *arena // output buffers; nil allocates
	// gemm1 is a single-threaded instance of the same packed GEMM, for
	// the slab-parallel path (nn_conv_slab.go); nil when gemm is not a
	// *kernel.Packed.
	gemm1 *kernel.Packed
	team  *team // helper goroutines shared by the Graph's convolutions; may be nil
	// constW is set at compile time when W is a graph constant, so a
	// packed form of it may be kept (nn_conv_rows.go).
	constW bool
	// noWinograd keeps 3×3 layers on the im2col paths (benchmarks
	// compare the two).
	noWinograd bool
	// tplans caches the plans of the transposed convolutions that give
	// the input gradient (nn_conv_slab.go).
	tplans planCache
}

func buildConv(n *onnx.Node, env *Env) (Op, error) {
	w, err := parseWindow(n)
	if err != nil {
		return nil, err
	}
	if w.ceil {
		return nil, fmt.Errorf("Conv has no ceil_mode")
	}
	g := n.Int("group", 1)
	if g < 1 {
		return nil, fmt.Errorf("group %d < 1", g)
	}
	if len(n.Inputs) < 2 {
		return nil, fmt.Errorf("Conv needs X and W, got %d inputs", len(n.Inputs))
	}
	op := &convOp{win: w, group: int(g), gemm: onTeam(env.GEMM, env.team), arena: env.arena, team: env.team, scr: env.scratch}
	if op.scr == nil {
		op.scr = new(scratch) // built outside a Graph
	}
	if p, ok := baseGEMM(env.GEMM).(*kernel.Packed); ok {
		if p1, err := kernel.New(kernel.Options{ISA: p.ISA(), Threads: 1}); err == nil {
			op.gemm1 = p1
		}
	}
	return op, nil
}

// convShape is the resolved problem for given X and W.
type convShape struct {
	n, c, m, cg, mg int
	spatial         int
	g               geom2
}

func (op *convOp) shape(x, w *tensor.Tensor) (convShape, error) {
	var s convShape
	if len(x.Shape) != len(w.Shape) {
		return s, fmt.Errorf("X %v and W %v differ in rank", x.Shape, w.Shape)
	}
	s.spatial = len(x.Shape) - 2
	s.n, s.c, s.m = x.Shape[0], x.Shape[1], w.Shape[0]
	if s.c%op.group != 0 || s.m%op.group != 0 {
		return s, fmt.Errorf("group %d does not divide %d input and %d output channels", op.group, s.c, s.m)
	}
	s.cg, s.mg = s.c/op.group, s.m/op.group
	if w.Shape[1] != s.cg {
		return s, fmt.Errorf("W %v has %d input channels per group, want %d (X %v, group %d)", w.Shape, w.Shape[1], s.cg, x.Shape, op.group)
	}
	k := w.Shape[2:]
	if op.win.kernel != nil && !shapeEq(int64sToInts(op.win.kernel), k) {
		return s, fmt.Errorf("kernel_shape %v does not match W %v", op.win.kernel, w.Shape)
	}
	g, err := op.win.resolve(x.Shape[2:], k)
	if err != nil {
		return s, err
	}
	s.g = g
	return s, nil
}

func (s convShape) depthwise() bool { return s.cg == 1 }

func (s convShape) pointwise() bool { return s.g.pointwise() }

func (op *convOp) Forward(in []*tensor.Tensor) ([]*tensor.Tensor, error) {
	return op.forwardEp(in, nil, actNone, 0, 0)
}

// forward computes the convolution followed by the activation act (fused
// Relu or Clip to [lo, hi], see fuse.go).
func (op *convOp) forward(in []*tensor.Tensor, act actKind, lo, hi float32) ([]*tensor.Tensor, error) {
	return op.forwardEp(in, nil, act, lo, hi)
}

// outShape returns the output shape for inputs X and W, or nil when they
// do not fit together (Forward then reports why).
func (op *convOp) outShape(x, w *tensor.Tensor) []int {
	s, err := op.shape(x, w)
	if err != nil {
		return nil
	}
	return s.g.outShape(s.n, s.m, s.spatial)
}

// forwardEp computes the convolution, adds res (a residual of the
// output's shape, nil for none) and applies the activation act (fused
// Relu or Clip to [lo, hi], see fuse.go); bias, residual and activation
// are applied per block while it is in cache on the panel paths.
func (op *convOp) forwardEp(in []*tensor.Tensor, res []float32, act actKind, lo, hi float32) ([]*tensor.Tensor, error) {
	x, w := in[0], in[1]
	if err := wantFloat(x, "X", 3); err != nil {
		return nil, err
	}
	if err := wantFloat(w, "W", 3); err != nil {
		return nil, err
	}
	s, err := op.shape(x, w)
	if err != nil {
		return nil, err
	}
	var b []float32
	if len(in) > 2 && in[2] != nil {
		if err := wantFloat(in[2], "B", 1); err != nil {
			return nil, err
		}
		if in[2].Len() != s.m {
			return nil, fmt.Errorf("bias B %v, want %d values", in[2].Shape, s.m)
		}
		b = in[2].F32
	}
	g := s.g
	// Every element of y is written below (GEMM with beta 0, or the
	// depthwise loops), so a recycled, unzeroed buffer is fine.
	y := op.arena.tensor(g.outShape(s.n, s.m, s.spatial)...)
	ihw, ohw := g.ih*g.iw, g.oh*g.ow
	plan, perr := op.plans.plan(g)
	if res != nil && len(res) != len(y.F32) {
		return nil, fmt.Errorf("residual of %d values for output %v", len(res), y.Shape)
	}
	ep := &epilogue{bias: b, act: act, lo: lo, hi: hi, res: res}
	epDone := false
	if s.depthwise() {
		dwEp := ep
		if res != nil {
			// The depthwise kernels clamp as they store; the residual
			// must come first, so they add only the bias and one pass
			// below adds the residual and clamps.
			dwEp, ep = &epilogue{bias: b}, &epilogue{act: act, lo: lo, hi: hi, res: res}
		}
		done, err := op.depthwiseForwardPlanned(plan, perr, x.F32, w.F32, y.F32, s, dwEp)
		if err != nil {
			return nil, err
		}
		switch {
		case !done && res != nil:
			ep.bias = b // nothing applied yet: all of it below
		case done:
			epDone = res == nil
		}
	} else if op.useWinograd(g, s.cg, s.mg) {
		if err := op.winogradForward(x.F32, s.n, s.c, g, op.winoFilter(w, s.m, s.c, false), s.m, y.F32, ep); err != nil {
			return nil, err
		}
		epDone = true
	} else {
		kk := s.cg * g.kh * g.kw
		// The packed-panel paths (nn_conv_slab.go) need a plan and the
		// packed GEMM; any other GEMM gets the plain im2col lowering.
		panels := perr == nil && op.gemm1 != nil
		slabs := panels && op.useSlabs(kk, ohw)
		var col []float32
		if !panels && !s.pointwise() {
			buf := op.scr.get(kk * ohw)
			defer op.scr.put(buf)
			col = *buf
		}
		images := s.n
		if panels && !slabs && s.n > 1 && op.group == 1 && !op.useKSplit(s, kk) {
			// Several images with small output maps: one product over
			// the images' columns side by side (nn_conv_slab.go). A
			// projection split by input channels goes image by image
			// instead, so each image's sums are those of a batch of
			// one (incremental occlusion's maps must not depend on the
			// batch size).
			if err := op.batchForward(plan, x.F32, s.n, s.cg, g, w.F32, s.m, kk, y.F32, ep); err != nil {
				return nil, err
			}
			images = 0
		}
		for n := 0; n < images; n++ {
			for gi := 0; gi < op.group; gi++ {
				xg := x.F32[(n*s.c+gi*s.cg)*ihw : (n*s.c+(gi+1)*s.cg)*ihw]
				yg := y.F32[(n*s.m+gi*s.mg)*ohw : (n*s.m+(gi+1)*s.mg)*ohw]
				wg := w.F32[gi*s.mg*kk : (gi+1)*s.mg*kk]
				epg := ep.at((n*s.m + gi*s.mg) * ohw)
				switch {
				case slabs:
					err = op.slabForward(plan, xg, s.cg, g, wg, s.mg, kk, yg, epg, gi*s.mg)
				case panels && op.useKSplit(s, kk):
					err = op.rowForwardKSplit(xg, g, op.rowWeightHalves(w, s.m, kk), s.mg, kk, yg, epg.forGroup(gi*s.mg))
				case panels && op.useRows(s):
					wp := op.rowWeights(w, s.m, kk)
					err = op.rowForward(plan, xg, s.cg, g, wp, s.mg, kk, yg, epg.forGroup(gi*s.mg))
				case panels:
					err = op.panelForward(plan, xg, s.cg, g, wg, s.mg, kk, yg, epg, gi*s.mg)
				}
				if err != nil {
					return nil, err
				}
				if panels {
					continue
				}
				src := xg
				if col != nil {
					if perr != nil {
						im2col(xg, s.cg, g, col)
					} else if err := planIm2col(plan, xg, s.cg, g, col); err != nil {
						return nil, err
					}
					src = col
				}
				op.gemm.Sgemm(false, false, s.mg, ohw, kk, 1, wg, kk, src, ohw, 0, yg, ohw)
			}
		}
		epDone = panels
	}
	if !epDone && !ep.empty() {
		// One pass over the output for bias, residual and activation,
		// split by output plane.
		op.team.split(s.n*s.m, s.n*s.m*ohw, func(p0, p1 int) {
			for p := p0; p < p1; p++ {
				n, m := p/s.m, p%s.m
				ep.at(n*s.m*ohw).apply(y.F32[n*s.m*ohw:(n+1)*s.m*ohw], ohw, m, m+1, 0, ohw)
			}
		})
	}
	return []*tensor.Tensor{y}, nil
}

// im2col writes the c×kh×kw rows of receptive-field values (zero where the
// window covers padding) for every output position into col.
func im2col(x []float32, c int, g geom2, col []float32) {
	ohw := g.oh * g.ow
	rows := c * g.kh * g.kw
	splitWork(rows, rows*ohw, func(r0, r1 int) {
		for r := r0; r < r1; r++ {
			ch, kidx := r/(g.kh*g.kw), r%(g.kh*g.kw)
			ki, kj := kidx/g.kw, kidx%g.kw
			plane := x[ch*g.ih*g.iw : (ch+1)*g.ih*g.iw]
			dst := col[r*ohw : (r+1)*ohw]
			for oy := 0; oy < g.oh; oy++ {
				iy := oy*g.sh - g.pt + ki*g.dh
				d := dst[oy*g.ow : (oy+1)*g.ow]
				if iy < 0 || iy >= g.ih {
					clear(d)
					continue
				}
				src := plane[iy*g.iw : (iy+1)*g.iw]
				ix := kj*g.dw - g.pl
				if g.sw == 1 && ix >= 0 && ix+g.ow <= g.iw {
					copy(d, src[ix:ix+g.ow])
					continue
				}
				for ox := range d {
					if ix >= 0 && ix < g.iw {
						d[ox] = src[ix]
					} else {
						d[ox] = 0
					}
					ix += g.sw
				}
			}
		}
	})
}

// col2im adds the column gradients back onto the image they were gathered
// from (the adjoint of im2col). Channels are independent, so they are split
// over goroutines.
func col2im(col []float32, c int, g geom2, dx []float32) {
	ohw := g.oh * g.ow
	splitWork(c, c*g.kh*g.kw*ohw, func(c0, c1 int) {
		for ch := c0; ch < c1; ch++ {
			plane := dx[ch*g.ih*g.iw : (ch+1)*g.ih*g.iw]
			for ki := 0; ki < g.kh; ki++ {
				for kj := 0; kj < g.kw; kj++ {
					r := (ch*g.kh+ki)*g.kw + kj
					src := col[r*ohw : (r+1)*ohw]
					for oy := 0; oy < g.oh; oy++ {
						iy := oy*g.sh - g.pt + ki*g.dh
						if iy < 0 || iy >= g.ih {
							continue
						}
						row := plane[iy*g.iw : (iy+1)*g.iw]
						ix := kj*g.dw - g.pl
						for _, v := range src[oy*g.ow : (oy+1)*g.ow] {
							if ix >= 0 && ix < g.iw {
								row[ix] += v
							}
							ix += g.sw
						}
					}
				}
			}
		}
	})
}
