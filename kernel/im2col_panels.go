package kernel

import "fmt"

// maxPanelWidth bounds the nr Im2colPanels accepts (the widest micro-kernel
// tile is 32 columns), so its per-panel segment table lives on the stack.
const maxPanelWidth = 64

// panelSeg is the part of one panel that lies on one output row: output
// columns [ow0, ow1) of row oh, at column off of the panel.
type panelSeg struct{ oh, ow0, ow1, off int }

// Im2colPanels writes columns [j0, j1) of the column matrix (output
// positions in (oh, ow) order) straight into the packed-B layout of
// Packed.SgemmPanels: ⌈(j1−j0)/nr⌉ panels, panel q holding the K×nr block
// of columns j0+q·nr … with the column index fastest (entry (row, j) at
// q·K·nr + row·nr + j), the last panel zero-padded to nr columns. Each
// panel is written front to back, and the (oh, ow) segments of a panel
// are worked out once and shared by its K rows.
//
// src holds channels planes of the plan's H×W, and K = channels·KH·KW:
// the geometry is per plane, so a plan made for one channel serves any
// channel count (callers cache one plan per input size).
func (p *Im2colPlan) Im2colPanels(dst, src []float32, channels, j0, j1, nr int) error {
	_, cols := p.Shape()
	if channels <= 0 {
		return fmt.Errorf("kernel: im2col channel count %d must be positive", channels)
	}
	rows := channels * p.g.KH * p.g.KW
	if j0 < 0 || j1 > cols || j0 > j1 {
		return fmt.Errorf("kernel: im2col columns [%d, %d) outside [0, %d)", j0, j1, cols)
	}
	if nr <= 0 || nr > maxPanelWidth {
		return fmt.Errorf("kernel: im2col panel width %d outside [1, %d]", nr, maxPanelWidth)
	}
	panels := (j1 - j0 + nr - 1) / nr
	if len(dst) < panels*rows*nr {
		return fmt.Errorf("kernel: im2col panels have %d values, want %d (%d panels of %d×%d)", len(dst), panels*rows*nr, panels, rows, nr)
	}
	if n := channels * p.g.H * p.g.W; len(src) < n {
		return fmt.Errorf("kernel: im2col image has %d values, want %d (%d×%d×%d)", len(src), n, channels, p.g.H, p.g.W)
	}
	g := p.g
	var segBuf [maxPanelWidth]panelSeg
	for q := 0; q < panels; q++ {
		jp := j0 + q*nr
		je := min(jp+nr, j1)
		segs := segBuf[:0]
		for j := jp; j < je; {
			oh, ow0 := j/p.ow, j%p.ow
			end := min(je, (oh+1)*p.ow)
			segs = append(segs, panelSeg{oh: oh, ow0: ow0, ow1: ow0 + end - j, off: j - jp})
			j = end
		}
		valid := je - jp
		panel := dst[q*rows*nr : (q+1)*rows*nr]
		row := 0
		for c := 0; c < channels; c++ {
			plane := src[c*g.H*g.W : (c+1)*g.H*g.W]
			for kh := 0; kh < g.KH; kh++ {
				ohLo, ohHi := p.ohLo[kh], p.ohHi[kh]
				for kw := 0; kw < g.KW; kw++ {
					d := panel[row*nr : (row+1)*nr]
					row++
					owLo, owHi := p.owLo[kw], p.owHi[kw]
					for _, s := range segs {
						seg := d[s.off : s.off+s.ow1-s.ow0]
						if s.oh < ohLo || s.oh >= ohHi {
							clear(seg)
							continue
						}
						lo := min(max(owLo, s.ow0), s.ow1)
						hi := max(min(owHi, s.ow1), lo)
						clear(seg[:lo-s.ow0])
						clear(seg[hi-s.ow0:])
						if lo < hi {
							p.gather(seg[lo-s.ow0:hi-s.ow0], plane[p.srcRow(s.oh, kh)*g.W:], p.srcCol(lo, kw))
						}
					}
					clear(d[valid:])
				}
			}
		}
	}
	return nil
}
