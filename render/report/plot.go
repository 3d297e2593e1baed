package report

import (
	"fmt"
	"hash/fnv"
	"math"
)

// The plots are drawn by our own code as inline SVG: a plot is a list of
// primitives in a fixed coordinate system (viewBox) that the page scales to
// its width, so the text stays proportionate on any screen. Labels go
// through html/template like every other string.

type svgPlot struct {
	ID      string
	W, H    float64
	Title   string
	Desc    string
	Rects   []svgRect
	Lines   []svgLine
	Circles []svgCircle
	Texts   []svgText
	Empty   string // shown instead of the plot when there is nothing to draw
}

type svgRect struct {
	X, Y, W, H float64
	Fill       string
	Tip        string
}

type svgLine struct {
	X1, Y1, X2, Y2 float64
	Stroke         string
	Width          float64
	Dash           string
}

type svgCircle struct {
	CX, CY, R float64
	Fill      string
	Stroke    string
	Tip       string
}

type svgText struct {
	X, Y   float64
	Text   string
	Anchor string // start, middle, end
	Size   float64
	Bold   bool
	Rotate float64
	Fill   string
}

// High-contrast series colours on white, distinguishable in greyscale by
// lightness order as well as by hue; our own choice.
var palette = []string{"#1446a0", "#c2410c", "#0f766e", "#7e22ce", "#a16207", "#be123c", "#334155"}

const (
	ink     = "#111111"
	gridCol = "#c8c8c8"
	labelSz = 22.0
	tickSz  = 19.0
)

// axis draws a horizontal value axis from x0 to x1 at y for [lo, hi].
func (p *svgPlot) xAxis(x0, x1, y, top, lo, hi, step float64, label string) func(float64) float64 {
	sx := func(v float64) float64 { return x0 + (v-lo)/(hi-lo)*(x1-x0) }
	for v := lo; v <= hi+step/1e6; v += step {
		x := sx(v)
		p.Lines = append(p.Lines, svgLine{x, top, x, y, gridCol, 1, ""})
		p.Lines = append(p.Lines, svgLine{x, y, x, y + 8, ink, 2, ""})
		p.Texts = append(p.Texts, svgText{X: x, Y: y + 32, Text: trimNum(v), Anchor: "middle", Size: tickSz, Fill: ink})
	}
	p.Lines = append(p.Lines, svgLine{x0, y, x1, y, ink, 2, ""})
	p.Texts = append(p.Texts, svgText{X: (x0 + x1) / 2, Y: y + 66, Text: label, Anchor: "middle", Size: labelSz, Bold: true, Fill: ink})
	return sx
}

func (p *svgPlot) yAxis(x, y0, y1, right, lo, hi, step float64, label string) func(float64) float64 {
	sy := func(v float64) float64 { return y0 - (v-lo)/(hi-lo)*(y0-y1) }
	for v := lo; v <= hi+step/1e6; v += step {
		y := sy(v)
		p.Lines = append(p.Lines, svgLine{x, y, right, y, gridCol, 1, ""})
		p.Lines = append(p.Lines, svgLine{x - 8, y, x, y, ink, 2, ""})
		p.Texts = append(p.Texts, svgText{X: x - 14, Y: y + 7, Text: trimNum(v), Anchor: "end", Size: tickSz, Fill: ink})
	}
	p.Lines = append(p.Lines, svgLine{x, y0, x, y1, ink, 2, ""})
	p.Texts = append(p.Texts, svgText{X: x - 78, Y: (y0 + y1) / 2, Text: label, Anchor: "middle", Size: labelSz, Bold: true, Rotate: -90, Fill: ink})
	return sy
}

func trimNum(v float64) string {
	s := fmt.Sprintf("%.2f", v)
	for len(s) > 1 && s[len(s)-1] == '0' {
		s = s[:len(s)-1]
	}
	if s[len(s)-1] == '.' {
		s = s[:len(s)-1]
	}
	return s
}

// jitter is a deterministic offset in [-1, 1] so that the plot is the same
// on every run.
func jitter(id string) float64 {
	h := fnv.New32a()
	h.Write([]byte(id))
	return float64(h.Sum32()%2001)/1000 - 1
}

// insidePlot: one row per method, a dot per image at its inside mass, the
// median as a bar and its bootstrap interval as a band; the inside
// threshold dashed.
func insidePlot(r *Report) svgPlot {
	methods := methodNames(r)
	rowH := 90.0
	p := svgPlot{ID: "plot-inside", W: 1200, Title: "Relevance mass inside the lesion, per method",
		Desc: "Each dot is one image. Thick black bar: median; shaded band: 95 % bootstrap interval of the median; dashed red line: flag threshold."}
	if len(methods) == 0 {
		p.Empty = "No measurements."
		return p
	}
	// Room for the longest method name at the label size (bold DejaVu
	// Sans averages about 0.65 em per character).
	longest := 0
	for _, m := range methods {
		longest = max(longest, len([]rune(m)))
	}
	left, right, top := math.Min(40+float64(longest)*labelSz*0.65, 600), 1160.0, 30.0
	bottom := top + rowH*float64(len(methods))
	p.H = bottom + 90
	sx := p.xAxis(left, right, bottom, top, 0, 1, 0.1, "inside-lesion mass (fraction of positive relevance, 0–1)")
	for mi, m := range methods {
		cy := top + rowH*(float64(mi)+0.5)
		col := palette[mi%len(palette)]
		p.Texts = append(p.Texts, svgText{X: left - 16, Y: cy + 8, Text: m, Anchor: "end", Size: labelSz, Bold: true, Fill: ink})
		if r.Summary != nil {
			if ms, ok := r.Summary.Method(m); ok {
				if ms.MedianInsideCI.Lo.OK {
					lo, hi := sx(ms.MedianInsideCI.Lo.V), sx(ms.MedianInsideCI.Hi.V)
					p.Rects = append(p.Rects, svgRect{lo, cy - rowH*0.4, math.Max(hi-lo, 2), rowH * 0.8, "#e2e8f0",
						fmt.Sprintf("%s median 95 %% interval %.3f–%.3f", m, ms.MedianInsideCI.Lo.V, ms.MedianInsideCI.Hi.V)})
				}
				if ms.MedianInside.OK {
					x := sx(ms.MedianInside.V)
					p.Lines = append(p.Lines, svgLine{x, cy - rowH*0.42, x, cy + rowH*0.42, ink, 5, ""})
				}
			}
		}
		for _, im := range r.Images {
			res, ok := im.Result(m)
			if !ok || !res.InsideMass.OK {
				continue
			}
			p.Circles = append(p.Circles, svgCircle{sx(res.InsideMass.V), cy + jitter(im.ID+m)*rowH*0.3, 7, col, "#ffffff",
				fmt.Sprintf("%s · %s: %.3f", im.ID, m, res.InsideMass.V)})
		}
	}
	if r.Summary != nil {
		x := sx(r.Summary.Options.InsideThreshold)
		p.Lines = append(p.Lines, svgLine{x, top - 10, x, bottom, "#b91c1c", 3, "10 6"})
	}
	return p
}

// scatterPlot: model score against off-lesion mass (1 − inside mass) for
// the primary method; colour and shape by correctness.
func scatterPlot(r *Report) svgPlot {
	primary := ""
	if r.Summary != nil {
		primary = r.Summary.Primary
	}
	p := svgPlot{ID: "plot-scatter", W: 1200, H: 640, Title: "Model score against off-lesion relevance (" + primary + ")",
		Desc: "Each mark is one image: blue circle = correct, orange square = incorrect, grey diamond = no true label."}
	left, right, top, bottom := 150.0, 1160.0, 30.0, 540.0
	sx := p.xAxis(left, right, bottom, top, 0, 1, 0.1, "off-lesion mass, 1 − inside mass (fraction, 0–1)")
	sy := p.yAxis(left, bottom, top, right, 0, 1, 0.2, "model score (probability)")
	n := 0
	for _, im := range r.Images {
		res, ok := im.Result(primary)
		if !ok || !res.InsideMass.OK {
			continue
		}
		n++
		x, y := sx(1-res.InsideMass.V), sy(math.Max(0, math.Min(1, im.Score)))
		tip := fmt.Sprintf("%s: off-lesion %.3f, score %.3f, %s", im.ID, 1-res.InsideMass.V, im.Score, im.Correctness())
		switch im.Correctness() {
		case "correct":
			p.Circles = append(p.Circles, svgCircle{x, y, 9, palette[0], "#ffffff", tip})
		case "incorrect":
			p.Rects = append(p.Rects, svgRect{x - 8, y - 8, 16, 16, palette[1], tip})
		default:
			p.Circles = append(p.Circles, svgCircle{x, y, 8, "#6b7280", ink, tip})
		}
	}
	if n == 0 {
		p.Empty = "No image has a defined inside mass for the primary method."
	}
	return p
}

// artefactPlot: mean artefact mass per category (over images where the
// category is present), one bar per method; the artefact threshold dashed.
func artefactPlot(r *Report) svgPlot {
	cats := artefactCategories(r.Images)
	methods := methodNames(r)
	p := svgPlot{ID: "plot-artefact", W: 1200, H: 600, Title: "Mean relevance mass on each artefact category",
		Desc: "Mean over images where the category is annotated; one bar per method; dashed red line: flag threshold."}
	if len(cats) == 0 || r.Summary == nil {
		p.Empty = "No artefact masks were supplied."
		p.H = 0
		return p
	}
	maxV := r.Summary.Options.ArtefactThreshold
	for _, m := range r.Summary.Methods {
		for _, v := range m.ArtefactMean {
			if v.OK {
				maxV = math.Max(maxV, v.V)
			}
		}
	}
	hi := math.Min(1, math.Ceil(maxV*1.15*10)/10)
	if hi <= 0 {
		hi = 0.1
	}
	step := 0.1
	if hi > 0.5 {
		step = 0.2
	}
	left, right, top, bottom := 150.0, 1160.0, 70.0, 500.0
	// Legend first: entries wrap onto further rows rather than run past
	// the right edge (seven methods do not fit on one row), and the plot
	// moves down by the extra rows.
	type entry struct{ x, y float64 }
	var legend []entry
	lx, ly := left, 20.0
	for _, m := range methods {
		w := 60 + float64(len([]rune(m)))*11
		if lx > left && lx+w-24 > right {
			lx, ly = left, ly+34
		}
		legend = append(legend, entry{lx, ly})
		lx += w
	}
	extra := ly - 20
	top, bottom, p.H = top+extra, bottom+extra, p.H+extra
	sy := p.yAxis(left, bottom, top, right, 0, hi, step, "mean mass on artefact (fraction)")
	groupW := (right - left) / float64(len(cats))
	barW := math.Min(60, groupW*0.8/float64(len(methods)))
	for ci, c := range cats {
		gx := left + groupW*float64(ci) + (groupW-barW*float64(len(methods)))/2
		p.Texts = append(p.Texts, svgText{X: left + groupW*(float64(ci)+0.5), Y: bottom + 34, Text: c, Anchor: "middle", Size: labelSz, Bold: true, Fill: ink})
		for mi, m := range methods {
			ms, _ := r.Summary.Method(m)
			if ms == nil {
				continue
			}
			v, ok := ms.ArtefactMean[c]
			if !ok || !v.OK {
				continue
			}
			y := sy(v.V)
			p.Rects = append(p.Rects, svgRect{gx + barW*float64(mi), y, barW - 4, bottom - y, palette[mi%len(palette)], fmt.Sprintf("%s on %s: %.3f", m, c, v.V)})
		}
	}
	y := sy(r.Summary.Options.ArtefactThreshold)
	p.Lines = append(p.Lines, svgLine{left, y, right, y, "#b91c1c", 3, "10 6"})
	for mi, m := range methods {
		e := legend[mi]
		p.Rects = append(p.Rects, svgRect{e.x, e.y, 24, 24, palette[mi%len(palette)], m})
		p.Texts = append(p.Texts, svgText{X: e.x + 32, Y: e.y + 20, Text: m, Anchor: "start", Size: tickSz, Fill: ink})
	}
	p.Texts = append(p.Texts, svgText{X: (left + right) / 2, Y: bottom + 76, Text: "artefact category", Anchor: "middle", Size: labelSz, Bold: true, Fill: ink})
	return p
}

// methodNames lists methods in summary order, else first-seen order.
func methodNames(r *Report) []string {
	var out []string
	if r.Summary != nil {
		for _, m := range r.Summary.Methods {
			out = append(out, m.Method)
		}
		return out
	}
	seen := map[string]bool{}
	for _, im := range r.Images {
		for _, res := range im.Results {
			if !seen[res.Method] {
				seen[res.Method] = true
				out = append(out, res.Method)
			}
		}
	}
	return out
}
