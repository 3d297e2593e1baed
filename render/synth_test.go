package render

import (
	"image"
	"image/color"
	"math"
)

// synthCase builds an invented dermoscopy-like test scene (no real image):
// a skin-toned field with a brown ellipse as the "lesion", a ruler strip
// and an ink arc as artefacts, a map peaking on the lesion with a spill onto
// the ruler, and an unseen band on the left as if the model's crop cut it.
type synthCase struct {
	img       *image.RGBA
	w, h      int
	lesion    []bool
	artefacts map[string][]bool
	values    []float32 // unsigned
	signed    []float32
	seen      []bool
	boxes     []image.Rectangle
}

func newSynth(w, h int) *synthCase {
	s := &synthCase{img: image.NewRGBA(image.Rect(0, 0, w, h)), w: w, h: h,
		lesion: make([]bool, w*h), values: make([]float32, w*h), signed: make([]float32, w*h),
		seen: make([]bool, w*h), artefacts: map[string][]bool{"ruler": make([]bool, w*h), "ink": make([]bool, w*h)}}
	cx, cy := 0.52*float64(w), 0.45*float64(h)
	rx, ry := 0.24*float64(w), 0.19*float64(h)
	for y := 0; y < h; y++ {
		for x := 0; x < w; x++ {
			i := y*w + x
			fx, fy := float64(x), float64(y)
			d := math.Hypot((fx-cx)/rx, (fy-cy)/ry)
			// Skin-like field with a soft vignette.
			v := 1 - 0.25*math.Hypot(fx/float64(w)-0.5, fy/float64(h)-0.5)
			c := color.RGBA{uint8(222 * v), uint8(176 * v), uint8(150 * v), 255}
			if d < 1 {
				s.lesion[i] = true
				k := 0.55 + 0.3*d
				c = color.RGBA{uint8(120 * k), uint8(74 * k), uint8(52 * k), 255}
			}
			if fy > 0.86*float64(h) && fy < 0.95*float64(h) && fx > 0.2*float64(w) && fx < 0.9*float64(w) {
				s.artefacts["ruler"][i] = true
				c = color.RGBA{235, 235, 228, 255}
				if x%8 == 0 {
					c = color.RGBA{30, 30, 30, 255}
				}
			}
			ink := math.Hypot(fx-0.82*float64(w), fy-0.2*float64(h))
			if ink > 0.08*float64(w) && ink < 0.11*float64(w) && fy < 0.26*float64(h) {
				s.artefacts["ink"][i] = true
				c = color.RGBA{92, 60, 150, 255}
			}
			s.img.SetRGBA(x, y, c)
			g := math.Exp(-0.5 * (math.Pow((fx-cx*1.05)/(0.6*rx), 2) + math.Pow((fy-cy)/(0.6*ry), 2)))
			r := math.Exp(-0.5 * (math.Pow((fx-0.7*float64(w))/(0.08*float64(w)), 2) + math.Pow((fy-0.9*float64(h))/(0.05*float64(h)), 2)))
			s.values[i] = float32(g + 0.6*r)
			s.signed[i] = float32(g - 0.7*r)
			s.seen[i] = x >= w/14
		}
	}
	s.boxes = []image.Rectangle{
		image.Rect(int(cx-0.4*rx), int(cy-0.5*ry), int(cx+0.6*rx), int(cy+0.5*ry)),
		image.Rect(int(0.62*float64(w)), int(0.84*float64(h)), int(0.78*float64(w)), int(0.96*float64(h))),
	}
	return s
}

func (s *synthCase) scene(signed bool) Scene {
	m := Metrics{InsideMass: 0.634, RankAccuracy: 0.552, Pointing: PointingHit, OffLesion: 0.121, OffLesionBox: 2}
	a := Attribution{Values: s.values, Seen: s.seen, HotRegions: s.boxes}
	method := "Grad-CAM"
	if signed {
		a.Values, a.Signed = s.signed, true
		method = "Integrated gradients"
	}
	return Scene{Image: s.img, Map: a, Lesion: s.lesion, Artefacts: s.artefacts,
		Caption: Caption{Method: method, Target: "melanoma", ScoreKind: "logit", Score: 3.417, Metrics: m}}
}

// synthPanel builds a case with n invented method views.
func (s *synthCase) panel(n int) Case {
	names := []string{"Occlusion sensitivity", "Gradient", "Gradient \u00d7 input", "Integrated gradients", "SmoothGrad", "Grad-CAM", "RISE"}
	c := Case{ID: "synthetic-0007", TrueClass: "melanoma", PredictedClass: "naevus", ScoreKind: "probability", Score: 0.712,
		Image: s.img, Lesion: s.lesion, Artefacts: s.artefacts}
	for i := 0; i < n; i++ {
		a := Attribution{Values: s.values, Seen: s.seen, HotRegions: s.boxes}
		if i%3 == 1 {
			a.Values, a.Signed = s.signed, true
		}
		m := Metrics{InsideMass: 0.5 + 0.05*float64(i), RankAccuracy: 0.4 + 0.03*float64(i), Pointing: PointingHit, OffLesion: 0.12, OffLesionBox: 2}
		if i == 2 {
			m = NoMetrics()
			m.InsideMassUndefined = "no positive attribution"
			m.Pointing = PointingMiss
		}
		c.Methods = append(c.Methods, MethodView{Name: names[i%len(names)], Map: a, Metrics: m})
	}
	return c
}
