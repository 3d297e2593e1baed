package engine

import (
	"fmt"
	"runtime"
	"sync"

	"heedmap/kernel"
)

// planKey identifies the spatial input size a convolution node was planned
// for; kernel, strides, pads and dilations are fixed per node.
type planKey struct{ h, w int }

// planCache holds one single-channel kernel.Im2colPlan per input size
// seen by a node. A plan for one channel serves every channel and group
// (they share the geometry), so channels can be split over goroutines
// without a plan per split. Plans are read-only once made, so a cache is
// safe for concurrent Runs.
type planCache struct {
	m sync.Map // planKey → *kernel.Im2colPlan
}

// plan returns the single-channel plan for g, making it on first use. It
// fails when the kernel package's output size disagrees with the node's
// resolved geometry (it cannot for explicit pads, but the check keeps a
// silent mismatch impossible).
func (c *planCache) plan(g geom2) (*kernel.Im2colPlan, error) {
	key := planKey{g.ih, g.iw}
	if p, ok := c.m.Load(key); ok {
		return p.(*kernel.Im2colPlan), nil
	}
	p, err := kernel.NewIm2col(kernel.Conv2D{
		C: 1, H: g.ih, W: g.iw, KH: g.kh, KW: g.kw,
		StrideH: g.sh, StrideW: g.sw, DilationH: g.dh, DilationW: g.dw,
		PadTop: g.pt, PadLeft: g.pl, PadBottom: g.pb, PadRight: g.pr,
	})
	if err != nil {
		return nil, err
	}
	if oh, ow := p.Out(); oh != g.oh || ow != g.ow {
		return nil, fmt.Errorf("im2col plan output %dx%d, node geometry %dx%d", oh, ow, g.oh, g.ow)
	}
	c.m.Store(key, p)
	return p, nil
}

// planIm2col writes the column matrix of the c-channel image x into col,
// splitting channels over goroutines.
func planIm2col(p *kernel.Im2colPlan, x []float32, c int, g geom2, col []float32) error {
	ihw, ohw, kk := g.ih*g.iw, g.oh*g.ow, g.kh*g.kw
	var firstErr error
	var mu sync.Mutex
	splitWork(c, c*kk*ohw, func(c0, c1 int) {
		for ch := c0; ch < c1; ch++ {
			if err := p.Im2col(col[ch*kk*ohw:(ch+1)*kk*ohw], x[ch*ihw:(ch+1)*ihw]); err != nil {
				mu.Lock()
				firstErr = err
				mu.Unlock()
				return
			}
		}
	})
	return firstErr
}

// planCol2im writes the column gradients col back onto the c-channel image
// dx (the adjoint of planIm2col), splitting channels over the team; each
// goroutine owns the planes it writes. An image of few channels (the
// first layer's three) is split by rows instead, which gives the same
// sums (kernel.Col2imRows). With overwrite each part is cleared just
// before it is accumulated into, while it is in that core's cache,
// instead of in a separate pass over dx; otherwise the values are added
// to what dx holds.
func planCol2im(tm *team, p *kernel.Im2colPlan, col []float32, c int, g geom2, dx []float32, overwrite bool) error {
	ihw, ohw, kk := g.ih*g.iw, g.oh*g.ow, g.kh*g.kw
	var firstErr error
	var mu sync.Mutex
	fail := func(err error) {
		mu.Lock()
		firstErr = err
		mu.Unlock()
	}
	if c < 4*runtime.GOMAXPROCS(0) {
		tm.split(g.ih, c*kk*ohw, func(y0, y1 int) {
			for ch := 0; ch < c; ch++ {
				plane := dx[ch*ihw : (ch+1)*ihw]
				if overwrite {
					clear(plane[y0*g.iw : y1*g.iw])
				}
				if err := p.Col2imRows(plane, col[ch*kk*ohw:(ch+1)*kk*ohw], y0, y1); err != nil {
					fail(err)
					return
				}
			}
		})
		return firstErr
	}
	tm.split(c, c*kk*ohw, func(c0, c1 int) {
		for ch := c0; ch < c1; ch++ {
			plane := dx[ch*ihw : (ch+1)*ihw]
			if overwrite {
				clear(plane)
			}
			if err := p.Col2im(plane, col[ch*kk*ohw:(ch+1)*kk*ohw]); err != nil {
				fail(err)
				return
			}
		}
	})
	return firstErr
}
