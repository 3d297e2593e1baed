package render

import (
	"image"
	"image/color"
	"image/draw"
	"math"

	"github.com/fogleman/gg"
	"golang.org/x/image/font"
)

// Overlay sizes, in canvas pixels. Small images are enlarged by an integer
// factor so the picture is at least overlayMinWidth wide (text and outlines
// then have room, and image pixels stay square); very large ones are reduced
// to overlayMaxSide.
const (
	overlayMinWidth = 800
	overlayMaxSide  = 1600
	overlayPad      = 28
	overlayRightW   = 300
	overlayBarW     = 44
	overlayTextPx   = 22
	overlayTitlePx  = 28
	hatchPeriod     = 12
	hatchWidth      = 3
)

// overlayScale returns the canvas pixels per image pixel.
func overlayScale(w, h int) float64 {
	s := 1.0
	if w < overlayMinWidth {
		s = math.Ceil(float64(overlayMinWidth) / float64(w))
	}
	if m := float64(max(w, h)) * s; m > overlayMaxSide {
		s *= overlayMaxSide / m
	}
	return s
}

// overlayLayout is where Overlay puts things; tests read it.
type overlayLayout struct {
	canvas  image.Rectangle
	picture image.Rectangle
	bar     image.Rectangle
	unitAt  gg.Point
	unit    []string
	legendY float64
	legend  [][]legendItem
	capY    float64
	caption []captionLine
}

type captionLine struct {
	text string
	bold bool
}

type overlayFaces struct{ text, title font.Face }

func (f overlayFaces) Close() { f.text.Close(); f.title.Close() }

func planOverlay(b *base, ht *heat, c Caption, fs overlayFaces) overlayLayout {
	var L overlayLayout
	s := overlayScale(b.w, b.h)
	wc, hc := int(math.Round(float64(b.w)*s)), int(math.Round(float64(b.h)*s))
	L.picture = image.Rect(overlayPad, overlayPad, overlayPad+wc, overlayPad+hc)
	width := overlayPad + wc + overlayRightW + overlayPad

	m := gg.NewContext(1, 1)
	m.SetFontFace(fs.text)
	L.unit = m.WordWrap(ht.unit, overlayRightW-40)
	lineH := float64(overlayTextPx) * 1.35
	barX := L.picture.Max.X + 40
	L.unitAt = gg.Point{X: float64(barX), Y: float64(overlayPad)}
	barTop := overlayPad + int(math.Ceil(lineH*float64(len(L.unit)))) + 18
	barH := max(hc-(barTop-overlayPad), 320)
	L.bar = image.Rect(barX, barTop, barX+overlayBarW, barTop+barH)

	top := float64(max(L.picture.Max.Y, L.bar.Max.Y)) + 24
	items := legendItems(b, len(ht.boxes) > 0, anyTrue(ht.unseen), lineScale(L.picture))
	items = append(items, legendItem{kind: legendNote, label: "heat opacity proportional to |attribution| (80 % at max)"})
	rows, lh := layoutLegend(m, items, float64(width-2*overlayPad), 56, 28, 40)
	L.legend, L.legendY = rows, top
	top += lh + 16

	// Caption: the method and target in bold, then the numbers.
	textW := float64(width - 2*overlayPad - 24)
	m.SetFontFace(fs.title)
	head := c.Method + "  \u2192  target " + quoteEmpty(c.Target) + " (" + scoreText(c.ScoreKind, c.Score) + ")"
	for _, s := range m.WordWrap(head, textW) {
		L.caption = append(L.caption, captionLine{s, true})
	}
	m.SetFontFace(fs.text)
	met := c.Metrics
	for _, s := range []string{
		"inside-lesion mass: " + massText(met) + "     rank accuracy: " + fraction(met.RankAccuracy),
		"pointing game: " + met.Pointing.String() + "     largest off-lesion region: " + offLesionText(met),
	} {
		for _, w := range m.WordWrap(s, textW) {
			L.caption = append(L.caption, captionLine{w, false})
		}
	}
	L.capY = top
	h := top + 16 + captionHeight(L.caption) + 16 + overlayPad
	L.canvas = image.Rect(0, 0, width, int(math.Ceil(h)))
	return L
}

func captionHeight(lines []captionLine) float64 {
	h := 0.0
	for _, l := range lines {
		if l.bold {
			h += overlayTitlePx * 1.4
		} else {
			h += overlayTextPx * 1.45
		}
	}
	return h
}

func quoteEmpty(s string) string {
	if s == "" {
		return "(unnamed)"
	}
	return s
}

func anyTrue(b []bool) bool {
	for _, v := range b {
		if v {
			return true
		}
	}
	return false
}

// Overlay draws one attribution map over its image: the heat (sequential
// ramp for unsigned maps, diverging ramp on a symmetric scale for signed
// ones, opacity proportional to magnitude), unseen pixels hatched grey, the
// lesion outline in white over a dark halo, artefact outlines in a dash
// pattern per category, numbered hot-region boxes, a colour bar with ticks
// and unit, a legend, and a caption strip with the method, target, score
// and metrics. Masks and values are on the image's pixel grid (W·H,
// row-major); lengths that do not match are an error.
func Overlay(s Scene) (*image.RGBA, error) {
	b, err := newBase(s.Image, s.Lesion, s.Artefacts)
	if err != nil {
		return nil, err
	}
	ht, err := newHeat(&s.Map, b.w, b.h)
	if err != nil {
		return nil, err
	}
	fs := overlayFaces{face(false, overlayTextPx), face(true, overlayTitlePx)}
	defer fs.Close()
	L := planOverlay(b, ht, s.Caption, fs)

	dst := image.NewRGBA(L.canvas)
	draw.Draw(dst, dst.Bounds(), image.NewUniform(bgColour), image.Point{}, draw.Src)
	drawPicture(dst, L.picture, b, ht, hatchPeriod, hatchWidth, overlayTextPx, nil)
	drawColourBar(dst, L.bar, ht.ramp, ht.signed, ht.scale, fs.text)

	dc := gg.NewContextForRGBA(dst)
	dc.SetFontFace(fs.text)
	dc.SetColor(textColour)
	for i, l := range L.unit {
		dc.DrawString(l, L.unitAt.X, L.unitAt.Y+float64(overlayTextPx)*(1+1.35*float64(i)))
	}
	drawLegend(dst, dc, L.legend, overlayPad, L.legendY, 56, 28, 40, hatchPeriod, hatchWidth)

	// Caption strip.
	dc.SetColor(color.RGBA{38, 42, 49, 255})
	dc.DrawRectangle(overlayPad, L.capY, float64(L.canvas.Dx()-2*overlayPad), captionHeight(L.caption)+32)
	dc.Fill()
	y := L.capY + 16
	for _, l := range L.caption {
		if l.bold {
			dc.SetFontFace(fs.title)
			y += overlayTitlePx * 1.4
		} else {
			dc.SetFontFace(fs.text)
			y += overlayTextPx * 1.45
		}
		dc.SetColor(textColour)
		dc.DrawString(l.text, overlayPad+12, y-8)
	}
	return dst, nil
}
