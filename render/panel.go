package render

import (
	"fmt"
	"image"
	"image/color"
	"image/draw"
	"math"
	"strings"

	"github.com/fogleman/gg"
	"golang.org/x/image/font"

	"heedmap/render/colour"
)

// Caution is printed in every panel's footer.
const Caution = "Research and quality-assurance tool, not a diagnostic device. " +
	"Results do not replace clinical judgement, local regulation or licensed clinical practice."

// MethodView is one method's map and numbers on a panel.
type MethodView struct {
	Name    string
	Map     Attribution
	Metrics Metrics
}

// Case is everything a case-review panel shows.
type Case struct {
	ID             string
	TrueClass      string
	PredictedClass string
	ScoreKind      string  // e.g. "probability"
	Score          float64 // the model's score for PredictedClass
	Image          image.Image
	Lesion         []bool
	Artefacts      map[string][]bool
	Methods        []MethodView // 1 to MaxPanelMethods
}

// MaxPanelMethods is the most methods a panel lays out legibly.
const MaxPanelMethods = 7

// Panel geometry at 1920×1080. Text is at least 22 px, the size that stays
// legible from the back of a meeting room on a 1080p projector (common
// practice for slides: body text ≥ 20–24 pt at 1080 lines).
const (
	panelW, panelH = 1920, 1080
	panelPad       = 24
	panelTitleH    = 84
	panelFooterH   = 74
	panelLegendH   = 92
	panelLeftW     = 340
	panelGap       = 26
	panelHeadPx    = 26
	panelTextPx    = 22
	panelValuePx   = 24
	panelTitlePx   = 38
	panelHatch     = 10
	panelHatchW    = 3
)

// tilePlan is the grid chosen for the method tiles.
type tilePlan struct {
	rows, cols int
	beside     bool // numbers to the right of the picture, else below
	picW, picH int  // picture size in pixels
	n          int
	lines      int // lines of numbers under the picture
	sideLines  int // lines of numbers beside the picture (label and value on lines of their own)
	headH      int // method name line, plus the scale line when it cannot share it
	area       image.Rectangle
}

const (
	tileHeadH       = 40  // method name line
	tileScaleH      = 28  // scale line under a name too long to share its line
	tileLineH       = 29  // one line of numbers
	tileBesideTextW = 216 // label + value column beside the picture
	tileMinTextW    = 340 // narrowest tile that fits the numbers below
)

// planTiles picks rows, columns and text placement maximising the picture
// size for n methods of a w×h image in area, with lines lines of numbers
// under a picture or sideLines beside it, and a method header headH pixels
// tall. A layout whose numbers would run past the tile is not considered.
func planTiles(n int, area image.Rectangle, lines, sideLines, headH, w, h int) tilePlan {
	aspect := float64(h) / float64(w)
	best := tilePlan{area: area, n: n, headH: headH}
	for rows := 1; rows <= 3; rows++ {
		cols := (n + rows - 1) / rows
		if (rows-1)*cols >= n { // an empty row
			continue
		}
		cw := (area.Dx() - (cols-1)*panelGap) / cols
		rh := (area.Dy() - (rows-1)*panelGap) / rows
		for _, beside := range []bool{false, true} {
			var pw float64
			if beside {
				if headH+sideLines*tileLineH > rh {
					continue
				}
				pw = math.Min(float64(cw-tileBesideTextW-12), float64(rh-headH)/aspect)
			} else {
				if cw < tileMinTextW {
					continue
				}
				pw = math.Min(float64(cw), float64(rh-headH-lines*tileLineH-10)/aspect)
			}
			if int(pw) > best.picW {
				best = tilePlan{rows: rows, cols: cols, beside: beside, picW: int(pw), picH: int(pw * aspect),
					n: n, lines: lines, sideLines: sideLines, headH: headH, area: area}
			}
		}
	}
	return best
}

// tileRect returns the rectangle of tile i.
func (p tilePlan) tileRect(i int) image.Rectangle {
	cw := (p.area.Dx() - (p.cols-1)*panelGap) / p.cols
	rh := (p.area.Dy() - (p.rows-1)*panelGap) / p.rows
	r, c := i/p.cols, i%p.cols
	// Centre a short last row.
	inRow := p.cols
	if r == p.rows-1 {
		inRow = p.n - r*p.cols
	}
	// Rows only as tall as their content, the grid centred vertically.
	th := p.headH + p.picH + 10 + p.lines*tileLineH
	if p.beside {
		th = p.headH + max(p.picH, p.sideLines*tileLineH)
	}
	th = min(th, rh)
	top := p.area.Min.Y + (p.area.Dy()-(p.rows*th+(p.rows-1)*panelGap))/2
	x0 := p.area.Min.X + (p.area.Dx()-(inRow*cw+(inRow-1)*panelGap))/2 + c*(cw+panelGap)
	y0 := top + r*(th+panelGap)
	return image.Rect(x0, y0, x0+cw, y0+th)
}

// Panel draws a 1920×1080 case-review slide: a title with the image id,
// true and predicted class and score; the original image and the mask; one
// overlay per method (each normalised to its own maximum unless its
// Attribution.Scale is set) with the inside-lesion mass, rank accuracy,
// pointing-game outcome and largest off-lesion region beneath or beside it;
// a legend; and a footer with the caution.
func Panel(c Case) (*image.RGBA, error) {
	n := len(c.Methods)
	if n < 1 || n > MaxPanelMethods {
		return nil, fmt.Errorf("render: panel for case %q: %d methods, want 1 to %d", c.ID, n, MaxPanelMethods)
	}
	b, err := newBase(c.Image, c.Lesion, c.Artefacts)
	if err != nil {
		return nil, fmt.Errorf("render: panel for case %q: %w", c.ID, err)
	}
	heats := make([]*heat, n)
	anySigned, anyUnsigned, anyUnseen, anyBoxes := false, false, false, false
	for i := range c.Methods {
		ht, err := newHeat(&c.Methods[i].Map, b.w, b.h)
		if err != nil {
			return nil, fmt.Errorf("render: panel for case %q, method %q: %w", c.ID, c.Methods[i].Name, err)
		}
		heats[i] = ht
		anySigned = anySigned || ht.signed
		anyUnsigned = anyUnsigned || !ht.signed
		anyUnseen = anyUnseen || anyTrue(ht.unseen)
		anyBoxes = anyBoxes || len(ht.boxes) > 0
	}

	dst := image.NewRGBA(image.Rect(0, 0, panelW, panelH))
	draw.Draw(dst, dst.Bounds(), image.NewUniform(bgColour), image.Point{}, draw.Src)
	dc := gg.NewContextForRGBA(dst)
	title, head, text, value := face(true, panelTitlePx), face(true, panelHeadPx), face(false, panelTextPx), face(true, panelValuePx)
	defer title.Close()
	defer head.Close()
	defer text.Close()
	defer value.Close()

	// Title.
	dc.SetFontFace(title)
	dc.SetColor(textColour)
	t := "Case " + quoteEmpty(c.ID)
	dc.DrawStringAnchored(t, panelPad, panelTitleH/2, 0, 0.35)
	tw, _ := dc.MeasureString(t)
	dc.SetFontFace(head)
	x := panelPad + tw + 40
	for _, part := range []struct {
		label, val string
		warn       bool
	}{
		{"true class", quoteEmpty(c.TrueClass), false},
		{"predicted", quoteEmpty(c.PredictedClass), c.PredictedClass != c.TrueClass},
		{"", scoreText(c.ScoreKind, c.Score), false},
	} {
		s := part.val
		if part.label != "" {
			s = part.label + ": " + part.val
		}
		dc.SetColor(textColour)
		if part.warn {
			dc.SetColor(color.RGBA{255, 190, 60, 255})
			s += " (misclassified)"
		}
		dc.DrawStringAnchored(s, x, panelTitleH/2, 0, 0.35)
		w, _ := dc.MeasureString(s)
		x += w + 40
	}
	dc.SetColor(frameColour)
	dc.SetLineWidth(2)
	dc.DrawLine(panelPad, panelTitleH, panelW-panelPad, panelTitleH)
	dc.Stroke()

	mainTop := panelTitleH + 14
	mainBot := panelH - panelFooterH - panelLegendH - 8

	// Left column: original and mask.
	leftH := (mainBot - mainTop - panelGap) / 2
	for k, label := range []string{"original", "mask"} {
		y0 := mainTop + k*(leftH+panelGap)
		dc.SetFontFace(head)
		dc.SetColor(textColour)
		dc.DrawStringAnchored(label, panelPad, float64(y0)+tileHeadH/2, 0, 0.35)
		box := image.Rect(panelPad, y0+tileHeadH, panelPad+panelLeftW, y0+leftH)
		r := fitRect(box, b.w, b.h)
		r = r.Add(image.Pt(0, box.Min.Y-r.Min.Y)) // under its label
		if k == 0 {
			drawPhoto(dst, r, b.img)
		} else {
			mb := *b
			mb.img = maskImage(b)
			drawPicture(dst, r, &mb, nil, panelHatch, panelHatchW, panelTextPx)
		}
	}

	// Method tiles.
	area := image.Rect(panelPad+panelLeftW+panelGap+10, mainTop, panelW-panelPad, mainBot)
	scales := make([]string, n)
	for i := range heats {
		scales[i] = "max " + tickLabel(heats[i].scale, false)
	}
	plan := planPanelTiles(dc, c.Methods, scales, area, b.w, b.h, head, text, value)
	for i, m := range c.Methods {
		tile := plan.tileRect(i)
		cw := float64(tile.Dx())
		oneLine := headerFits(dc, m.Name, scales[i], cw, head, text)
		// Method name; the colour scale's top value after it, or on a line
		// of its own under a long name.
		dc.SetFontFace(head)
		dc.SetColor(textColour)
		name := quoteEmpty(m.Name)
		if oneLine {
			dc.DrawStringAnchored(name, float64(tile.Min.X), float64(tile.Min.Y)+tileHeadH/2, 0, 0.35)
			dc.SetFontFace(text)
			dc.SetColor(mutedColour)
			dc.DrawStringAnchored(scales[i], float64(tile.Max.X), float64(tile.Min.Y)+tileHeadH/2, 1, 0.35)
		} else {
			dc.DrawStringAnchored(fitText(dc, name, cw), float64(tile.Min.X), float64(tile.Min.Y)+tileHeadH/2, 0, 0.35)
			dc.SetFontFace(text)
			dc.SetColor(mutedColour)
			dc.DrawStringAnchored(fitText(dc, scales[i], cw), float64(tile.Max.X), float64(tile.Min.Y)+tileHeadH+tileScaleH/2-6, 1, 0.35)
		}

		r := image.Rect(tile.Min.X, tile.Min.Y+plan.headH, tile.Min.X+plan.picW, tile.Min.Y+plan.headH+plan.picH)
		textBox := image.Rect(tile.Min.X, r.Max.Y+10, tile.Max.X, tile.Max.Y)
		if plan.beside {
			textBox = image.Rect(r.Max.X+12, r.Min.Y, tile.Max.X, tile.Max.Y)
		}
		drawPicture(dst, r, b, heats[i], panelHatch, panelHatchW, panelTextPx)
		drawNumbers(dc, textBox, m.Metrics, plan.beside, text, value)
	}

	// Legend: outline and region keys, then the colour ramps.
	ly := float64(panelH - panelFooterH - panelLegendH)
	dc.SetColor(frameColour)
	dc.SetLineWidth(2)
	dc.DrawLine(panelPad, ly, panelW-panelPad, ly)
	dc.Stroke()
	dc.SetFontFace(text)
	items := legendItems(b, anyBoxes, anyUnseen, 0.75)
	items = append(items, legendItem{kind: legendNote, label: "opacity proportional to |attribution|; colour runs to each map's own max"})
	rows, _ := layoutLegend(dc, items, 1060, 52, 26, 40)
	drawLegend(dst, dc, rows, panelPad, ly+6, 52, 26, 40, panelHatch, panelHatchW)
	bx := panelW - panelPad - 300
	for _, rm := range []struct {
		on     bool
		ramp   *colour.Ramp
		signed bool
	}{{anySigned, colour.Diverging(), true}, {anyUnsigned, colour.Sequential(), false}} {
		if !rm.on {
			continue
		}
		bar := image.Rect(bx, int(ly)+16, bx+300, int(ly)+40)
		drawHBar(dst, dc, bar, rm.ramp, rm.signed)
		bx -= 380
	}

	// Footer.
	fy := float64(panelH - panelFooterH)
	dc.SetColor(color.RGBA{38, 42, 49, 255})
	dc.DrawRectangle(0, fy, panelW, panelFooterH)
	dc.Fill()
	dc.SetFontFace(text)
	dc.SetColor(textColour)
	lines := dc.WordWrap(Caution, panelW-2*panelPad)
	lh := panelTextPx * 1.35
	y := fy + (panelFooterH-lh*float64(len(lines)))/2 + panelTextPx
	for _, l := range lines {
		dc.DrawString(l, panelPad, y)
		y += lh
	}
	return dst, nil
}

// planPanelTiles plans for four lines of numbers and a one-line header,
// then again if some value needs a line of its own or some method's scale
// does not fit beside its name at the chosen width. The scale is never
// dropped: a map without its maximum cannot be compared with its
// neighbours.
func planPanelTiles(dc *gg.Context, ms []MethodView, scales []string, area image.Rectangle, w, h int, head, text, value font.Face) tilePlan {
	side := 0
	for _, m := range ms {
		side = max(side, sideLines(dc, m.Metrics, value))
	}
	plan := planTiles(len(ms), area, 4, side, tileHeadH, w, h)
	for pass := 0; pass < 3; pass++ {
		need, headH := 4, tileHeadH
		for i, m := range ms {
			need = max(need, numberLines(dc, m.Metrics, plan, text, value))
			if !headerFits(dc, m.Name, scales[i], plan.colW(), head, text) {
				headH = tileHeadH + tileScaleH
			}
		}
		if need == plan.lines && headH == plan.headH {
			break
		}
		plan = planTiles(len(ms), area, need, side, headH, w, h)
	}
	return plan
}

// colW is the width of one tile column.
func (p tilePlan) colW() float64 {
	if p.cols == 0 {
		return 0
	}
	return float64((p.area.Dx() - (p.cols-1)*panelGap) / p.cols)
}

// headerFits reports whether a method's name and its scale share one line
// of width w with at least 20 px between them.
func headerFits(dc *gg.Context, name, scale string, w float64, nameFace, scaleFace font.Face) bool {
	dc.SetFontFace(nameFace)
	nw, _ := dc.MeasureString(quoteEmpty(name))
	dc.SetFontFace(scaleFace)
	sw, _ := dc.MeasureString(scale)
	return nw+sw+20 <= w
}

func metricRows(m Metrics) [][2]string {
	return [][2]string{
		{"inside lesion", massText(m)},
		{"rank accuracy", fraction(m.RankAccuracy)},
		{"pointing game", m.Pointing.String()},
		{"largest off-lesion", offLesionShort(m)},
	}
}

// sideLines counts the lines drawNumbers needs beside a picture: a label
// line and the wrapped value lines for every metric.
func sideLines(dc *gg.Context, m Metrics, valueFace font.Face) int {
	dc.SetFontFace(valueFace)
	n := 0
	for _, row := range metricRows(m) {
		n += 1 + len(wrapValue(dc, row[1], tileBesideTextW))
	}
	return n
}

// numberLines counts the lines drawNumbers needs under a picture of plan's
// column width: one per metric, plus one for each value that does not fit
// beside its label.
func numberLines(dc *gg.Context, m Metrics, p tilePlan, labelFace, valueFace font.Face) int {
	if p.beside || p.cols == 0 {
		return 4
	}
	cw := float64((p.area.Dx() - (p.cols-1)*panelGap) / p.cols)
	n := 0
	for _, row := range metricRows(m) {
		n++
		dc.SetFontFace(labelFace)
		lw, _ := dc.MeasureString(row[0] + "  ")
		dc.SetFontFace(valueFace)
		if vw, _ := dc.MeasureString(row[1]); lw+vw > cw {
			n += len(wrapValue(dc, row[1], cw))
		}
	}
	return n
}

// drawNumbers prints a method's metrics as label/value pairs: label and
// value on one line when below the picture (the value on a line of its own
// when it does not fit), on two lines when beside it.
func drawNumbers(dc *gg.Context, r image.Rectangle, m Metrics, stacked bool, labelFace, valueFace font.Face) {
	y := float64(r.Min.Y)
	for _, row := range metricRows(m) {
		dc.SetFontFace(labelFace)
		dc.SetColor(mutedColour)
		dc.DrawStringAnchored(row[0], float64(r.Min.X), y+tileLineH/2, 0, 0.35)
		lw, _ := dc.MeasureString(row[0] + "  ")
		dc.SetFontFace(valueFace)
		dc.SetColor(textColour)
		vw, _ := dc.MeasureString(row[1])
		if stacked || lw+vw > float64(r.Dx()) {
			for _, v := range wrapValue(dc, row[1], float64(r.Dx())) {
				y += tileLineH
				dc.DrawStringAnchored(v, float64(r.Min.X)+12, y+tileLineH/2, 0, 0.35)
			}
		} else {
			dc.DrawStringAnchored(row[1], float64(r.Max.X), y+tileLineH/2, 1, 0.35)
		}
		y += tileLineH
	}
}

// wrapValue breaks a value that does not fit beside its label into at most
// two indented lines, shortening the last with an ellipsis if needed: a
// long reason for an undefined value would otherwise shrink every picture
// on the slide (the full reason is in the report).
func wrapValue(dc *gg.Context, v string, width float64) []string {
	lines := dc.WordWrap(v, width-12)
	if len(lines) > 2 {
		lines = append(lines[:1], strings.Join(lines[1:], " "))
	}
	for i := range lines {
		lines[i] = fitText(dc, lines[i], width-12)
	}
	return lines
}

// offLesionShort is offLesionText shortened for a tile.
func offLesionShort(m Metrics) string {
	if math.IsNaN(m.OffLesion) {
		return "n/a"
	}
	if m.OffLesion == 0 && m.OffLesionBox == 0 {
		return "none"
	}
	s := percent(m.OffLesion)
	if m.OffLesionBox > 0 {
		s += fmt.Sprintf(" \u00b7 box %d", m.OffLesionBox)
	}
	return s
}

// fitText shortens s with an ellipsis until it fits width.
func fitText(dc *gg.Context, s string, width float64) string {
	if w, _ := dc.MeasureString(s); w <= width {
		return s
	}
	r := []rune(s)
	for len(r) > 1 {
		r = r[:len(r)-1]
		if w, _ := dc.MeasureString(string(r) + "…"); w <= width {
			break
		}
	}
	return string(r) + "…"
}

// maskImage draws the masks as a picture: lesion white on near-black,
// artefact pixels in their category colour.
func maskImage(b *base) image.Image {
	img := image.NewRGBA(image.Rect(0, 0, b.w, b.h))
	for i := 0; i < b.w*b.h; i++ {
		c := color.RGBA{34, 36, 40, 255}
		if b.lesionPix != nil && b.lesionPix[i] {
			c = color.RGBA{235, 235, 235, 255}
		}
		for _, a := range b.artefacts {
			if a.mask[i] {
				c = color.RGBA{a.ink.R / 2, a.ink.G / 2, a.ink.B / 2, 255}
			}
		}
		img.SetRGBA(i%b.w, i/b.w, c)
	}
	return img
}

// drawHBar draws a horizontal ramp with end and centre labels below it.
func drawHBar(dst *image.RGBA, dc *gg.Context, bar image.Rectangle, ramp *colour.Ramp, signed bool) {
	n := bar.Dx()
	for x := 0; x < n; x++ {
		c := ramp.At(float64(x) / float64(n-1))
		for y := bar.Min.Y; y < bar.Max.Y; y++ {
			dst.SetRGBA(bar.Min.X+x, y, color.RGBA{c.R, c.G, c.B, 255})
		}
	}
	dc.SetColor(frameColour)
	dc.SetLineWidth(2)
	dc.DrawRectangle(float64(bar.Min.X)-1, float64(bar.Min.Y)-1, float64(bar.Dx())+2, float64(bar.Dy())+2)
	dc.Stroke()
	dc.SetColor(textColour)
	y := float64(bar.Max.Y) + 24
	if signed {
		dc.DrawStringAnchored("−max", float64(bar.Min.X), y, 0, 0)
		dc.DrawStringAnchored("0", float64(bar.Min.X+n/2), y, 0.5, 0)
		dc.DrawStringAnchored("+max", float64(bar.Max.X), y, 1, 0)
		return
	}
	dc.DrawStringAnchored("0", float64(bar.Min.X), y, 0, 0)
	dc.DrawStringAnchored("max", float64(bar.Max.X), y, 1, 0)
}
