package engine

import (
	"runtime"
	"slices"
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

// incBox is a set of windows of a batch whose changed rectangles at one
// Conv are computed as boxes of one size h×w, the box of window wins[i]
// at map position (by[i], bx[i]) inside its patch.
type incBox struct {
	h, w   int
	wins   []int
	by, bx []int
	// Set by convPanels: the gathered input size, its plan, and where
	// the group's gathered inputs start in the shared buffer.
	ih, iw int
	plan   *kernel.Im2colPlan
	xOff   int
}

// incBoxes groups the windows of a patch geometry for a Conv's matrix
// product. A batch's patches share one size (the largest changed
// rectangle in the batch), but a window's result is needed only inside its
// own changed rectangle (restore takes the rest from the kept pass), so
// the product is formed over each window's rectangle rather than its
// patch: 7 % fewer multiply-adds than whole patches on ResNet-18 at 224²
// (patch 16, stride 8, batches of 16), where almost every row and column
// of windows has its own sequence of rectangle sizes down the network.
// Windows whose rectangles have one size form a group lowered with one
// plan; since every group's columns are padded to whole panels of nr,
// groups are merged (to the larger size in each dimension) while that
// lowers the estimated cost, columns plus one panel per group. Windows
// with no changed position at this layer are in no group.
func incBoxes(gm incGeo, nr int) []incBox {
	var groups []incBox
	for b, r := range gm.chg {
		if r.empty() {
			continue
		}
		h, w := r.Y1-r.Y0, r.X1-r.X0
		i := 0
		for i < len(groups) && (groups[i].h != h || groups[i].w != w) {
			i++
		}
		if i == len(groups) {
			groups = append(groups, incBox{h: h, w: w})
		}
		groups[i].wins = append(groups[i].wins, b)
	}
	cost := func(h, w, n int) int { return (n*h*w+nr-1)/nr*nr + nr }
	for len(groups) > 1 {
		best, bi, bj := 0, -1, -1
		for i := range groups {
			for j := i + 1; j < len(groups); j++ {
				a, b := &groups[i], &groups[j]
				save := cost(a.h, a.w, len(a.wins)) + cost(b.h, b.w, len(b.wins)) - cost(max(a.h, b.h), max(a.w, b.w), len(a.wins)+len(b.wins))
				if save > best {
					best, bi, bj = save, i, j
				}
			}
		}
		if bi < 0 {
			break
		}
		a, b := &groups[bi], groups[bj]
		a.h, a.w = max(a.h, b.h), max(a.w, b.w)
		a.wins = append(a.wins, b.wins...)
		groups = append(groups[:bj], groups[bj+1:]...)
	}
	for i := range groups {
		g := &groups[i]
		g.by, g.bx = make([]int, len(g.wins)), make([]int, len(g.wins))
		for j, b := range g.wins {
			// The box holds the rectangle and lies inside the patch
			// (h ≤ P, w ≤ Q: the patch holds the batch's largest
			// rectangle).
			r := gm.chg[b]
			g.by[j] = min(r.Y0, gm.oy[b]+gm.p-g.h)
			g.bx[j] = min(r.X0, gm.ox[b]+gm.q-g.w)
		}
	}
	return groups
}

// incSlab is a range of columns [j0, j1) of one group's product.
type incSlab struct{ group, j0, j1 int }

// convPanels computes a one-group Conv's patch for every window of a batch
// by matrix products, W [M × C·kh·kw] times the columns of the windows'
// boxes (incBoxes) side by side, on the plan's team in two phases:
//
//  1. gather: each box's input region (the kept value overlaid with the
//     upstream patch, zero outside the map, which is the Conv's padding)
//     is written straight into the layout the lowering reads; for a
//     column stride s > 1 that is the column-phased layout of
//     kernel.Im2colPlan.PadPhased, so no separate padding pass runs. The
//     same phase writes the kept value over each patch outside its box.
//  2. slabs of columns: each is lowered into packed panels
//     (Im2colPanelsPadded/Phased), multiplied (Packed.SgemmPanels), given
//     the bias and fused activation (kernel.BiasClamp, as the runtime's
//     epilogue) and copied into its windows' patches, with the kept value
//     at positions outside a window's changed rectangle, while the slab's
//     block is in cache. Positions outside the rectangle are computed only
//     because windows share a size; taking them from the kept pass makes a
//     window's result independent of its batch (the restore step of the
//     other patch operators).
//
// It returns nil and no error when a box geometry does not give a plan of
// the expected output size; the caller then takes the general path.
func (inc *Incremental) convPanels(k int, gm incGeo, vals []*incVal, nb int) (*incVal, error) {
	p := inc.plan
	st := &p.steps[k]
	v := p.g.nodes[k].in[0]
	src := vals[v]
	shp := p.shapes[v]
	c, h, w := shp[1], shp[2], shp[3]
	g := st.g
	conv := st.conv
	nr := conv.gemm1.PanelWidth()
	groups := incBoxes(gm, nr)
	xLen, cols := 0, 0
	for i := range groups {
		gr := &groups[i]
		gr.ih = (gr.h-1)*g.sh + (g.kh-1)*g.dh + 1
		gr.iw = (gr.w-1)*g.sw + (g.kw-1)*g.dw + 1
		plan, err := st.plan(c, gr.ih, gr.iw)
		if err != nil {
			return nil, nil
		}
		if oh, ow := plan.Out(); oh != gr.h || ow != gr.w {
			return nil, nil
		}
		gr.plan, gr.xOff = plan, xLen
		xLen += len(gr.wins) * c * gr.ih * gr.iw
		cols += len(gr.wins) * gr.h * gr.w
	}
	ov := p.outValue(k)
	oh, ow := p.shapes[ov][2], p.shapes[ov][3]
	kept := inc.base[ov].F32
	m := st.m
	kk := c * g.kh * g.kw
	pq := gm.p * gm.q
	workers := runtime.GOMAXPROCS(0)
	// Slabs: about three per core, so a core slowed by other work on the
	// machine takes fewer, and at most 1024 columns, as in the runtime's
	// batched path (convOp.batchForward). A slab never spans two groups.
	wd := min(1024, max(nr, (cols+3*workers-1)/(3*workers)))
	var slabs []incSlab
	for i, gr := range groups {
		n := len(gr.wins) * gr.h * gr.w
		parts := (n + wd - 1) / wd
		step := ((n+parts-1)/parts + nr - 1) / nr * nr
		for j0 := 0; j0 < n; j0 += step {
			slabs = append(slabs, incSlab{i, j0, min(j0+step, n)})
		}
	}
	// Largest first, and the last few halved, so the cores finish
	// together: a phase ends when its slowest core does, and on a shared
	// machine a core's share is unpredictable (the team claims tasks in
	// order). Measured on ResNet-18 (729 windows, loaded machine, five
	// alternating runs): 7 % less wall time, the same CPU time.
	slices.SortStableFunc(slabs, func(a, b incSlab) int { return (b.j1 - b.j0) - (a.j1 - a.j0) })
	for i := max(0, len(slabs)-workers); i < len(slabs); i++ {
		sl := slabs[i]
		if n := sl.j1 - sl.j0; n >= 2*nr {
			mid := sl.j0 + (n/2+nr-1)/nr*nr
			slabs[i].j1 = mid
			slabs = append(slabs, incSlab{sl.group, mid, sl.j1})
		}
	}
	// Gather tasks: whole channel planes of boxes, about four per core.
	planes := 0
	for _, gr := range groups {
		planes += len(gr.wins) * c
	}
	gathers := min(planes, 4*workers)
	x := p.bufs.get(xLen)
	defer p.bufs.put(x)
	out := &incVal{incGeo: gm, t: p.patchTensor(nb, m, gm.p, gm.q), owned: true}
	y := out.t.F32
	// Windows each group owns, for the kept values outside boxes.
	boxOf := make([][2]int, nb) // group, index in group; group −1: none
	for b := range boxOf {
		boxOf[b] = [2]int{-1, 0}
	}
	for i, gr := range groups {
		for j, b := range gr.wins {
			boxOf[b] = [2]int{i, j}
		}
	}
	lo, hi := st.bounds()
	err := p.team.run([]int{gathers + nb, len(slabs)}, func(ph, t int) error {
		if ph == 0 {
			if t >= gathers {
				// Kept values over window b's patch outside its box.
				b := t - gathers
				by, bx, bh, bw := gm.oy[b], gm.ox[b], 0, 0
				if gi := boxOf[b]; gi[0] >= 0 {
					gr := &groups[gi[0]]
					by, bx, bh, bw = gr.by[gi[1]], gr.bx[gi[1]], gr.h, gr.w
				}
				inc.keepOutside(y[b*m*pq:(b+1)*m*pq], m, gm, b, by, bx, bh, bw, kept, oh, ow)
				return nil
			}
			inc.gatherBoxes(x, groups, planes*t/gathers, planes*(t+1)/gathers, v, src, c, h, w, g)
			return nil
		}
		sl := slabs[t]
		gr := &groups[sl.group]
		n := sl.j1 - sl.j0
		panels := p.bufs.get(kk * ((n + nr - 1) / nr * nr))
		defer p.bufs.put(panels)
		xg := x[gr.xOff : gr.xOff+len(gr.wins)*c*gr.ih*gr.iw]
		var err error
		if g.sw > 1 {
			err = gr.plan.Im2colPanelsPhased(panels, xg, len(gr.wins), c, sl.j0, sl.j1, nr)
		} else {
			err = gr.plan.Im2colPanelsPadded(panels, xg, len(gr.wins), c, sl.j0, sl.j1, nr)
		}
		if err != nil {
			return err
		}
		prod := p.bufs.get(m * n)
		defer p.bufs.put(prod)
		conv.gemm1.SgemmPanels(m, n, kk, st.w, kk, panels, prod, n)
		for mo := 0; mo < m; mo++ {
			var bv float32
			if st.b != nil {
				bv = st.b[mo]
			}
			kernel.BiasClamp(prod[mo*n:(mo+1)*n], bv, lo, hi)
		}
		// Column j of the group's product is box position j mod h·w of
		// the group's window j / (h·w).
		bhw := gr.h * gr.w
		for j := sl.j0; j < sl.j1; {
			i, o := j/bhw, j%bhw
			e := min(sl.j1, (i+1)*bhw)
			b := gr.wins[i]
			inc.writeBox(y[b*m*pq:(b+1)*m*pq], prod[j-sl.j0:], n, m, o, e-i*bhw, gm, b, gr.by[i], gr.bx[i], gr.h, gr.w, kept, oh, ow)
			j = e
		}
		return nil
	})
	if err != nil {
		p.bufs.put(y)
		return nil, err
	}
	return out, nil
}

// gatherBoxes writes the gathered input planes [i0, i1) of the groups'
// boxes (numbered group by group, window-major, channel-minor) into x.
func (inc *Incremental) gatherBoxes(x []float32, groups []incBox, i0, i1 int, v int, src *incVal, c, h, w int, g geom2) {
	var row []float32
	var phase []int // where each column phase starts in a phased row
	base := 0
	for gi := range groups {
		gr := &groups[gi]
		n := len(gr.wins) * c
		lo, hi := max(i0-base, 0), min(i1-base, n)
		base += n
		if lo >= hi {
			continue
		}
		ih, iw := gr.ih, gr.iw
		if g.sw > 1 {
			if cap(row) < iw {
				row = make([]float32, iw)
			}
			row = row[:iw]
			phase = phase[:0]
			off := 0
			for q := 0; q < g.sw; q++ {
				phase = append(phase, off)
				off += (iw - q + g.sw - 1) / g.sw
			}
		}
		for i := lo; i < hi; i++ {
			j, ch := i/c, i%c
			b := gr.wins[j]
			s := inc.source(v, src, b, ch)
			y0, x0 := gr.by[j]*g.sh-g.pt, gr.bx[j]*g.sw-g.pl
			dst := x[gr.xOff+i*ih*iw : gr.xOff+(i+1)*ih*iw]
			for r := 0; r < ih; r++ {
				d := dst[r*iw : (r+1)*iw]
				if g.sw == 1 {
					gatherRow(d, &s, y0+r, x0, h, w)
					continue
				}
				gatherRow(row, &s, y0+r, x0, h, w)
				for q := 0; q < g.sw; q++ {
					pd := d[phase[q]:]
					for k, xx := 0, q; xx < iw; k, xx = k+1, xx+g.sw {
						pd[k] = row[xx]
					}
				}
			}
		}
	}
}

// keepOutside writes the kept value (planes of oh×ow in kept) over every
// position of window b's output patch y (M planes of P×Q) outside its box
// of bh×bw at map position (by, bx); bh = 0 for none.
func (inc *Incremental) keepOutside(y []float32, m int, gm incGeo, b, by, bx, bh, bw int, kept []float32, oh, ow int) {
	oy, ox := gm.oy[b], gm.ox[b]
	if bh == gm.p && bw == gm.q {
		return
	}
	pq := gm.p * gm.q
	for i := 0; i < gm.p; i++ {
		yy := oy + i
		k0, k1 := 0, 0 // patch columns of the box on this row
		if bh > 0 && yy >= by && yy < by+bh {
			k0, k1 = bx-ox, bx-ox+bw
		}
		for _, seg := range [2][2]int{{0, k0}, {k1, gm.q}} {
			if seg[0] >= seg[1] {
				continue
			}
			for mo := 0; mo < m; mo++ {
				copy(y[mo*pq+i*gm.q+seg[0]:mo*pq+i*gm.q+seg[1]], kept[(mo*oh+yy)*ow+ox+seg[0]:])
			}
		}
	}
}

// writeBox copies box positions [o0, o1) of one window (box bh×bw at map
// position (by, bx)) from a finished product block (row stride n, position
// o0 in column 0) into the window's output patch y (M planes of P×Q),
// then writes the kept value (planes of oh×ow in kept) over the positions
// among them outside the window's changed rectangle.
func (inc *Incremental) writeBox(y, prod []float32, n, m, o0, o1 int, gm incGeo, b, by, bx, bh, bw int, kept []float32, oh, ow int) {
	pq := gm.p * gm.q
	dy, dx := by-gm.oy[b], bx-gm.ox[b]
	if bw == gm.q {
		// Box rows are whole patch rows: the positions are contiguous.
		at := dy*gm.q + o0
		for mo := 0; mo < m; mo++ {
			copy(y[mo*pq+at:mo*pq+at+o1-o0], prod[mo*n:])
		}
	} else {
		for o := o0; o < o1; {
			i := o / bw
			e := min(o1, (i+1)*bw)
			at := (i+dy)*gm.q + dx + o - i*bw
			for mo := 0; mo < m; mo++ {
				copy(y[mo*pq+at:mo*pq+at+e-o], prod[mo*n+o-o0:])
			}
			o = e
		}
	}
	// Kept values inside the box but outside the changed rectangle.
	r := gm.chg[b]
	for o := o0; o < o1; {
		i := o / bw
		c0 := o - i*bw
		c1 := min(bw, o1-i*bw)
		yy := by + i
		// Box columns [k0, k1) of this row segment are inside the rectangle.
		k0, k1 := c0, c0
		if yy >= r.Y0 && yy < r.Y1 {
			k0 = min(max(r.X0-bx, c0), c1)
			k1 = min(max(r.X1-bx, k0), c1)
		}
		for _, seg := range [2][2]int{{c0, k0}, {k1, c1}} {
			if seg[0] >= seg[1] {
				continue
			}
			at := (i+dy)*gm.q + dx
			for mo := 0; mo < m; mo++ {
				d := y[mo*pq+at+seg[0] : mo*pq+at+seg[1]]
				s := kept[(mo*oh+yy)*ow+bx+seg[0]:]
				for j := range d {
					d[j] = s[j]
				}
			}
		}
		o = i*bw + c1
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
