package render

import (
	"fmt"
	"image"
	"image/color"
	"math"
	"strings"

	"github.com/fogleman/gg"
	"golang.org/x/image/font"

	"heedmap/render/colour"
)

// Theme colours: light text on a near-black ground, contrast ratio above
// 15:1, which survives a washed-out projector.
var (
	bgColour    = color.RGBA{18, 20, 24, 255}
	textColour  = color.RGBA{242, 242, 242, 255}
	mutedColour = color.RGBA{200, 204, 210, 255}
	frameColour = color.RGBA{110, 114, 120, 255}
)

// drawColourBar fills bar with the ramp, top = ramp end (entry 255), bottom
// = ramp start (entry 0), and labels five ticks on its right. The frame is
// drawn outside bar so the end rows keep the exact ramp colours.
func drawColourBar(dst *image.RGBA, bar image.Rectangle, ramp *colour.Ramp, signed bool, scale float64, tickFace font.Face) {
	n := bar.Dy()
	for y := 0; y < n; y++ {
		t := 1.0
		if n > 1 {
			t = 1 - float64(y)/float64(n-1)
		}
		c := ramp.At(t)
		for x := bar.Min.X; x < bar.Max.X; x++ {
			dst.SetRGBA(x, bar.Min.Y+y, color.RGBA{c.R, c.G, c.B, 255})
		}
	}
	dc := gg.NewContextForRGBA(dst)
	dc.SetColor(frameColour)
	dc.SetLineWidth(2)
	dc.DrawRectangle(float64(bar.Min.X)-1, float64(bar.Min.Y)-1, float64(bar.Dx())+2, float64(bar.Dy())+2)
	dc.Stroke()
	dc.SetFontFace(tickFace)
	// Round-number ticks at their true positions, plus the scale's ends,
	// dropping round ticks that would crowd an end label.
	_, th := dc.MeasureString("0")
	minGap := 1.6 * th / float64(max(n-1, 1)) // in bar fractions
	lo := 0.0
	if signed {
		lo = -scale
	}
	type tick struct {
		v   float64
		end bool
	}
	ticks := []tick{{lo, true}, {scale, true}}
	if scale > 0 {
		for _, v := range niceTicks(lo, scale) {
			ticks = append(ticks, tick{v, false})
		}
	}
	if scale == 0 { // an all-zero map: one honest label
		ticks = []tick{{0, true}}
	}
	for _, tk := range ticks {
		f := 0.0 // fraction of the way up
		switch {
		case scale > 0:
			f = (tk.v - lo) / (scale - lo)
		case signed:
			f = 0.5
		}
		if !tk.end && (f-0 < minGap || 1-f < minGap) {
			continue
		}
		y := float64(bar.Max.Y-1) - f*float64(n-1) + 0.5
		dc.SetColor(textColour)
		dc.SetLineWidth(2)
		dc.DrawLine(float64(bar.Max.X)+2, y, float64(bar.Max.X)+12, y)
		dc.Stroke()
		label := tickLabel(tk.v, signed)
		if scale == 0 {
			label = "0 (map is zero)"
		}
		if tk.end && tk.v == scale && scale > 0 {
			label = "max " + label
			if signed {
				label = "max +" + tickLabel(tk.v, false)
			}
		}
		dc.DrawStringAnchored(label, float64(bar.Max.X)+18, y, 0, 0.35)
	}
}

// niceTicks returns round values (1, 2, 2.5 or 5 × 10^k apart, about four
// intervals) strictly inside (lo, hi), and 0 when it lies inside.
func niceTicks(lo, hi float64) []float64 {
	span := hi - lo
	raw := span / 4
	p := math.Pow(10, math.Floor(math.Log10(raw)))
	step := 10 * p
	for _, m := range []float64{1, 2, 2.5, 5} {
		if m*p >= raw {
			step = m * p
			break
		}
	}
	var out []float64
	for k := math.Ceil(lo / step); k*step < hi; k++ {
		v := k * step
		if v > lo {
			out = append(out, math.Round(v/step)*step)
		}
	}
	return out
}

// tickLabel prints a scale value with three significant digits, a true
// minus sign, and an explicit plus on signed scales.
func tickLabel(v float64, signed bool) string {
	if v == 0 {
		return "0"
	}
	s := fmt.Sprintf("%.3g", math.Abs(v))
	switch {
	case v < 0:
		return "\u2212" + s
	case signed:
		return "+" + s
	}
	return s
}

// legendItem is one swatch and its label.
type legendItem struct {
	kind  int // legendLesion, legendArtefact, legendBox, legendUnseen, legendNote
	style strokeStyle
	label string
}

const (
	legendLesion = iota
	legendArtefact
	legendBox
	legendUnseen
	legendNote
)

func legendItems(b *base, showBoxes, showUnseen bool, k float64) []legendItem {
	var items []legendItem
	if b.hasLesion {
		items = append(items, legendItem{kind: legendLesion, style: lesionStyle(k), label: "lesion outline"})
	}
	for _, a := range b.artefacts {
		items = append(items, legendItem{kind: legendArtefact, style: artefactStyle(a, k), label: "artefact: " + a.name})
	}
	if showBoxes {
		items = append(items, legendItem{kind: legendBox, label: "hot region (numbered by rank)"})
	}
	if showUnseen {
		items = append(items, legendItem{kind: legendUnseen, label: "not seen by model"})
	}
	return items
}

// layoutLegend flows items into rows no wider than width and returns each
// row's items and the total height.
func layoutLegend(dc *gg.Context, items []legendItem, width, swatchW, gap, rowH float64) ([][]legendItem, float64) {
	var rows [][]legendItem
	var cur []legendItem
	x := 0.0
	for _, it := range items {
		tw, _ := dc.MeasureString(it.label)
		w := swatchW + 10 + tw
		if it.kind == legendNote {
			w = tw
		}
		if len(cur) > 0 && x+w > width {
			rows = append(rows, cur)
			cur, x = nil, 0
		}
		cur = append(cur, it)
		x += w + gap
	}
	if len(cur) > 0 {
		rows = append(rows, cur)
	}
	return rows, float64(len(rows)) * rowH
}

// drawLegend draws the rows laid out by layoutLegend from (x, y).
func drawLegend(dst *image.RGBA, dc *gg.Context, rows [][]legendItem, x, y, swatchW, gap, rowH float64, period, lw int) {
	for _, row := range rows {
		cx := x
		cy := y + rowH/2
		for _, it := range row {
			sw := image.Rect(int(cx), int(cy-rowH*0.3), int(cx+swatchW), int(cy+rowH*0.3))
			switch it.kind {
			case legendLesion, legendArtefact:
				dc.SetColor(color.RGBA{70, 74, 80, 255})
				dc.DrawRectangle(float64(sw.Min.X), float64(sw.Min.Y), float64(sw.Dx()), float64(sw.Dy()))
				dc.Fill()
				line := [][]gg.Point{{{X: cx + 4, Y: cy}, {X: cx + swatchW - 4, Y: cy}}}
				strokeOpen(dc, line, it.style)
			case legendBox:
				poly := [][]gg.Point{{{X: cx + 4, Y: cy - rowH*0.25}, {X: cx + swatchW - 4, Y: cy - rowH*0.25},
					{X: cx + swatchW - 4, Y: cy + rowH*0.25}, {X: cx + 4, Y: cy + rowH*0.25}}}
				strokePolys(dc, poly, strokeStyle{core: boxColour, coreW: 3, haloW: 7})
			case legendUnseen:
				for yy := sw.Min.Y; yy < sw.Max.Y; yy++ {
					for xx := sw.Min.X; xx < sw.Max.X; xx++ {
						c := unseenGrey
						if hatch(xx-sw.Min.X, yy-sw.Min.Y, period, lw) {
							c = unseenInk
						}
						dst.SetRGBA(xx, yy, c)
					}
				}
			}
			if it.kind == legendNote {
				dc.SetColor(mutedColour)
				dc.DrawStringAnchored(it.label, cx, cy, 0, 0.35)
				tw, _ := dc.MeasureString(it.label)
				cx += tw + gap
				continue
			}
			dc.SetColor(textColour)
			dc.DrawStringAnchored(it.label, cx+swatchW+10, cy, 0, 0.35)
			tw, _ := dc.MeasureString(it.label)
			cx += swatchW + 10 + tw + gap
		}
		y += rowH
	}
}

// strokeOpen is strokePolys for open polylines (legend swatches).
func strokeOpen(dc *gg.Context, polys [][]gg.Point, st strokeStyle) {
	for pass := 0; pass < 2; pass++ {
		dc.ClearPath()
		for _, p := range polys {
			dc.MoveTo(p[0].X, p[0].Y)
			for _, q := range p[1:] {
				dc.LineTo(q.X, q.Y)
			}
		}
		dc.SetLineCap(gg.LineCapButt)
		if pass == 0 {
			dc.SetColor(outlineHalo)
			dc.SetLineWidth(st.haloW)
			if st.dashedHalo {
				dc.SetDash(st.dash...)
			}
		} else {
			dc.SetColor(st.core)
			dc.SetLineWidth(st.coreW)
			dc.SetDash(st.dash...)
		}
		dc.Stroke()
		dc.SetDash()
	}
}

// massText prints the inside-lesion mass, or why it is undefined.
func massText(m Metrics) string {
	switch {
	case m.InsideMassUndefined != "":
		return "undefined: " + m.InsideMassUndefined
	case math.IsNaN(m.InsideMass):
		return "n/a"
	}
	return percent(m.InsideMass)
}

func percent(f float64) string {
	if math.IsNaN(f) {
		return "n/a"
	}
	return fmt.Sprintf("%.1f %%", 100*f)
}

func fraction(f float64) string {
	if math.IsNaN(f) {
		return "n/a"
	}
	return fmt.Sprintf("%.2f", f)
}

func (p Pointing) String() string {
	switch p {
	case PointingHit:
		return "hit"
	case PointingMiss:
		return "miss"
	}
	return "n/a"
}

func offLesionText(m Metrics) string {
	if math.IsNaN(m.OffLesion) {
		return "n/a"
	}
	if m.OffLesion == 0 && m.OffLesionBox == 0 {
		return "none"
	}
	s := percent(m.OffLesion) + " of mass"
	if m.OffLesionBox > 0 {
		s += fmt.Sprintf(" (box %d)", m.OffLesionBox)
	}
	return s
}

func scoreText(kind string, score float64) string {
	kind = strings.TrimSpace(kind)
	if kind == "" {
		kind = "score"
	}
	return fmt.Sprintf("%s %.3g", kind, score)
}
