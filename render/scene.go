package render

import (
	"fmt"
	"hash/fnv"
	"image"
	"image/color"
	"image/draw"
	"math"
	"sort"
	"strings"
	"unicode"

	"github.com/disintegration/imaging"
	"github.com/fogleman/gg"

	"heedmap/render/colour"
)

// Attribution is one method's map on the original image's pixel grid.
type Attribution struct {
	// Values holds W·H attributions, row-major over the image bounds.
	Values []float32
	// Seen marks the pixels the model saw (W·H); nil means all. Unseen
	// pixels are drawn greyed and hatched, never as zero attribution, and
	// their values are ignored (they may be NaN).
	Seen []bool
	// Signed selects the diverging ramp on a symmetric scale −Scale…+Scale;
	// otherwise the sequential ramp on 0…Scale, with negative values drawn
	// as zero.
	Signed bool
	// Scale is the magnitude drawn at the ramp's end. Zero means the largest
	// |value| over seen pixels (each map normalised to its own maximum); set
	// it to compare several maps on one scale.
	Scale float64
	// Unit labels the colour bar; empty means "attribution (score units)".
	Unit string
	// HotRegions are boxes in image pixel coordinates ((0,0) is the image's
	// top-left pixel), drawn numbered 1, 2, … in this order.
	HotRegions []image.Rectangle
}

// Pointing is the outcome of the pointing game for one map.
type Pointing int8

const (
	PointingNotComputed Pointing = iota
	PointingHit
	PointingMiss
)

// Metrics are the numbers printed beside a map. Fractions are in [0, 1];
// NaN means not computed (printed "n/a").
type Metrics struct {
	// InsideMass is the share of positive attribution inside the lesion.
	InsideMass float64
	// InsideMassUndefined, when not empty, says why the inside mass is
	// undefined (for example "no positive attribution"); it is printed as
	// "undefined: <reason>" instead of a number.
	InsideMassUndefined string
	// RankAccuracy is the share of the top-|lesion| pixels inside the lesion.
	RankAccuracy float64
	Pointing     Pointing
	// OffLesion is the share of positive attribution in the largest
	// connected region outside the lesion; OffLesionBox is that region's
	// hot-region number (1-based), 0 if it is not boxed. NaN means not
	// computed ("n/a"); 0 with no box means the map has no off-lesion hot
	// region ("none").
	OffLesion    float64
	OffLesionBox int
}

// NoMetrics returns Metrics with every number marked not computed.
func NoMetrics() Metrics {
	return Metrics{InsideMass: math.NaN(), RankAccuracy: math.NaN(), OffLesion: math.NaN()}
}

// Caption is the text printed under an overlay.
type Caption struct {
	Method    string  // attribution method
	Target    string  // target class the map explains
	ScoreKind string  // e.g. "logit" or "probability"
	Score     float64 // the model's score for Target
	Metrics   Metrics
}

// Scene is everything one overlay shows.
type Scene struct {
	Image     image.Image
	Map       Attribution
	Lesion    []bool            // W·H lesion mask; nil for none
	Artefacts map[string][]bool // W·H masks by artefact category
	Caption   Caption
}

// Drawing constants shared by overlays and panels.
const (
	heatAlphaMax = 0.8 // opacity of the heat colour at full magnitude
	unseenMix    = 0.7 // how far unseen pixels are pulled to unseenGrey
)

var (
	unseenGrey   = color.RGBA{154, 154, 154, 255}
	unseenInk    = color.RGBA{42, 42, 42, 255}
	lesionCore   = color.RGBA{255, 255, 255, 255}
	outlineHalo  = color.RGBA{12, 12, 12, 255}
	boxColour    = color.RGBA{0, 229, 255, 255}
	artefactInks = []color.RGBA{
		{255, 176, 0, 255},   // amber
		{255, 79, 216, 255},  // magenta
		{124, 255, 79, 255},  // lime
		{255, 122, 26, 255},  // orange
		{181, 140, 255, 255}, // violet
	}
	artefactDashes = [][]float64{
		{14, 7},
		{3, 5},
		{18, 5, 3, 5},
		{8, 4, 2, 4, 2, 4},
		{26, 9},
	}
)

// base is the part of a scene shared by every method: the image and the
// mask outlines, traced once.
type base struct {
	img       image.Image
	w, h      int
	lesion    [][]image.Point
	hasLesion bool
	lesionPix []bool
	artefacts []artefactLayer
}

type artefactLayer struct {
	name     string
	ink      color.RGBA
	dash     []float64
	mask     []bool
	contours [][]image.Point
}

// knownArtefactSlots fixes the look of the usual categories (Bissoto et
// al., CVPR Workshops 2020, list rulers, ink markings, hair, dark corners,
// gel bubbles, gel borders and patches), so that a category looks the same
// on every overlay and panel of a report whatever else the image carries.
var knownArtefactSlots = map[string]int{
	"ruler": 0, "rulers": 0, "scalebar": 0,
	// Ink markings are usually purple or blue: lime contrasts best.
	"ink": 2, "inkmarking": 2, "inkmarkings": 2, "marker": 2,
	"hair":       1,
	"darkcorner": 3, "darkcorners": 3, "vignette": 3,
	"bubble": 4, "bubbles": 4, "gelbubble": 4, "gelbubbles": 4,
	"gelborder": 5, "gelborders": 5,
	"patch": 6, "patches": 6,
}

// artefactSlots is the number of distinct ink × dash looks: slot s takes
// ink s mod 5 and dash (s mod 5 + s div 5) mod 5, so the 25 slots are 25
// different pairs.
const artefactSlots = 25

// artefactSlot picks a category's look: its fixed slot when the name is a
// usual one, else a slot from a hash of the name (stable across images),
// moving to the next free slot when another category of this image holds
// it. Two categories of one image never share a look unless an image has
// more than 25 categories.
func artefactSlot(name string, taken map[int]bool) int {
	key := strings.Map(func(r rune) rune {
		switch r {
		case ' ', '-', '_', '.':
			return -1
		}
		return unicode.ToLower(r)
	}, name)
	slot, ok := knownArtefactSlots[key]
	if !ok {
		h := fnv.New32a()
		h.Write([]byte(key))
		slot = int(h.Sum32() % artefactSlots)
	}
	for i := 0; i < artefactSlots && taken[slot]; i++ {
		slot = (slot + 1) % artefactSlots
	}
	taken[slot] = true
	return slot
}

func newBase(img image.Image, lesion []bool, artefacts map[string][]bool) (*base, error) {
	if img == nil {
		return nil, fmt.Errorf("render: nil image")
	}
	b := img.Bounds()
	w, h := b.Dx(), b.Dy()
	if w <= 0 || h <= 0 {
		return nil, fmt.Errorf("render: empty image %v", b)
	}
	bs := &base{img: img, w: w, h: h}
	if lesion != nil {
		if len(lesion) != w*h {
			return nil, fmt.Errorf("render: lesion mask has %d pixels, image is %d×%d", len(lesion), w, h)
		}
		bs.lesion = contours(lesion, w, h)
		bs.hasLesion = true
		bs.lesionPix = lesion
	}
	names := make([]string, 0, len(artefacts))
	for k := range artefacts {
		names = append(names, k)
	}
	sort.Strings(names)
	taken := map[int]bool{}
	for _, name := range names {
		m := artefacts[name]
		if len(m) != w*h {
			return nil, fmt.Errorf("render: artefact mask %q has %d pixels, image is %d×%d", name, len(m), w, h)
		}
		slot := artefactSlot(name, taken)
		bs.artefacts = append(bs.artefacts, artefactLayer{
			name:     name,
			ink:      artefactInks[slot%len(artefactInks)],
			dash:     artefactDashes[(slot%len(artefactInks)+slot/len(artefactInks))%len(artefactDashes)],
			mask:     m,
			contours: contours(m, w, h),
		})
	}
	return bs, nil
}

// heat is one map prepared for drawing: a ramp colour and opacity per image
// pixel, computed once and then looked up for every canvas pixel.
type heat struct {
	w, h   int
	rgb    []color.NRGBA // A holds the opacity, 0–255
	unseen []bool
	ramp   *colour.Ramp
	signed bool
	scale  float64
	unit   string
	boxes  []image.Rectangle
}

func newHeat(a *Attribution, w, h int) (*heat, error) {
	if len(a.Values) != w*h {
		return nil, fmt.Errorf("render: attribution has %d values, image is %d×%d", len(a.Values), w, h)
	}
	if a.Seen != nil && len(a.Seen) != w*h {
		return nil, fmt.Errorf("render: seen mask has %d pixels, image is %d×%d", len(a.Seen), w, h)
	}
	if a.Scale < 0 || math.IsNaN(a.Scale) || math.IsInf(a.Scale, 0) {
		return nil, fmt.Errorf("render: colour scale %v is not a finite non-negative number", a.Scale)
	}
	ht := &heat{w: w, h: h, rgb: make([]color.NRGBA, w*h), unseen: make([]bool, w*h),
		signed: a.Signed, scale: a.Scale, unit: a.Unit, ramp: colour.Sequential()}
	if a.Signed {
		ht.ramp = colour.Diverging()
	}
	if ht.unit == "" {
		ht.unit = "attribution (score units)"
	}
	peak := 0.0
	for i, v := range a.Values {
		if a.Seen != nil && !a.Seen[i] {
			ht.unseen[i] = true
			continue
		}
		f := float64(v)
		if math.IsNaN(f) || math.IsInf(f, 0) {
			return nil, fmt.Errorf("render: attribution at pixel (%d, %d) is %v", i%w, i/w, v)
		}
		if !a.Signed {
			f = math.Max(f, 0)
		}
		peak = math.Max(peak, math.Abs(f))
	}
	if ht.scale == 0 {
		ht.scale = peak
	}
	for i, v := range a.Values {
		if ht.unseen[i] || ht.scale == 0 {
			continue
		}
		u := float64(v) / ht.scale
		var t, m float64
		if a.Signed {
			u = math.Max(-1, math.Min(1, u))
			t, m = 0.5+0.5*u, math.Abs(u)
		} else {
			u = math.Max(0, math.Min(1, u))
			t, m = u, u
		}
		c := ht.ramp.At(t)
		c.A = uint8(math.Round(255 * heatAlphaMax * m))
		ht.rgb[i] = c
	}
	for i, r := range a.HotRegions {
		r = r.Canon().Intersect(image.Rect(0, 0, w, h))
		if r.Empty() {
			return nil, fmt.Errorf("render: hot region %d (%v) lies outside the %d×%d image", i+1, a.HotRegions[i], w, h)
		}
		ht.boxes = append(ht.boxes, r)
	}
	return ht, nil
}

// drawPhoto resizes the image into r (Lanczos for the photograph; the map
// and masks are drawn with exact pixel edges on top).
func drawPhoto(dst *image.RGBA, r image.Rectangle, img image.Image) {
	var src image.Image = img
	if img.Bounds().Dx() != r.Dx() || img.Bounds().Dy() != r.Dy() {
		src = imaging.Resize(img, r.Dx(), r.Dy(), imaging.Lanczos)
	}
	draw.Draw(dst, r, src, src.Bounds().Min, draw.Over)
}

// hatch reports whether canvas offset (dx, dy) inside a picture falls on a
// line of the unseen pattern: diagonal lines of width lw every period px.
func hatch(dx, dy, period, lw int) bool { return (dx+dy)%period < lw }

// drawHeat blends the heat into the photo already in r, nearest-neighbour
// from image pixels so that each image pixel stays a crisp square. Colour is
// blended in encoded sRGB (ordinary "over" compositing, which is what a
// viewer expects of opacity) with alpha = heatAlphaMax · |value| / scale.
// Unseen pixels are pulled towards grey and hatched, whatever their value.
func drawHeat(dst *image.RGBA, r image.Rectangle, ht *heat, period, lw int) {
	sx := float64(ht.w) / float64(r.Dx())
	sy := float64(ht.h) / float64(r.Dy())
	col := make([]int, r.Dx())
	for x := range col {
		col[x] = min(ht.w-1, int(float64(x)*sx))
	}
	for y := 0; y < r.Dy(); y++ {
		iy := min(ht.h-1, int(float64(y)*sy))
		row := dst.Pix[dst.PixOffset(r.Min.X, r.Min.Y+y):]
		for x := 0; x < r.Dx(); x++ {
			i := iy*ht.w + col[x]
			p := row[4*x : 4*x+4 : 4*x+4]
			if ht.unseen[i] {
				if hatch(x, y, period, lw) {
					p[0], p[1], p[2] = unseenInk.R, unseenInk.G, unseenInk.B
				} else {
					p[0] = mix8(p[0], unseenGrey.R, unseenMix)
					p[1] = mix8(p[1], unseenGrey.G, unseenMix)
					p[2] = mix8(p[2], unseenGrey.B, unseenMix)
				}
				p[3] = 255
				continue
			}
			c := ht.rgb[i]
			if c.A == 0 {
				continue
			}
			a := float64(c.A) / 255
			p[0] = mix8(p[0], c.R, a)
			p[1] = mix8(p[1], c.G, a)
			p[2] = mix8(p[2], c.B, a)
			p[3] = 255
		}
	}
}

func mix8(a, b uint8, t float64) uint8 {
	return uint8(math.Round(float64(a)*(1-t) + float64(b)*t))
}

// strokeStyle is a line drawn as a dark halo under a coloured core, which
// stays visible on both light and dark backgrounds.
type strokeStyle struct {
	core       color.RGBA
	coreW      float64
	haloW      float64
	dash       []float64
	dashedHalo bool
}

func strokePolys(dc *gg.Context, polys [][]gg.Point, st strokeStyle) {
	path := func() {
		dc.ClearPath()
		for _, p := range polys {
			if len(p) == 0 {
				continue
			}
			dc.MoveTo(p[0].X, p[0].Y)
			for _, q := range p[1:] {
				dc.LineTo(q.X, q.Y)
			}
			dc.ClosePath()
		}
	}
	dc.SetLineJoin(gg.LineJoinRound)
	dc.SetLineCap(gg.LineCapButt)
	path()
	dc.SetColor(outlineHalo)
	dc.SetLineWidth(st.haloW)
	if st.dashedHalo {
		dc.SetDash(st.dash...)
	} else {
		dc.SetDash()
	}
	dc.Stroke()
	path()
	dc.SetColor(st.core)
	dc.SetLineWidth(st.coreW)
	dc.SetDash(st.dash...)
	dc.Stroke()
	dc.SetDash()
}

// toCanvas maps contour vertices (pixel corners) into the picture rectangle.
func toCanvas(cs [][]image.Point, r image.Rectangle, w, h int) [][]gg.Point {
	sx := float64(r.Dx()) / float64(w)
	sy := float64(r.Dy()) / float64(h)
	out := make([][]gg.Point, len(cs))
	for i, c := range cs {
		out[i] = make([]gg.Point, len(c))
		for j, p := range c {
			out[i][j] = gg.Point{X: float64(r.Min.X) + float64(p.X)*sx, Y: float64(r.Min.Y) + float64(p.Y)*sy}
		}
	}
	return out
}

// lineScale sizes strokes for a picture: 1 for an ~800 px picture, smaller
// for slide tiles, never below 0.6 so outlines stay visible.
func lineScale(r image.Rectangle) float64 {
	return math.Max(0.6, math.Min(1, float64(max(r.Dx(), r.Dy()))/800))
}

func lesionStyle(k float64) strokeStyle {
	return strokeStyle{core: lesionCore, coreW: 4 * k, haloW: 9 * k}
}

func artefactStyle(a artefactLayer, k float64) strokeStyle {
	d := make([]float64, len(a.dash))
	for i, v := range a.dash {
		d[i] = v * math.Max(k, 0.75)
	}
	return strokeStyle{core: a.ink, coreW: 4.5 * k, haloW: 8.5 * k, dash: d, dashedHalo: true}
}

// drawOutlines draws artefact outlines, then the lesion outline on top.
func drawOutlines(dc *gg.Context, r image.Rectangle, b *base) {
	k := lineScale(r)
	for _, a := range b.artefacts {
		strokePolys(dc, toCanvas(a.contours, r, b.w, b.h), artefactStyle(a, k))
	}
	if b.hasLesion {
		strokePolys(dc, toCanvas(b.lesion, r, b.w, b.h), lesionStyle(k))
	}
}

// drawBoxes draws the hot regions whose indices are in show (all of them
// when show is nil), then their number tags, and returns the tag
// rectangles drawn. Boxes are stroked before any tag so that no outline
// crosses a number.
func drawBoxes(dc *gg.Context, r image.Rectangle, ht *heat, labelPx float64, show []int) []tagRect {
	if show == nil {
		show = make([]int, len(ht.boxes))
		for i := range show {
			show[i] = i
		}
	}
	k := lineScale(r)
	sx := float64(r.Dx()) / float64(ht.w)
	sy := float64(r.Dy()) / float64(ht.h)
	f := face(true, labelPx)
	defer f.Close()
	dc.SetFontFace(f)
	boxes := make([]tagRect, len(show))
	sizes := make([][2]float64, len(show))
	for j, i := range show {
		b := ht.boxes[i]
		x0 := float64(r.Min.X) + float64(b.Min.X)*sx
		y0 := float64(r.Min.Y) + float64(b.Min.Y)*sy
		x1 := float64(r.Min.X) + float64(b.Max.X)*sx
		y1 := float64(r.Min.Y) + float64(b.Max.Y)*sy
		boxes[j] = tagRect{x0, y0, x1, y1}
		poly := [][]gg.Point{{{X: x0, Y: y0}, {X: x1, Y: y0}, {X: x1, Y: y1}, {X: x0, Y: y1}}}
		strokePolys(dc, poly, strokeStyle{core: boxColour, coreW: 3.5 * k, haloW: 7.5 * k})
		tw, _ := dc.MeasureString(fmt.Sprint(i + 1))
		sizes[j] = [2]float64{tw + labelPx*0.6, labelPx * 1.25}
	}
	bounds := tagRect{float64(r.Min.X), float64(r.Min.Y), float64(r.Max.X), float64(r.Max.Y)}
	tags, ok := placeTags(boxes, sizes, bounds)
	var drawn []tagRect
	for j, i := range show {
		if !ok[j] {
			continue // the box stays; its number would cover another
		}
		t := tags[j]
		dc.SetColor(boxColour)
		dc.DrawRectangle(t.x0, t.y0, t.x1-t.x0, t.y1-t.y0)
		dc.Fill()
		dc.SetColor(outlineHalo)
		dc.DrawStringAnchored(fmt.Sprint(i+1), (t.x0+t.x1)/2, (t.y0+t.y1)/2, 0.5, 0.35)
		drawn = append(drawn, t)
	}
	return drawn
}

// tagRect is a rectangle in canvas coordinates, [x0, x1) × [y0, y1).
type tagRect struct{ x0, y0, x1, y1 float64 }

func (a tagRect) overlaps(b tagRect) bool {
	return a.x0 < b.x1 && b.x0 < a.x1 && a.y0 < b.y1 && b.y0 < a.y1
}

func (a tagRect) in(b tagRect) bool {
	return a.x0 >= b.x0 && a.y0 >= b.y0 && a.x1 <= b.x1 && a.y1 <= b.y1
}

// placeTags places one w×h tag per box, in rank order, greedily: the first
// candidate position inside bounds that overlaps no tag placed before it.
// Candidates are the box's corners (just above the top-left corner first,
// the usual place for a label, then inside each corner) and then positions
// outside the box next to it. A box whose every candidate collides gets no
// tag (ok false): an unreadable pile of numbers is worse than an unnumbered
// box, and the higher-ranked boxes, placed first, keep theirs.
func placeTags(boxes []tagRect, sizes [][2]float64, bounds tagRect) (tags []tagRect, ok []bool) {
	tags = make([]tagRect, len(boxes))
	ok = make([]bool, len(boxes))
	var placed []tagRect
	for i, b := range boxes {
		w, h := sizes[i][0], sizes[i][1]
		cands := [][2]float64{
			{b.x0, b.y0 - h},     // above, left-aligned
			{b.x0, b.y0},         // inside top-left
			{b.x1 - w, b.y0},     // inside top-right
			{b.x0, b.y1 - h},     // inside bottom-left
			{b.x1 - w, b.y1 - h}, // inside bottom-right
			{b.x1 - w, b.y0 - h}, // above, right-aligned
			{b.x0, b.y1},         // below, left-aligned
			{b.x1 - w, b.y1},     // below, right-aligned
			{b.x0 - w, b.y0},     // left of the top
			{b.x1, b.y0},         // right of the top
			{b.x0 - w, b.y1 - h}, // left of the bottom
			{b.x1, b.y1 - h},     // right of the bottom
		}
		for _, c := range cands {
			t := tagRect{c[0], c[1], c[0] + w, c[1] + h}
			if !t.in(bounds) {
				continue
			}
			free := true
			for _, p := range placed {
				if t.overlaps(p) {
					free = false
					break
				}
			}
			if free {
				tags[i], ok[i] = t, true
				placed = append(placed, t)
				break
			}
		}
	}
	return tags, ok
}

// drawPicture draws photo, heat, outlines and the hot regions listed in
// show (all when show is nil) into r; ht may be nil (plain image with
// outlines). It returns the number tags drawn.
func drawPicture(dst *image.RGBA, r image.Rectangle, b *base, ht *heat, period, lw int, labelPx float64, show []int) []tagRect {
	drawPhoto(dst, r, b.img)
	if ht != nil {
		drawHeat(dst, r, ht, period, lw)
	}
	dc := gg.NewContextForRGBA(dst)
	drawOutlines(dc, r, b)
	if ht != nil {
		return drawBoxes(dc, r, ht, labelPx, show)
	}
	return nil
}

// fitRect returns the largest rectangle with the image's aspect ratio
// centred in area.
func fitRect(area image.Rectangle, w, h int) image.Rectangle {
	s := math.Min(float64(area.Dx())/float64(w), float64(area.Dy())/float64(h))
	cw, ch := int(math.Floor(float64(w)*s)), int(math.Floor(float64(h)*s))
	x := area.Min.X + (area.Dx()-cw)/2
	y := area.Min.Y + (area.Dy()-ch)/2
	return image.Rect(x, y, x+cw, y+ch)
}
