package kernel

import (
	"fmt"
	"math"
)

// PaddedShape returns the height and width of one zero-padded input plane,
// H+PadTop+PadBottom by W+PadLeft+PadRight: the layout Pad writes and
// Im2colPanelsPadded reads.
func (p *Im2colPlan) PaddedShape() (ph, pw int) {
	g := p.g
	return g.H + g.PadTop + g.PadBottom, g.W + g.PadLeft + g.PadRight
}

// NeedsPad reports whether the plan has padding; without it the input
// itself is its padded layout and Pad need not run.
func (p *Im2colPlan) NeedsPad() bool {
	g := p.g
	return g.PadTop != 0 || g.PadLeft != 0 || g.PadBottom != 0 || g.PadRight != 0
}

// Pad copies channel planes [c0, c1) of src (planes of the plan's H×W) into
// dst (planes of PaddedShape), writing zeros around them. Callers split the
// channels over goroutines.
func (p *Im2colPlan) Pad(dst, src []float32, c0, c1 int) error {
	ph, _ := p.PaddedShape()
	return p.padRange(dst, src, c0, c1, 0, ph, false)
}

// PadRows is Pad for the padded rows [r0, r1) (0 ≤ r0 ≤ r1 ≤ the padded
// height) of channels planes: the other rows are not touched, so callers
// may split the rows over goroutines instead of the channels, and a
// goroutine that pads the top rows and then lowers the top output rows
// reads what it wrote itself.
func (p *Im2colPlan) PadRows(dst, src []float32, channels, r0, r1 int) error {
	return p.padRange(dst, src, 0, channels, r0, r1, false)
}

// PadRowsPhased is PadRows in PadPhased's layout.
func (p *Im2colPlan) PadRowsPhased(dst, src []float32, channels, r0, r1 int) error {
	return p.padRange(dst, src, 0, channels, r0, r1, true)
}

// Im2colPanelsPadded is Im2colPanels reading the zero-padded input that
// Pad writes (channels planes of PaddedShape). Every kernel tap then reads
// inside the buffer, so no value needs a padding test: each panel row is a
// few plain copies, one per output row the panel spans, at an offset that
// depends only on the tap. With 32-wide panels and AVX-512 the rows are
// assembled in registers with masked loads (panelRowsAVX512), or masked
// gathers when the column stride is not 1 (panelRowsGatherAVX512);
// elsewhere a Go loop does the same copies. Its
// output equals Im2colPanels' bit for bit.
//
// padded may hold several images (images × channels planes): the column
// matrix is then the images' matrices side by side, column
// i·OH·OW + oh·OW + ow for output (oh, ow) of image i, so one product
// serves a batch of small inputs.
func (p *Im2colPlan) Im2colPanelsPadded(dst, padded []float32, images, channels, j0, j1, nr int) error {
	return p.im2colPanels(dst, padded, images, channels, j0, j1, nr, false)
}

// Im2colPanelsPhased is Im2colPanelsPadded reading the column-phased
// padded input PadPhased writes. With a column stride s > 1 every tap then
// reads consecutive values of one phase plane, so each panel row is the
// same masked-load copy as at stride 1 instead of a gather (which measured
// 5–10× slower per value on this machine). With s = 1 the layouts agree.
func (p *Im2colPlan) Im2colPanelsPhased(dst, phased []float32, images, channels, j0, j1, nr int) error {
	return p.im2colPanels(dst, phased, images, channels, j0, j1, nr, true)
}

// phaseOffsets returns where, within a padded row of pw values, phase
// plane q (the columns ≡ q mod s) starts in the phased layout, for
// q = 0 … s−1: phase q holds ⌈(pw−q)/s⌉ values.
func phaseOffsets(pw, s int) []int {
	offs := make([]int, s)
	for q := 1; q < s; q++ {
		offs[q] = offs[q-1] + (pw-(q-1)+s-1)/s
	}
	return offs
}

// checkPad checks Pad's and PadPhased's channel range and buffer lengths.
func (p *Im2colPlan) checkPad(dst, src []float32, c0, c1 int) error {
	g := p.g
	ph, pw := p.PaddedShape()
	if c0 < 0 || c0 > c1 {
		return fmt.Errorf("kernel: pad channel range [%d, %d) is invalid", c0, c1)
	}
	if len(src) < c1*g.H*g.W || len(dst) < c1*ph*pw {
		return fmt.Errorf("kernel: pad of %d channels needs %d input and %d output values, got %d and %d", c1, c1*g.H*g.W, c1*ph*pw, len(src), len(dst))
	}
	return nil
}

// PadPhased is Pad writing each padded row split by column phase: with
// column stride s the row's columns ≡ 0 mod s first, then ≡ 1, and so on,
// each phase in column order. Im2colPanelsPhased reads this layout.
func (p *Im2colPlan) PadPhased(dst, src []float32, c0, c1 int) error {
	ph, _ := p.PaddedShape()
	return p.padRange(dst, src, c0, c1, 0, ph, true)
}

// padRange writes the padded rows [r0, r1) of channel planes [c0, c1), in
// PadPhased's layout when phased.
func (p *Im2colPlan) padRange(dst, src []float32, c0, c1, r0, r1 int, phased bool) error {
	g := p.g
	ph, pw := p.PaddedShape()
	if err := p.checkPad(dst, src, c0, c1); err != nil {
		return err
	}
	if r0 < 0 || r0 > r1 || r1 > ph {
		return fmt.Errorf("kernel: pad row range [%d, %d) outside [0, %d)", r0, r1, ph)
	}
	// Image rows [h0, h1) land in the range; the rest of it is padding.
	h0, h1 := max(r0-g.PadTop, 0), min(r1-g.PadTop, g.H)
	s := g.StrideW
	var po []int
	if phased {
		po = phaseOffsets(pw, s)
	}
	for c := c0; c < c1; c++ {
		d := dst[c*ph*pw : (c+1)*ph*pw]
		sp := src[c*g.H*g.W : (c+1)*g.H*g.W]
		if r0 < g.PadTop {
			clear(d[r0*pw : min(r1, g.PadTop)*pw])
		}
		if top := g.PadTop + g.H; r1 > top {
			clear(d[max(r0, top)*pw : r1*pw])
		}
		if h0 >= h1 {
			continue
		}
		if !phased {
			for h := h0; h < h1; h++ {
				row := d[(g.PadTop+h)*pw : (g.PadTop+h+1)*pw]
				// Side pads are a value or two: stores, not memclr calls
				// (a call per row was 2 % of a ResNet-18 forward pass).
				for x := 0; x < g.PadLeft; x++ {
					row[x] = 0
				}
				copy(row[g.PadLeft:], sp[h*g.W:(h+1)*g.W])
				for x := g.PadLeft + g.W; x < pw; x++ {
					row[x] = 0
				}
			}
			continue
		}
		if s == 2 && !p.portable && g.W > 0 {
			// Image column j is padded column PadLeft + j: the even j
			// go to the phase of PadLeft's parity, the odd j to the
			// other, with the depthwise path's vector de-interleave
			// (the scalar loop below ran at about 1 GB/s and was 7 % of
			// a ResNet-18 forward pass at batch 1 on a loaded machine).
			// Only the padding is cleared: the top and bottom rows, and
			// after the fill each row's few padding columns (clearing the
			// whole plane first doubled the bytes written).
			l := g.PadLeft
			rows := d[(g.PadTop+h0)*pw:]
			ev := rows[po[l&1]+l>>1:]
			od := rows[po[(l+1)&1]+(l+1)>>1:]
			if dwFillPhasedSIMD(ISAAuto, ev, od, sp[h0*g.W:], h1-h0, g.W, pw, g.W) {
				for h := 0; h < h1-h0; h++ {
					row := rows[h*pw : (h+1)*pw]
					for x := 0; x < l; x++ {
						row[po[x&1]+x>>1] = 0
					}
					for x := l + g.W; x < pw; x++ {
						row[po[x&1]+x>>1] = 0
					}
				}
				continue
			}
		}
		for h := h0; h < h1; h++ {
			row := d[(g.PadTop+h)*pw : (g.PadTop+h+1)*pw]
			in := sp[h*g.W : (h+1)*g.W]
			for q := 0; q < s; q++ {
				ph := row[po[q]:]
				i := 0
				for x := q; x < pw; x += s {
					var v float32
					if ix := x - g.PadLeft; ix >= 0 && ix < g.W {
						v = in[ix]
					}
					ph[i] = v
					i++
				}
			}
		}
	}
	return nil
}

func (p *Im2colPlan) im2colPanels(dst, padded []float32, images, channels, j0, j1, nr int, phased bool) error {
	_, ohw := p.Shape()
	g := p.g
	if images <= 0 {
		return fmt.Errorf("kernel: im2col image count %d must be positive", images)
	}
	cols := images * ohw
	if channels <= 0 {
		return fmt.Errorf("kernel: im2col channel count %d must be positive", channels)
	}
	rows := channels * g.KH * g.KW
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
	ph, pw := p.PaddedShape()
	if len(padded) < images*channels*ph*pw {
		return fmt.Errorf("kernel: padded input has %d values, want %d (%d×%d×%d×%d)", len(padded), images*channels*ph*pw, images, channels, ph, pw)
	}
	if images*channels*ph*pw > math.MaxInt32 {
		return fmt.Errorf("kernel: padded input of %d values exceeds the 32-bit offsets of the panel loop", images*channels*ph*pw)
	}
	// colStep is how far one output column moves along a stored row:
	// the stride, or 1 within a phase plane.
	colStep := g.StrideW
	if phased {
		colStep = 1
	}
	offs := p.tapOffsets(channels, phased)
	// The vector loops take 32-wide panels (any column stride) and
	// panels up to 16 wide at unit stride (packed A operands, see
	// Packed.SgemmRowPanels).
	narrow := nr <= 16 && colStep == 1
	vector := (nr == 32 || narrow) && !p.portable && panelRowsSIMD()
	var lanes [32]int32 // lane j of a segment reads shift + j·colStep
	for j := range lanes {
		lanes[j] = int32(j * colStep)
	}
	var segBuf [maxPanelWidth]panelSeg
	var packed [maxPanelWidth]uint64
	for q := 0; q < panels; q++ {
		jp := j0 + q*nr
		je := min(jp+nr, j1)
		segs := segBuf[:0]
		for j := jp; j < je; {
			img, r := j/ohw, j%ohw
			oh, ow0 := r/p.ow, r%p.ow
			end := min(je, img*ohw+(oh+1)*p.ow)
			// off is the panel lane; ow0 and ow1 become the segment's
			// input offset (from the tap base) and length.
			src := img*channels*ph*pw + oh*g.StrideH*pw + ow0*colStep
			segs = append(segs, panelSeg{oh: oh, ow0: src, ow1: end - j, off: j - jp})
			j = end
		}
		panel := dst[q*rows*nr : (q+1)*rows*nr]
		if vector {
			for i, s := range segs {
				mask := uint32(((uint64(1) << s.ow1) - 1) << s.off)
				shift := int32(s.ow0 - s.off*colStep)
				packed[i] = uint64(uint32(shift)) | uint64(mask)<<32
			}
			if narrow {
				panelRowsNarrow(rows, panel, padded, offs, packed[:len(segs)], nr)
				continue
			}
			panelRows(rows, panel, padded, offs, packed[:len(segs)], colStep, &lanes)
			continue
		}
		valid := je - jp
		sw := colStep
		for r, off := range offs {
			d := panel[r*nr : (r+1)*nr]
			for _, s := range segs {
				src := padded[int(off)+s.ow0:]
				seg := d[s.off : s.off+s.ow1]
				if sw == 1 {
					copy(seg, src[:len(seg)])
					continue
				}
				for i := range seg {
					seg[i] = src[i*sw]
				}
			}
			clear(d[valid:])
		}
	}
	return nil
}

// tapKey names one table of tap offsets: the channel count and layout.
type tapKey struct {
	channels int
	phased   bool
}

// tapOffsets returns, for each column-matrix row (c, kh, kw), the offset
// of that tap's first input value in the padded (or phased) layout. The
// table depends only on the plan, the channel count and the layout, so it
// is made once and kept in the plan (read-only afterwards; the slab paths
// lower hundreds of slabs per pass from the same tables).
func (p *Im2colPlan) tapOffsets(channels int, phased bool) []int32 {
	key := tapKey{channels, phased}
	if t, ok := p.taps.Load(key); ok {
		return t.([]int32)
	}
	g := p.g
	ph, pw := p.PaddedShape()
	var po []int
	if phased {
		po = phaseOffsets(pw, g.StrideW)
	}
	offs := make([]int32, 0, channels*g.KH*g.KW)
	for c := 0; c < channels; c++ {
		for kh := 0; kh < g.KH; kh++ {
			for kw := 0; kw < g.KW; kw++ {
				col := kw * g.DilationW
				if phased {
					col = po[col%g.StrideW] + col/g.StrideW
				}
				offs = append(offs, int32(c*ph*pw+kh*g.DilationH*pw+col))
			}
		}
	}
	t, _ := p.taps.LoadOrStore(key, offs)
	return t.([]int32)
}
