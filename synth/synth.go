// Package synth draws synthetic dermoscopy-like scenes for demos and tests: a
// skin-toned field, one pigmented lesion whose border irregularity and colour
// variegation depend on an invented "malignant-like" class, and optional
// artefacts (scale-bar ruler, ink marks, hairs, dark corners of a round
// dermatoscope field, gel bubbles), each with its own pixel mask.
//
// The scenario is our own invention. It imitates only the look of the
// artefact types named in the dermoscopy-bias literature (rulers, ink, hair,
// dark corners, gel bubbles); no real image, patient or dataset is used, and
// the class rule is a toy: class 1 lesions have more border harmonics and
// more colour blotches than class 0 lesions, with overlapping distributions
// so the lesion alone cannot be classified perfectly. That gap is what makes
// a shortcut through a class-correlated artefact attractive to a classifier.
//
// Everything is deterministic from a seed (math/rand/v2 PCG). The lesion, the
// background and each artefact draw from separate streams derived from the
// seed, so switching one artefact on or off leaves the rest of the scene
// pixel-identical: the same lesion can be shown with and without a ruler.
package synth

import (
	"fmt"
	"hash/fnv"
	"image"
	"image/color"
	"math"
	"math/rand/v2"
)

// Artefact names. They are the keys of Scene.Artefacts and Options.Rates and
// the artifact:<name> columns of a written manifest.
const (
	Ruler       = "ruler"
	Ink         = "ink"
	Hair        = "hair"
	DarkCorners = "dark_corners"
	Bubbles     = "bubbles"
)

// Names lists the artefact names in drawing order.
func Names() []string { return []string{Hair, Ink, Ruler, Bubbles, DarkCorners} }

// Options controls Generate and WriteDataset. The zero value draws 224×224
// scenes with a random class and DefaultRates.
type Options struct {
	// Size is the width and height in pixels; 0 means 224. Artefact sizes
	// scale with it; below 32 the scene is too coarse to be useful.
	Size int
	// FixedLabel makes every scene class Label (0 benign-like, 1
	// malignant-like); otherwise the class is drawn with probability 1/2.
	FixedLabel bool
	Label      int
	// Rates gives, per artefact name, the probability that it appears in a
	// class-0 scene and in a class-1 scene. Names absent from the map never
	// appear; a nil map means DefaultRates. Unequal rates make the artefact a
	// class shortcut.
	Rates map[string][2]float64
	// Seed is the first seed WriteDataset uses; Generate takes its own.
	Seed uint64
}

// DefaultRates returns every artefact at probability 0.3, independent of
// the class.
func DefaultRates() map[string][2]float64 {
	m := map[string][2]float64{}
	for _, n := range Names() {
		m[n] = [2]float64{0.3, 0.3}
	}
	return m
}

// Scene is one generated image with its ground truth.
type Scene struct {
	Image *image.RGBA
	// Lesion is the lesion mask, row-major, true inside the lesion border
	// (also where hair or ink lies over it).
	Lesion []bool
	// Artefacts holds a mask for each artefact present in the scene.
	Artefacts map[string][]bool
	// Label is 0 (benign-like) or 1 (malignant-like).
	Label int
	// Malignancy is the latent in [0, 1] that drove border irregularity and
	// variegation; classes overlap in it around 0.5.
	Malignancy float64
}

// stream returns an independent generator for one part of the scene.
func stream(seed uint64, part string) *rand.Rand {
	h := fnv.New64a()
	h.Write([]byte(part))
	return rand.New(rand.NewPCG(seed, h.Sum64()))
}

// canvas is a linear-ish float RGB working image in [0, 1].
type canvas struct {
	w, h int
	r    []float64 // 3 values per pixel
}

func (c *canvas) at(x, y int) []float64 { i := 3 * (y*c.w + x); return c.r[i : i+3] }

// blend mixes colour col into pixel (x, y) with weight a in [0, 1].
func (c *canvas) blend(x, y int, col [3]float64, a float64) {
	if a <= 0 {
		return
	}
	if a > 1 {
		a = 1
	}
	p := c.at(x, y)
	for k := 0; k < 3; k++ {
		p[k] = p[k]*(1-a) + col[k]*a
	}
}

// Generate draws one scene. Options are validated; an invalid option returns
// an error rather than a surprising picture.
func Generate(seed uint64, opts Options) (Scene, error) {
	size := opts.Size
	if size == 0 {
		size = 224
	}
	if size < 16 || size > 8192 {
		return Scene{}, fmt.Errorf("synth: size %d out of range [16, 8192]", size)
	}
	rates := opts.Rates
	if rates == nil {
		rates = DefaultRates()
	}
	known := map[string]bool{}
	for _, n := range Names() {
		known[n] = true
	}
	for n, r := range rates {
		if !known[n] {
			return Scene{}, fmt.Errorf("synth: unknown artefact %q (known: %v)", n, Names())
		}
		if r[0] < 0 || r[0] > 1 || r[1] < 0 || r[1] > 1 {
			return Scene{}, fmt.Errorf("synth: artefact %q rates %v outside [0, 1]", n, r)
		}
	}
	if opts.FixedLabel && opts.Label != 0 && opts.Label != 1 {
		return Scene{}, fmt.Errorf("synth: label %d is not 0 or 1", opts.Label)
	}

	top := stream(seed, "scene")
	label := top.IntN(2)
	if opts.FixedLabel {
		label = opts.Label
	}
	// One uniform per artefact, drawn in a fixed order whatever the rates, so
	// a scene's presence decisions shift monotonically with the rates.
	present := map[string]bool{}
	for _, n := range Names() {
		u := top.Float64()
		if r, ok := rates[n]; ok && u < r[label] {
			present[n] = true
		}
	}

	c := &canvas{w: size, h: size, r: make([]float64, 3*size*size)}
	s := float64(size) / 224 // scale from the nominal 224-pixel design
	drawSkin(c, stream(seed, "skin"))
	sc := Scene{Label: label, Artefacts: map[string][]bool{}}
	sc.Lesion, sc.Malignancy = drawLesion(c, stream(seed, "lesion"), label, s)
	for _, n := range Names() {
		if !present[n] {
			continue
		}
		r := stream(seed, "artefact:"+n)
		var m []bool
		switch n {
		case Hair:
			m = drawHair(c, r, s)
		case Ink:
			m = drawInk(c, r, s)
		case Ruler:
			m = drawRuler(c, r, s)
		case Bubbles:
			m = drawBubbles(c, r, s)
		case DarkCorners:
			m = drawDarkCorners(c, r, s)
		}
		sc.Artefacts[n] = m
	}
	sc.Image = c.toRGBA(stream(seed, "sensor"))
	return sc, nil
}

// toRGBA quantises to 8-bit sRGB-coded values with a little sensor noise.
func (c *canvas) toRGBA(r *rand.Rand) *image.RGBA {
	img := image.NewRGBA(image.Rect(0, 0, c.w, c.h))
	for y := 0; y < c.h; y++ {
		for x := 0; x < c.w; x++ {
			p := c.at(x, y)
			var q [3]uint8
			for k := 0; k < 3; k++ {
				v := p[k] + r.NormFloat64()*0.008
				q[k] = uint8(math.Round(255 * clamp01(v)))
			}
			img.SetRGBA(x, y, color.RGBA{q[0], q[1], q[2], 255})
		}
	}
	return img
}

func clamp01(v float64) float64 { return math.Max(0, math.Min(1, v)) }

func smoothstep(e0, e1, x float64) float64 {
	t := clamp01((x - e0) / (e1 - e0))
	return t * t * (3 - 2*t)
}

// valueNoise is fractal value noise in about [0, 1]: random values on a
// coarse lattice, smoothly interpolated, summed over octaves. Cheap and
// adequate for skin and pigment texture; it is not meant to be isotropic.
type valueNoise struct {
	octaves []lattice
}

type lattice struct {
	cell   float64
	n      int
	v      []float64
	weight float64
}

func newNoise(r *rand.Rand, size int, cell float64, octaves int) *valueNoise {
	vn := &valueNoise{}
	w, total := 1.0, 0.0
	for o := 0; o < octaves; o++ {
		cs := math.Max(cell/math.Pow(2, float64(o)), 1.5)
		n := int(float64(size)/cs) + 3
		l := lattice{cell: cs, n: n, v: make([]float64, n*n), weight: w}
		for i := range l.v {
			l.v[i] = r.Float64()
		}
		vn.octaves = append(vn.octaves, l)
		total += w
		w *= 0.5
	}
	for i := range vn.octaves {
		vn.octaves[i].weight /= total
	}
	return vn
}

func (vn *valueNoise) at(x, y float64) float64 {
	sum := 0.0
	for _, l := range vn.octaves {
		fx, fy := x/l.cell, y/l.cell
		ix, iy := int(fx), int(fy)
		tx, ty := fx-float64(ix), fy-float64(iy)
		tx, ty = tx*tx*(3-2*tx), ty*ty*(3-2*ty)
		ix, iy = min(ix, l.n-2), min(iy, l.n-2)
		v00 := l.v[iy*l.n+ix]
		v10 := l.v[iy*l.n+ix+1]
		v01 := l.v[(iy+1)*l.n+ix]
		v11 := l.v[(iy+1)*l.n+ix+1]
		a := v00 + (v10-v00)*tx
		b := v01 + (v11-v01)*tx
		sum += l.weight * (a + (b-a)*ty)
	}
	return sum
}

// drawSkin fills the canvas with a skin tone, a low-frequency luminance
// variation and faint reddish blotches (vascular tint).
func drawSkin(c *canvas, r *rand.Rand) {
	// Tones from light to medium skin under dermatoscope light; invented.
	tones := [][3]float64{{0.93, 0.76, 0.68}, {0.88, 0.68, 0.58}, {0.80, 0.60, 0.48}, {0.70, 0.50, 0.38}}
	a, b := tones[r.IntN(len(tones))], tones[r.IntN(len(tones))]
	t := r.Float64()
	var base [3]float64
	for k := range base {
		base[k] = a[k]*(1-t) + b[k]*t
	}
	lum := newNoise(r, c.w, float64(c.w)/3, 4)
	red := newNoise(r, c.w, float64(c.w)/5, 3)
	for y := 0; y < c.h; y++ {
		for x := 0; x < c.w; x++ {
			l := 0.88 + 0.24*lum.at(float64(x), float64(y))
			rd := smoothstep(0.55, 0.8, red.at(float64(x), float64(y))) * 0.045
			p := c.at(x, y)
			p[0] = base[0] * l
			p[1] = base[1]*l - rd
			p[2] = base[2]*l - rd*0.6
		}
	}
}

// drawLesion paints the lesion and returns its mask and the malignancy
// latent. The border is a radial function r(θ) = r0·(1 + Σ a_k cos(kθ+φ_k));
// class 1 draws the latent near 0.7 and class 0 near 0.3 (σ 0.15, so about
// 9 % of scenes fall on the wrong side of 0.5), and the latent scales the
// higher harmonics and the number and contrast of colour blotches.
func drawLesion(c *canvas, r *rand.Rand, label int, s float64) ([]bool, float64) {
	size := float64(c.w)
	mu := 0.3
	if label == 1 {
		mu = 0.7
	}
	m := clamp01(mu + 0.15*r.NormFloat64())
	cx := size/2 + size*0.05*r.NormFloat64()
	cy := size/2 + size*0.05*r.NormFloat64()
	r0 := size * (0.17 + 0.1*r.Float64())
	const nh = 12
	var amp, phase [nh + 1]float64
	amp[2] = 0.04 + 0.08*r.Float64() // every lesion is a little oval
	phase[2] = 2 * math.Pi * r.Float64()
	for k := 3; k <= nh; k++ {
		amp[k] = m * m * 0.22 * (0.3 + 0.7*r.Float64()) / math.Pow(float64(k), 0.55)
		phase[k] = 2 * math.Pi * r.Float64()
	}
	radius := func(th float64) float64 {
		v := 1.0
		for k := 2; k <= nh; k++ {
			v += amp[k] * math.Cos(float64(k)*th+phase[k])
		}
		return r0 * math.Max(v, 0.35)
	}
	// Pigment: a brown base, darker towards an off-centre core (more off
	// centre when malignant-like: asymmetry), and blotches of dark brown,
	// blue-grey and pink whose coverage grows with m.
	browns := [][3]float64{{0.55, 0.36, 0.24}, {0.45, 0.28, 0.18}, {0.62, 0.42, 0.28}}
	base := browns[r.IntN(len(browns))]
	core := [3]float64{0.28, 0.16, 0.10}
	dark := [3]float64{0.14, 0.09, 0.08}
	blue := [3]float64{0.42, 0.45, 0.55}
	pink := [3]float64{0.78, 0.48, 0.48}
	off := m * 0.35 * r0
	oa := 2 * math.Pi * r.Float64()
	kx, ky := cx+off*math.Cos(oa), cy+off*math.Sin(oa)
	tex := newNoise(r, c.w, r0/2, 3)
	nDark := newNoise(r, c.w, r0/2.5, 2)
	nBlue := newNoise(r, c.w, r0/2, 2)
	nPink := newNoise(r, c.w, r0/2, 2)
	edge := math.Max(1.2, 2.5*s) * (1.6 - m) // benign-like borders fade more gently
	mask := make([]bool, c.w*c.h)
	for y := 0; y < c.h; y++ {
		for x := 0; x < c.w; x++ {
			fx, fy := float64(x)+0.5, float64(y)+0.5
			dx, dy := fx-cx, fy-cy
			rho := math.Hypot(dx, dy)
			R := radius(math.Atan2(dy, dx))
			if rho < R {
				mask[y*c.w+x] = true
			}
			alpha := smoothstep(-edge, edge, R-rho)
			if alpha <= 0 {
				continue
			}
			col := base
			kd := math.Hypot(fx-kx, fy-ky) / R
			cw := (1 - smoothstep(0.0, 0.9, kd)) * 0.7
			for k := range col {
				col[k] = col[k]*(1-cw) + core[k]*cw
			}
			t := 0.85 + 0.3*tex.at(fx, fy)
			for k := range col {
				col[k] *= t
			}
			thr := 0.72 - 0.22*m
			if w := smoothstep(thr, thr+0.06, nDark.at(fx, fy)) * m; w > 0 {
				col = mix(col, dark, w)
			}
			if w := smoothstep(thr+0.04, thr+0.1, nBlue.at(fx, fy)) * smoothstep(0.4, 0.8, m); w > 0 {
				col = mix(col, blue, 0.6*w)
			}
			if w := smoothstep(thr+0.04, thr+0.1, nPink.at(fx, fy)) * smoothstep(0.45, 0.85, m); w > 0 {
				col = mix(col, pink, 0.45*w)
			}
			c.blend(x, y, col, alpha*(0.75+0.25*smoothstep(0, 0.4*R, R-rho)))
		}
	}
	return mask, m
}

func mix(a, b [3]float64, t float64) [3]float64 {
	for k := range a {
		a[k] = a[k]*(1-t) + b[k]*t
	}
	return a
}

// stroke draws a polyline of the given half-width with antialiased edges,
// blending col with opacity op, and marks pixels with coverage ≥ 0.3.
func stroke(c *canvas, pts [][2]float64, half float64, col [3]float64, op float64, mask []bool) {
	for i := 0; i+1 < len(pts); i++ {
		a, b := pts[i], pts[i+1]
		x0 := int(math.Floor(math.Min(a[0], b[0]) - half - 1))
		x1 := int(math.Ceil(math.Max(a[0], b[0]) + half + 1))
		y0 := int(math.Floor(math.Min(a[1], b[1]) - half - 1))
		y1 := int(math.Ceil(math.Max(a[1], b[1]) + half + 1))
		for y := max(y0, 0); y <= min(y1, c.h-1); y++ {
			for x := max(x0, 0); x <= min(x1, c.w-1); x++ {
				d := segDist(float64(x)+0.5, float64(y)+0.5, a, b)
				cov := clamp01(half + 0.5 - d)
				if cov <= 0 {
					continue
				}
				i := y*c.w + x
				// Overlapping segments must not darken twice: keep the
				// strongest coverage by tracking it in the mask pass.
				if mask[i] && cov < 0.99 {
					continue
				}
				c.blend(x, y, col, cov*op)
				if cov >= 0.3 {
					mask[i] = true
				}
			}
		}
	}
}

func segDist(px, py float64, a, b [2]float64) float64 {
	vx, vy := b[0]-a[0], b[1]-a[1]
	wx, wy := px-a[0], py-a[1]
	l2 := vx*vx + vy*vy
	t := 0.0
	if l2 > 0 {
		t = clamp01((wx*vx + wy*vy) / l2)
	}
	return math.Hypot(wx-t*vx, wy-t*vy)
}

// bezier samples a quadratic Bézier curve into a polyline.
func bezier(p0, p1, p2 [2]float64, n int) [][2]float64 {
	pts := make([][2]float64, n+1)
	for i := 0; i <= n; i++ {
		t := float64(i) / float64(n)
		u := 1 - t
		pts[i] = [2]float64{u*u*p0[0] + 2*u*t*p1[0] + t*t*p2[0], u*u*p0[1] + 2*u*t*p1[1] + t*t*p2[1]}
	}
	return pts
}

// drawHair draws 2–9 thin dark curved hairs, often crossing the lesion.
func drawHair(c *canvas, r *rand.Rand, s float64) []bool {
	size := float64(c.w)
	mask := make([]bool, c.w*c.h)
	n := 2 + r.IntN(8)
	for i := 0; i < n; i++ {
		p0 := [2]float64{size * r.Float64(), size * r.Float64()}
		ang := 2 * math.Pi * r.Float64()
		length := size * (0.3 + 0.6*r.Float64())
		p2 := [2]float64{p0[0] + length*math.Cos(ang), p0[1] + length*math.Sin(ang)}
		bend := length * 0.3 * r.NormFloat64()
		mid := [2]float64{(p0[0]+p2[0])/2 - bend*math.Sin(ang), (p0[1]+p2[1])/2 + bend*math.Cos(ang)}
		half := math.Max(0.45, (0.6+0.5*r.Float64())*s)
		shade := 0.05 + 0.15*r.Float64()
		col := [3]float64{shade * 1.2, shade, shade * 0.8}
		stroke(c, bezier(p0, mid, p2, 40), half, col, 0.95, mask)
	}
	return mask
}

// drawInk draws surgical-marker style violet strokes or dots around the
// lesion (markers are used to outline a lesion before excision).
func drawInk(c *canvas, r *rand.Rand, s float64) []bool {
	size := float64(c.w)
	mask := make([]bool, c.w*c.h)
	col := [3]float64{0.35 + 0.15*r.Float64(), 0.18, 0.45 + 0.2*r.Float64()}
	half := math.Max(0.9, (1.8+1.5*r.Float64())*s)
	if r.IntN(3) == 0 {
		// A ring of dots at the lesion periphery.
		n := 4 + r.IntN(6)
		rad := size * (0.3 + 0.1*r.Float64())
		a0 := 2 * math.Pi * r.Float64()
		for i := 0; i < n; i++ {
			a := a0 + 2*math.Pi*float64(i)/float64(n) + 0.2*r.NormFloat64()
			p := [2]float64{size/2 + rad*math.Cos(a), size/2 + rad*math.Sin(a)}
			stroke(c, [][2]float64{p, {p[0] + 0.1, p[1]}}, half*1.3, col, 0.85, mask)
		}
		return mask
	}
	n := 1 + r.IntN(3)
	for i := 0; i < n; i++ {
		a := 2 * math.Pi * r.Float64()
		rad := size * (0.3 + 0.12*r.Float64())
		span := 0.5 + 1.2*r.Float64()
		p0 := [2]float64{size/2 + rad*math.Cos(a), size/2 + rad*math.Sin(a)}
		p2 := [2]float64{size/2 + rad*math.Cos(a+span), size/2 + rad*math.Sin(a+span)}
		mid := [2]float64{size/2 + 1.25*rad*math.Cos(a+span/2), size/2 + 1.25*rad*math.Sin(a+span/2)}
		stroke(c, bezier(p0, mid, p2, 30), half, col, 0.85, mask)
	}
	return mask
}

// drawRuler draws a scale bar with tick marks (every fifth one longer)
// along one image edge.
func drawRuler(c *canvas, r *rand.Rand, s float64) []bool {
	size := float64(c.w)
	mask := make([]bool, c.w*c.h)
	col := [3]float64{0.06, 0.06, 0.07}
	if r.IntN(4) == 0 {
		col = [3]float64{0.96, 0.96, 0.94}
	}
	half := math.Max(0.5, 0.8*s)
	inset := size * (0.05 + 0.06*r.Float64())
	start := size * (0.05 + 0.2*r.Float64())
	end := size - size*(0.05+0.2*r.Float64())
	spacing := math.Max(3.2, 7*s)
	tick := math.Max(2.5, 6*s)
	side := r.IntN(4)
	// Work in (u along the edge, v into the image) and map to pixels.
	pt := func(u, v float64) [2]float64 {
		switch side {
		case 0: // top
			return [2]float64{u, v}
		case 1: // bottom
			return [2]float64{u, size - v}
		case 2: // left
			return [2]float64{v, u}
		default: // right
			return [2]float64{size - v, u}
		}
	}
	stroke(c, [][2]float64{pt(start, inset), pt(end, inset)}, half, col, 0.95, mask)
	for i := 0; ; i++ {
		u := start + float64(i)*spacing
		if u > end {
			break
		}
		l := tick
		if i%5 == 0 {
			l = 2 * tick
		}
		stroke(c, [][2]float64{pt(u, inset), pt(u, inset+l)}, half, col, 0.95, mask)
	}
	return mask
}

// drawBubbles draws gel/immersion-fluid bubbles: a slightly brighter disc
// with a bright rim, a thin darker outer edge and a specular spot.
func drawBubbles(c *canvas, r *rand.Rand, s float64) []bool {
	size := float64(c.w)
	mask := make([]bool, c.w*c.h)
	n := 1 + r.IntN(5)
	white := [3]float64{1, 1, 1}
	grey := [3]float64{0.3, 0.3, 0.32}
	rim := math.Max(0.8, 1.4*s)
	for i := 0; i < n; i++ {
		rad := math.Max(2.5, size*(0.02+0.06*r.Float64()))
		cx, cy := size*r.Float64(), size*r.Float64()
		for y := max(0, int(cy-rad-3)); y <= min(c.h-1, int(cy+rad+3)); y++ {
			for x := max(0, int(cx-rad-3)); x <= min(c.w-1, int(cx+rad+3)); x++ {
				d := math.Hypot(float64(x)+0.5-cx, float64(y)+0.5-cy)
				if d > rad+1.5 {
					continue
				}
				if d <= rad+0.5 {
					mask[y*c.w+x] = true
				}
				c.blend(x, y, white, 0.12*(1-smoothstep(rad-0.5, rad+0.5, d)))
				c.blend(x, y, white, 0.75*clamp01(rim/2+0.5-math.Abs(d-(rad-rim/2))))
				c.blend(x, y, grey, 0.35*clamp01(1-math.Abs(d-(rad+0.6))))
				sd := math.Hypot(float64(x)+0.5-(cx-0.4*rad), float64(y)+0.5-(cy-0.4*rad))
				c.blend(x, y, white, 0.8*clamp01(0.18*rad+0.5-sd))
			}
		}
	}
	return mask
}

// drawDarkCorners darkens everything outside the round field of view of a
// contact dermatoscope. The mask holds pixels at least half darkened.
func drawDarkCorners(c *canvas, r *rand.Rand, s float64) []bool {
	size := float64(c.w)
	mask := make([]bool, c.w*c.h)
	R := size * (0.5 + 0.14*r.Float64())
	cx := size/2 + size*0.03*r.NormFloat64()
	cy := size/2 + size*0.03*r.NormFloat64()
	w := size * (0.015 + 0.03*r.Float64())
	black := [3]float64{0.02, 0.02, 0.02}
	for y := 0; y < c.h; y++ {
		for x := 0; x < c.w; x++ {
			d := smoothstep(R-w, R+w, math.Hypot(float64(x)+0.5-cx, float64(y)+0.5-cy))
			c.blend(x, y, black, d)
			if d >= 0.5 {
				mask[y*c.w+x] = true
			}
		}
	}
	return mask
}
