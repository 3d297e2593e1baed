package engine

import "slices"

// Order returns an evaluation order for rects that puts windows with the
// same patch sizes next to each other, so batches taken in that order pad
// fewer patches up to a larger neighbour's size. Windows near the borders
// have clipped, smaller patches; interleaved with interior windows they
// would cost as much as those. The key is each window's own per-layer
// patch extents (one window at a time), compared layer by layer from the
// deepest spatial layer, where patches are largest relative to the map.
func (inc *Incremental) Order(rects []Rect) []int {
	p := inc.plan
	keys := make([][]int, len(rects))
	for i, r := range rects {
		geos := p.propagate([]Rect{r})
		var key []int
		for k := len(p.g.nodes) - 1; k >= 0; k-- {
			st := &p.steps[k]
			if st.kind != incConv {
				continue
			}
			gm := geos[p.g.nodes[k].out[0]]
			if gm == nil || gm.full {
				continue
			}
			key = append(key, gm.p, gm.q)
		}
		keys[i] = key
	}
	idx := make([]int, len(rects))
	for i := range idx {
		idx[i] = i
	}
	slices.SortStableFunc(idx, func(a, b int) int { return slices.Compare(keys[a], keys[b]) })
	return idx
}

// orderedCost is MultiplyAdds for rects evaluated in the given order.
func (inc *Incremental) orderedCost(rects []Rect, order []int, batch int) int64 {
	sorted := make([]Rect, len(rects))
	for i, j := range order {
		sorted[i] = rects[j]
	}
	c, _ := inc.MultiplyAdds(sorted, batch)
	return c
}
