package engine

import (
	"runtime"
	"sync"

	"heedmap/kernel"
)

// incPanelPlans caches a Conv's im2col plans by patch input size: a map
// has a handful of patch sizes, each seen in many batches.
type incPanelPlans struct {
	mu    sync.Mutex
	plans map[[3]int]*kernel.Im2colPlan
}

// plan returns the unpadded im2col plan of step st for c×ih×iw inputs.
func (st *incStep) plan(c, ih, iw int) (*kernel.Im2colPlan, error) {
	pp := st.plans
	key := [3]int{c, ih, iw}
	pp.mu.Lock()
	defer pp.mu.Unlock()
	if pl, ok := pp.plans[key]; ok {
		return pl, nil
	}
	g := st.g
	pl, err := kernel.NewIm2col(kernel.Conv2D{
		C: c, H: ih, W: iw, KH: g.kh, KW: g.kw,
		StrideH: g.sh, StrideW: g.sw, DilationH: g.dh, DilationW: g.dw,
	})
	if err != nil {
		return nil, err
	}
	if pp.plans == nil {
		pp.plans = map[[3]int]*kernel.Im2colPlan{}
	}
	pp.plans[key] = pl
	return pl, nil
}

// convPanels computes a one-group Conv's patch for every window of a batch
// as one matrix product, W [M × C·kh·kw] times the columns of all windows
// side by side, on the plan's team in two phases:
//
//  1. gather: each window's input region (the kept value overlaid with the
//     upstream patch, zero outside the map, which is the Conv's padding)
//     is written straight into the layout the lowering reads; for a
//     column stride s > 1 that is the column-phased layout of
//     kernel.Im2colPlan.PadPhased, so no separate padding pass runs.
//  2. slabs of columns: each is lowered into packed panels
//     (Im2colPanelsPadded/Phased), multiplied (Packed.SgemmPanels), and
//     written to its windows' output planes with the bias and fused
//     activation (kernel.BiasClamp, as the runtime's epilogue) and with
//     the kept value at positions outside the window's changed rectangle,
//     while the slab's block is in cache. Those positions are recomputed
//     only because a batch shares one patch size; taking them from the
//     kept pass makes a window's result independent of its batch (the
//     restore step of the other patch operators).
//
// It returns nil and no error when the patch geometry does not give a plan
// of the expected output size; the caller then takes the general path.
func (inc *Incremental) convPanels(k int, gm incGeo, vals []*incVal, nb int) (*incVal, error) {
	p := inc.plan
	st := &p.steps[k]
	v := p.g.nodes[k].in[0]
	src := vals[v]
	shp := p.shapes[v]
	c, h, w := shp[1], shp[2], shp[3]
	g := st.g
	ih := (gm.p-1)*g.sh + (g.kh-1)*g.dh + 1
	iw := (gm.q-1)*g.sw + (g.kw-1)*g.dw + 1
	plan, err := st.plan(c, ih, iw)
	if err != nil {
		return nil, nil
	}
	if oh, ow := plan.Out(); oh != gm.p || ow != gm.q {
		return nil, nil
	}
	ov := p.outValue(k)
	os := p.shapes[ov]
	oh, ow := os[2], os[3]
	baseOut := inc.base[ov].F32
	m := st.m
	kk := c * g.kh * g.kw
	pq := gm.p * gm.q
	cols := nb * pq
	conv := st.conv
	nr := conv.gemm1.PanelWidth()
	workers := runtime.GOMAXPROCS(0)
	// Slabs: about three per core, so a core slowed by other work on the
	// machine takes fewer; at most 1024 columns, so a slab's panels stay
	// in L2.
	wd := min(1024, max(nr, (cols+3*workers-1)/(3*workers)))
	wd = (wd + nr - 1) / nr * nr
	slabs := (cols + wd - 1) / wd
	planes := nb * c
	gathers := min(planes, 4*workers)
	phased := g.sw > 1
	var phase []int // where each column phase starts in a phased row
	if phased {
		phase = make([]int, g.sw)
		for q := 1; q < g.sw; q++ {
			phase[q] = phase[q-1] + (iw-(q-1)+g.sw-1)/g.sw
		}
	}
	x := p.bufs.get(planes * ih * iw)
	defer p.bufs.put(x)
	out := &incVal{incGeo: gm, t: p.patchTensor(nb, m, gm.p, gm.q), owned: true}
	lo, hi := st.bounds()
	err = p.team.run([]int{gathers, slabs}, func(ph, t int) error {
		if ph == 0 {
			var row []float32
			if phased {
				row = p.bufs.get(iw)
				defer p.bufs.put(row)
			}
			for i := planes * t / gathers; i < planes*(t+1)/gathers; i++ {
				b, ch := i/c, i%c
				s := inc.source(v, src, b, ch)
				y0, x0 := gm.oy[b]*g.sh-g.pt, gm.ox[b]*g.sw-g.pl
				dst := x[i*ih*iw : (i+1)*ih*iw]
				for r := 0; r < ih; r++ {
					d := dst[r*iw : (r+1)*iw]
					if !phased {
						gatherRow(d, &s, y0+r, x0, h, w)
						continue
					}
					gatherRow(row, &s, y0+r, x0, h, w)
					for q := 0; q < g.sw; q++ {
						pd := d[phase[q]:]
						for j, xx := 0, q; xx < iw; j, xx = j+1, xx+g.sw {
							pd[j] = row[xx]
						}
					}
				}
			}
			return nil
		}
		j0 := t * wd
		j1 := min(j0+wd, cols)
		n := j1 - j0
		panels := p.bufs.get(kk * ((n + nr - 1) / nr * nr))
		defer p.bufs.put(panels)
		var err error
		if phased {
			err = plan.Im2colPanelsPhased(panels, x, nb, c, j0, j1, nr)
		} else {
			err = plan.Im2colPanelsPadded(panels, x, nb, c, j0, j1, nr)
		}
		if err != nil {
			return err
		}
		prod := p.bufs.get(m * n)
		defer p.bufs.put(prod)
		conv.gemm1.SgemmPanels(m, n, kk, st.w, kk, panels, prod, n)
		// Column j of the block is position (j0+j) mod pq of window
		// (j0+j) / pq.
		for j := j0; j < j1; {
			b, o := j/pq, j%pq
			e := min(j1, (b+1)*pq)
			inc.writePatch(out.t.F32[b*m*pq:(b+1)*m*pq], prod[j-j0:], n, m, o, e-(b*pq), gm, b, st.b, lo, hi, baseOut, oh, ow)
			j = e
		}
		return nil
	})
	if err != nil {
		p.bufs.put(out.t.F32)
		return nil, err
	}
	return out, nil
}

// writePatch writes positions [o0, o1) of one window's output patch (M
// planes of gm.p×gm.q in y) from a product block (row stride n, position
// o0 in column 0): bias, then the clamp, then the kept value (planes of
// oh×ow in kept) over every position outside the window's changed
// rectangle.
func (inc *Incremental) writePatch(y, prod []float32, n, m, o0, o1 int, gm incGeo, b int, bias []float32, lo, hi float32, kept []float32, oh, ow int) {
	pq := gm.p * gm.q
	for mo := 0; mo < m; mo++ {
		d := y[mo*pq+o0 : mo*pq+o1]
		copy(d, prod[mo*n:mo*n+len(d)])
		var bv float32
		if bias != nil {
			bv = bias[mo]
		}
		kernel.BiasClamp(d, bv, lo, hi)
	}
	// Kept values outside the changed rectangle, row by row of the patch.
	r := gm.chg[b]
	oy, ox := gm.oy[b], gm.ox[b]
	for o := o0; o < o1; {
		i := o / gm.q
		c0 := o - i*gm.q
		c1 := min(gm.q, o1-i*gm.q)
		yy := oy + i
		// Columns [k0, k1) of this row segment are inside the rectangle.
		k0, k1 := c0, c0
		if !r.empty() && yy >= r.Y0 && yy < r.Y1 {
			k0 = min(max(r.X0-ox, c0), c1)
			k1 = min(max(r.X1-ox, k0), c1)
		}
		for _, seg := range [2][2]int{{c0, k0}, {k1, c1}} {
			if seg[0] >= seg[1] {
				continue
			}
			for mo := 0; mo < m; mo++ {
				d := y[mo*pq+i*gm.q+seg[0] : mo*pq+i*gm.q+seg[1]]
				s := kept[(mo*oh+yy)*ow+ox+seg[0]:]
				for j := range d {
					d[j] = s[j]
				}
			}
		}
		o = i*gm.q + c1
	}
}

// gatherRow writes row y, columns [x0, x0+len(d)) of a source plane of an
// h×w map into d: the source's own data where it has it, the kept plane
// elsewhere, and zero outside the map (a Conv's padding).
func gatherRow(d []float32, s *incSource, y, x0, h, w int) {
	x1 := x0 + len(d)
	if y < 0 || y >= h {
		clear(d)
		return
	}
	xa, xb := min(max(x0, 0), x1), max(min(x1, w), x0)
	clear(d[:xa-x0])
	clear(d[xb-x0:])
	if xa >= xb {
		return
	}
	kept := s.base[y*w:]
	a, b, row := s.cols(y)
	a, b = min(max(a, xa), xb), max(min(b, xb), xa)
	if a >= b {
		copy(d[xa-x0:xb-x0], kept[xa:xb])
		return
	}
	copy(d[xa-x0:a-x0], kept[xa:a])
	copy(d[a-x0:b-x0], row[a-s.x0:b-s.x0])
	copy(d[b-x0:xb-x0], kept[b:xb])
}
