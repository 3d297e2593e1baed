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
// practice for slides: body text ≥ 20–24 pt at 1080 lines). Title, legend
// and footer take only the height their text needs so that the method
// pictures get the rest.
const (
	panelW, panelH = 1920, 1080
	panelPad       = 24
	panelTitleH    = 66
	panelLegendRow = 38 // one row of legend keys
	panelLegendMin = 84 // room for the colour bars and their labels
	panelGap       = 24 // between the reference column and the grid
	tileColGap     = 20
	tileRowGap     = 16
	panelHeadPx    = 26
	panelTextPx    = 22
	panelValuePx   = 24
	panelTitlePx   = 38
	panelHatch     = 10
	panelHatchW    = 3
	panelMaxBoxes  = 3 // hot regions drawn per tile
)

// tilePlan is the grid chosen for the method tiles.
type tilePlan struct {
	rows, cols int
	beside     bool // numbers to the right of the picture
	compact    bool // numbers in two rows of two under the picture
	fullLabels bool // compact block with the long labels
	picW, picH int  // picture size in pixels
	n          int
	lines      int // lines of numbers under the picture (one per metric, values may wrap)
	sideLines  int // lines of numbers beside the picture (label and value on lines of their own)
	headH      int // method name line, plus the scale line when it cannot share it
	area       image.Rectangle
}

// numberNeeds is what a tile's numbers need, measured once per panel.
type numberNeeds struct {
	lines     int // lines under the picture at one metric a line
	sideLines int // lines beside the picture
	compactW  int // tile width for the two-by-two block with short labels; 0 if it never fits
	fullW     int // the same with the long labels
}

const (
	tileHeadH       = 36  // method name line
	tileScaleH      = 28  // scale line under a name too long to share its line
	tileLineH       = 29  // one line of numbers
	tileTextGap     = 8   // between a picture and its numbers
	tileBesideTextW = 216 // label + value column beside the picture
	tileMinTextW    = 340 // narrowest tile that fits one metric a line below
	compactColGap   = 18  // between the two pairs on a compact line
)

// planTiles picks rows, columns and text placement maximising the picture
// size for n methods of a w×h image in area, with a method header headH
// pixels tall. Of the three number layouts (two-by-two block under the
// picture, one metric a line under it, or beside it) only those that fit
// the tile are considered. A short last row is left-aligned (see tileRect).
func planTiles(n int, area image.Rectangle, need numberNeeds, headH, w, h int) tilePlan {
	aspect := float64(h) / float64(w)
	best := tilePlan{area: area, n: n, headH: headH, lines: need.lines, sideLines: need.sideLines}
	for rows := 1; rows <= 3; rows++ {
		cols := (n + rows - 1) / rows
		if (rows-1)*cols >= n { // an empty row
			continue
		}
		cw := (area.Dx() - (cols-1)*tileColGap) / cols
		rh := (area.Dy() - (rows-1)*tileRowGap) / rows
		for mode := 0; mode < 3; mode++ {
			var pw float64
			switch mode {
			case 0: // compact
				if need.compactW == 0 || cw < need.compactW {
					continue
				}
				pw = math.Min(float64(cw), float64(rh-headH-tileTextGap-2*tileLineH)/aspect)
			case 1: // one metric a line
				if cw < tileMinTextW {
					continue
				}
				pw = math.Min(float64(cw), float64(rh-headH-tileTextGap-need.lines*tileLineH)/aspect)
			case 2: // beside
				if headH+need.sideLines*tileLineH > rh {
					continue
				}
				pw = math.Min(float64(cw-tileBesideTextW-12), float64(rh-headH)/aspect)
			}
			if int(pw) > best.picW {
				best = tilePlan{rows: rows, cols: cols, beside: mode == 2, compact: mode == 0,
					fullLabels: mode == 0 && need.fullW > 0 && cw >= need.fullW,
					picW:       int(pw), picH: int(pw * aspect), n: n, lines: need.lines,
					sideLines: need.sideLines, headH: headH, area: area}
			}
		}
	}
	return best
}

// tileH is the height of one tile's content.
func (p tilePlan) tileH() int {
	switch {
	case p.compact:
		return p.headH + p.picH + tileTextGap + 2*tileLineH
	case p.beside:
		return p.headH + max(p.picH, p.sideLines*tileLineH)
	}
	return p.headH + p.picH + tileTextGap + p.lines*tileLineH
}

// tileRect returns the rectangle of tile i. Rows are only as tall as their
// content and the grid is centred vertically; a short last row starts at
// the left so the tiles stay in columns and the gap sits at the end.
func (p tilePlan) tileRect(i int) image.Rectangle {
	cw := (p.area.Dx() - (p.cols-1)*tileColGap) / p.cols
	rh := (p.area.Dy() - (p.rows-1)*tileRowGap) / p.rows
	r, c := i/p.cols, i%p.cols
	th := min(p.tileH(), rh)
	top := p.area.Min.Y + (p.area.Dy()-(p.rows*th+(p.rows-1)*tileRowGap))/2
	x0 := p.area.Min.X + c*(cw+tileColGap)
	y0 := top + r*(th+tileRowGap)
	return image.Rect(x0, y0, x0+cw, y0+th)
}

// panelLayout is a whole slide's geometry.
type panelLayout struct {
	refW    int                // width of the reference column; 0 when original and mask share the grid
	refs    [2]image.Rectangle // original and mask pictures
	first   int                // grid cell of the first method (1 when cell 0 holds the references)
	tiles   tilePlan
	mainTop int
	legendY int
	footerY int
}

// cellRefs places original and mask in one grid cell under a label line:
// side by side, or stacked with a second label line when that is larger.
func cellRefs(cell image.Rectangle, w, h int) [2]image.Rectangle {
	body := image.Rect(cell.Min.X, cell.Min.Y+tileHeadH, cell.Max.X, cell.Max.Y)
	half := (body.Dx() - tileColGap) / 2
	a := fitRect(image.Rect(body.Min.X, body.Min.Y, body.Min.X+half, body.Max.Y), w, h)
	hh := (body.Dy() - tileHeadH - tileRowGap) / 2
	b := fitRect(image.Rect(body.Min.X, body.Min.Y, body.Max.X, body.Min.Y+hh), w, h)
	if a.Dx() >= b.Dx() {
		a = a.Add(image.Pt(body.Min.X-a.Min.X, body.Min.Y-a.Min.Y))
		return [2]image.Rectangle{a, a.Add(image.Pt(half+tileColGap, 0))}
	}
	b = b.Add(image.Pt(body.Min.X-b.Min.X, body.Min.Y-b.Min.Y))
	return [2]image.Rectangle{b, b.Add(image.Pt(0, hh+tileRowGap+tileHeadH))}
}

// method returns the tile of method i.
func (L panelLayout) method(i int) image.Rectangle { return L.tiles.tileRect(L.first + i) }

// planPanel places the original and the mask and the method grid. Two
// arrangements are tried and the one with the larger method pictures wins
// (the method maps are what the slide is for): a reference column on the
// left, at every width from narrow to as wide as two stacked pictures
// allow (the widest that keeps the method pictures within 10 % of their
// largest), or original
// and mask side by side (or stacked) in the grid's first cell, which fills
// the cell a 4+3 grid of seven methods would leave empty and gives every
// column the full slide width.
func planPanel(dc *gg.Context, ms []MethodView, scales []string, legendH, footerH, w, h int, head, text, value font.Face) panelLayout {
	L := panelLayout{mainTop: panelTitleH + 10, footerY: panelH - footerH}
	L.legendY = L.footerY - legendH
	mainBot := L.legendY - 6
	avail := mainBot - L.mainTop
	aspect := float64(h) / float64(w)
	maxRef := int(float64(avail-tileRowGap-2*tileHeadH) / 2 / aspect)
	maxRef = min(maxRef, 420)
	best := -1
	var plans []tilePlan
	for rw := 140; rw <= maxRef; rw += 10 {
		area := image.Rect(panelPad+rw+panelGap, L.mainTop, panelW-panelPad, mainBot)
		p := planPanelTiles(dc, ms, scales, 0, area, w, h, head, text, value)
		plans = append(plans, p)
		best = max(best, p.picW)
	}
	// The widest column that keeps the method pictures within 10 % of
	// their largest size: with few methods the pictures are limited by
	// the width, and a 140 px original beside 550 px maps is hard to read.
	for i, p := range plans {
		if 10*p.picW >= 9*best {
			L.refW, L.tiles = 140+10*i, p
		}
	}
	if best < 0 { // a very tall image: no room for a reference column of 140 px
		L.refW = max(1, maxRef)
		L.tiles = planPanelTiles(dc, ms, scales, 0, image.Rect(panelPad+L.refW+panelGap, L.mainTop, panelW-panelPad, mainBot), w, h, head, text, value)
		best = L.tiles.picW
	}
	// The grid cell wins when its method pictures are larger, or as large
	// with larger references.
	if g := planPanelTiles(dc, ms, scales, 1, image.Rect(panelPad, L.mainTop, panelW-panelPad, mainBot), w, h, head, text, value); g.cols > 0 {
		refs := cellRefs(g.tileRect(0), w, h)
		if g.picW > best || (g.picW >= L.tiles.picW && refs[0].Dx() > L.refW) {
			L.refW, L.first, L.tiles, L.refs = 0, 1, g, refs
			return L
		}
	}
	refH := int(float64(L.refW) * aspect)
	// Level with the grid's first row when the column fits from there.
	colH := 2*(tileHeadH+refH) + tileRowGap
	top := L.mainTop + (avail-colH)/2
	if L.tiles.cols > 0 {
		top = max(L.mainTop, min(L.tiles.tileRect(0).Min.Y, mainBot-colH))
	}
	for k := range L.refs {
		y := top + k*(tileHeadH+refH+tileRowGap) + tileHeadH
		L.refs[k] = image.Rect(panelPad, y, panelPad+L.refW, y+refH)
	}
	return L
}

// Panel draws a 1920×1080 case-review slide: a title with the image id,
// true and predicted class and score; the original image and the mask in a
// narrow column on the left; one overlay per method in a grid filling the
// rest of the width (each normalised to its own maximum unless its
// Attribution.Scale is set, with at most the top three hot regions
// numbered, plus the one its largest off-lesion figure names) with the
// inside-lesion mass, rank accuracy, pointing-game outcome and largest
// off-lesion region beneath or beside it; a legend; and a footer with the
// caution.
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
	shows := make([][]int, n)
	anySigned, anyUnsigned, anyUnseen, anyBoxes, anyExtra := false, false, false, false, false
	for i := range c.Methods {
		ht, err := newHeat(&c.Methods[i].Map, b.w, b.h)
		if err != nil {
			return nil, fmt.Errorf("render: panel for case %q, method %q: %w", c.ID, c.Methods[i].Name, err)
		}
		heats[i] = ht
		shows[i] = panelBoxes(len(ht.boxes), c.Methods[i].Metrics.OffLesionBox)
		anySigned = anySigned || ht.signed
		anyUnsigned = anyUnsigned || !ht.signed
		anyUnseen = anyUnseen || anyTrue(ht.unseen)
		anyBoxes = anyBoxes || len(ht.boxes) > 0
		anyExtra = anyExtra || len(shows[i]) > panelMaxBoxes
	}

	dst := image.NewRGBA(image.Rect(0, 0, panelW, panelH))
	draw.Draw(dst, dst.Bounds(), image.NewUniform(bgColour), image.Point{}, draw.Src)
	dc := gg.NewContextForRGBA(dst)
	title, head, text, value := face(true, panelTitlePx), face(true, panelHeadPx), face(false, panelTextPx), face(true, panelValuePx)
	defer title.Close()
	defer head.Close()
	defer text.Close()
	defer value.Close()

	// Legend and footer heights come from their text.
	dc.SetFontFace(text)
	items := legendItems(b, anyBoxes, anyUnseen, 0.75)
	for i := range items {
		if items[i].kind == legendBox {
			items[i].label = fmt.Sprintf("top %d hot regions by rank", panelMaxBoxes)
			if anyExtra {
				items[i].label += " + named off-lesion box"
			}
		}
	}
	items = append(items, legendItem{kind: legendNote, label: "opacity proportional to |attribution|; colour runs to each map's own max"})
	// The keys flow left of the colour bars (380 px each, right-aligned).
	bars := 0
	for _, on := range []bool{anySigned, anyUnsigned} {
		if on {
			bars++
		}
	}
	legendRows, lh := layoutLegend(dc, items, float64(panelW-2*panelPad-380*bars-30), 52, 26, panelLegendRow)
	legendH := max(panelLegendMin, int(lh)+10)
	caution := dc.WordWrap(Caution, panelW-2*panelPad)
	cautionLH := panelTextPx * 1.35
	footerH := int(cautionLH*float64(len(caution))) + 24

	scales := make([]string, n)
	for i := range heats {
		scales[i] = "max " + tickLabel(heats[i].scale, false)
	}
	L := planPanel(dc, c.Methods, scales, legendH, footerH, b.w, b.h, head, text, value)
	plan := L.tiles

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

	// Reference column: original and mask.
	for k, label := range []string{"original", "mask"} {
		r := L.refs[k]
		dc.SetFontFace(head)
		dc.SetColor(textColour)
		dc.DrawStringAnchored(label, float64(r.Min.X), float64(r.Min.Y)-tileHeadH/2, 0, 0.35)
		if k == 0 {
			drawPhoto(dst, r, b.img)
		} else {
			mb := *b
			mb.img = maskImage(b)
			drawPicture(dst, r, &mb, nil, panelHatch, panelHatchW, panelTextPx, nil)
		}
	}

	// Method tiles.
	for i, m := range c.Methods {
		tile := L.method(i)
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
		drawPicture(dst, r, b, heats[i], panelHatch, panelHatchW, panelTextPx, shows[i])
		switch {
		case plan.compact:
			drawCompactNumbers(dc, image.Rect(tile.Min.X, r.Max.Y+tileTextGap, tile.Max.X, tile.Max.Y), m.Metrics, plan.fullLabels, text, value)
		case plan.beside:
			drawNumbers(dc, image.Rect(r.Max.X+12, r.Min.Y, tile.Max.X, tile.Max.Y), m.Metrics, true, text, value)
		default:
			drawNumbers(dc, image.Rect(tile.Min.X, r.Max.Y+tileTextGap, tile.Max.X, tile.Max.Y), m.Metrics, false, text, value)
		}
	}

	// Legend: outline and region keys, then the colour ramps.
	ly := float64(L.legendY)
	dc.SetColor(frameColour)
	dc.SetLineWidth(2)
	dc.DrawLine(panelPad, ly, panelW-panelPad, ly)
	dc.Stroke()
	dc.SetFontFace(text)
	drawLegend(dst, dc, legendRows, panelPad, ly+6, 52, 26, panelLegendRow, panelHatch, panelHatchW)
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
	fy := float64(L.footerY)
	dc.SetColor(color.RGBA{38, 42, 49, 255})
	dc.DrawRectangle(0, fy, panelW, float64(footerH))
	dc.Fill()
	dc.SetFontFace(text)
	dc.SetColor(textColour)
	y := fy + (float64(footerH)-cautionLH*float64(len(caution)))/2 + panelTextPx
	for _, l := range caution {
		dc.DrawString(l, panelPad, y)
		y += cautionLH
	}
	return dst, nil
}

// panelBoxes lists the hot regions a tile draws: the top panelMaxBoxes by
// rank, and the box the off-lesion figure names (1-based offBox) if it is
// not among them, so that every box number printed under a picture can be
// found on it.
func panelBoxes(nBoxes, offBox int) []int {
	var show []int
	for i := 0; i < min(nBoxes, panelMaxBoxes); i++ {
		show = append(show, i)
	}
	if offBox > panelMaxBoxes && offBox <= nBoxes {
		show = append(show, offBox-1)
	}
	return show
}

// planPanelTiles measures what the numbers need and plans a grid of
// len(ms)+extra cells (extra cells come first and hold no method) for a
// one-line header, then again if some method's scale does not fit beside its name
// at the chosen width. The scale is never dropped: a map without its
// maximum cannot be compared with its neighbours.
func planPanelTiles(dc *gg.Context, ms []MethodView, scales []string, extra int, area image.Rectangle, w, h int, head, text, value font.Face) tilePlan {
	need := numberNeeds{lines: 4, compactW: 1, fullW: 1}
	for _, m := range ms {
		need.sideLines = max(need.sideLines, sideLines(dc, m.Metrics, value))
		for _, full := range []bool{false, true} {
			cw := compactWidth(dc, m.Metrics, full, text, value)
			p := &need.compactW
			if full {
				p = &need.fullW
			}
			if *p > 0 && cw > 0 {
				*p = max(*p, cw)
			} else {
				*p = 0
			}
		}
	}
	plan := planTiles(len(ms)+extra, area, need, tileHeadH, w, h)
	for pass := 0; pass < 3; pass++ {
		lines, headH := 4, tileHeadH
		for i, m := range ms {
			lines = max(lines, numberLines(dc, m.Metrics, plan, text, value))
			if !headerFits(dc, m.Name, scales[i], plan.colW(), head, text) {
				headH = tileHeadH + tileScaleH
			}
		}
		if lines == need.lines && headH == plan.headH {
			break
		}
		need.lines = lines
		plan = planTiles(len(ms)+extra, area, need, headH, w, h)
	}
	return plan
}

// compactRows are the metrics as two lines of two label/value pairs. The
// short labels drop words the long ones spell out ("pointing game",
// "largest off-lesion"); the off-lesion value still names its box, which
// tells the largest region apart from the total off-lesion mass.
func compactRows(m Metrics, full bool) [2][2][2]string {
	point, off := "pointing", "off-lesion"
	if full {
		point, off = "pointing game", "largest off-lesion"
	}
	// The reason for an undefined mass does not fit a quarter tile; it
	// is in the report and in the one-metric-a-line layout.
	mass := massText(m)
	if m.InsideMassUndefined != "" {
		mass = "undefined"
	}
	return [2][2][2]string{
		{{"inside lesion", mass}, {"rank accuracy", fraction(m.RankAccuracy)}},
		{{point, m.Pointing.String()}, {off, offLesionShort(m)}},
	}
}

// compactWidth is the tile width the two-by-two block needs, or 0 when a
// value is too long for it (a reason for an undefined value): those go one
// metric a line, where they may wrap.
func compactWidth(dc *gg.Context, m Metrics, full bool, labelFace, valueFace font.Face) int {
	w := 0.0
	for _, line := range compactRows(m, full) {
		lw := 0.0
		for _, pair := range line {
			dc.SetFontFace(labelFace)
			a, _ := dc.MeasureString(pair[0] + " ")
			dc.SetFontFace(valueFace)
			b, _ := dc.MeasureString(pair[1])
			lw += a + b
		}
		w = math.Max(w, lw+compactColGap)
	}
	if w > 560 {
		return 0
	}
	return int(math.Ceil(w))
}

// drawCompactNumbers prints the metrics as two lines, each with one
// label/value pair at the left edge and one at the right edge of r.
func drawCompactNumbers(dc *gg.Context, r image.Rectangle, m Metrics, full bool, labelFace, valueFace font.Face) {
	y := float64(r.Min.Y) + tileLineH/2
	for _, line := range compactRows(m, full) {
		// Left pair.
		dc.SetFontFace(labelFace)
		dc.SetColor(mutedColour)
		dc.DrawStringAnchored(line[0][0], float64(r.Min.X), y, 0, 0.35)
		lw, _ := dc.MeasureString(line[0][0] + " ")
		dc.SetFontFace(valueFace)
		dc.SetColor(textColour)
		dc.DrawStringAnchored(line[0][1], float64(r.Min.X)+lw, y, 0, 0.35)
		// Right pair, value flush right.
		vw, _ := dc.MeasureString(line[1][1])
		dc.DrawStringAnchored(line[1][1], float64(r.Max.X), y, 1, 0.35)
		dc.SetFontFace(labelFace)
		dc.SetColor(mutedColour)
		sw, _ := dc.MeasureString(" ")
		dc.DrawStringAnchored(line[1][0], float64(r.Max.X)-vw-sw, y, 1, 0.35)
		y += tileLineH
	}
}

// colW is the width of one tile column.
func (p tilePlan) colW() float64 {
	if p.cols == 0 {
		return 0
	}
	return float64((p.area.Dx() - (p.cols-1)*tileColGap) / p.cols)
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
	cw := float64((p.area.Dx() - (p.cols-1)*tileColGap) / p.cols)
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
