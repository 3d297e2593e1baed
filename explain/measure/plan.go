package measure

import (
	"errors"
	"fmt"
	"math"
	"slices"
	"sort"

	"heedmap/explain"
)

// Masks are one image's masks carried to model-input space: W·H booleans,
// row-major, the same grid as the attribution maps.
type Masks struct {
	W, H   int
	Lesion []bool
	// Seen marks pixels that came from the original image (not padding
	// added by letterboxing). nil means every pixel was seen. Lesion and
	// artefact pixels outside Seen are ignored. Relevance on unseen pixels
	// still counts in Σ A⁺ (the model did see the padding) and falls in the
	// band or far background.
	Seen []bool
	// Artefacts maps a category name (ruler, ink, hair, ...) to its mask.
	Artefacts map[string][]bool
	// SourceLesionPixels is the lesion's pixel count in the original mask
	// before it was carried to model space, or 0 when unknown. It lets the
	// plan tell "the lesion was cropped away" from "the mask is empty".
	SourceLesionPixels int
	// LesionUnseen is the fraction of the source mask's lesion pixels that
	// the model never saw (cropped away by the resize), computed by the
	// caller from the image's geometry (preprocess.Placement.UnseenFraction).
	// The zero Value means "not supplied": the result then says so, unless
	// the plan can tell by itself (all of the lesion unseen, or no lesion).
	LesionUnseen Value
}

// Params are the measurement choices. Start from [DefaultParams].
type Params struct {
	// PointingTolerance224 is the pointing-game tolerance in pixels per 224
	// pixels of the shorter model-input side; the tolerance used is
	// PointingTolerance224 · min(W, H) / 224. Zhang et al. used 15 px
	// (value from memory; see /work/shared/sources.md) at an input size of
	// about 224, so 15 keeps the same fraction of the image at any size.
	PointingTolerance224 float64
	// BandFraction is the peri-lesional band width as a fraction of the
	// lesion's equivalent diameter 2·sqrt(area/π). Our default 0.25 is a
	// stated choice, not a published value.
	BandFraction float64
	// HotFraction is q: the share of pixels with the highest relevance that
	// can form off-lesion hot regions. Default 0.05 (our choice).
	HotFraction float64
}

// DefaultParams returns tolerance 15 px per 224 px, band 0.25 of the
// equivalent diameter and hot fraction 5 %.
func DefaultParams() Params {
	return Params{PointingTolerance224: 15, BandFraction: 0.25, HotFraction: 0.05}
}

func (p Params) validate() error {
	switch {
	case !(p.PointingTolerance224 >= 0) || math.IsInf(p.PointingTolerance224, 0):
		return fmt.Errorf("measure: pointing tolerance %v px per 224 px must be finite and ≥ 0", p.PointingTolerance224)
	case !(p.BandFraction >= 0) || math.IsInf(p.BandFraction, 0):
		return fmt.Errorf("measure: band fraction %v must be finite and ≥ 0", p.BandFraction)
	case !(p.HotFraction > 0 && p.HotFraction <= 1):
		return fmt.Errorf("measure: hot fraction %v must be in (0, 1]", p.HotFraction)
	}
	return nil
}

// Plan holds everything about one image's masks that does not depend on the
// attribution map: the distance transform of the lesion and the regions
// derived from it. Build it once per image with [NewPlan] and call
// [Plan.Measure] for every method.
type Plan struct {
	w, h      int
	params    Params
	lesion    []bool // Lesion ∧ Seen
	lesionN   int
	near      []bool // within the pointing tolerance of the lesion (lesion included)
	band      []bool // 0 < distance ≤ bandWidth
	far       []bool // distance > bandWidth
	tolPx     float64
	bandPx    float64
	noLesion  string // reason lesion measures are undefined, "" when they are defined
	unseen    Value  // fraction of the source lesion the model never saw
	artefacts []artefact
}

type artefact struct {
	name   string
	mask   []bool
	pixels int
}

// NewPlan validates the masks and precomputes the lesion regions. Masks of
// the wrong size are an error; an empty lesion is not (its measures come out
// undefined with a reason).
func NewPlan(m Masks, p Params) (*Plan, error) {
	if err := p.validate(); err != nil {
		return nil, err
	}
	if m.W <= 0 || m.H <= 0 {
		return nil, fmt.Errorf("measure: mask grid %d×%d is empty", m.W, m.H)
	}
	n := m.W * m.H
	if len(m.Lesion) != n {
		return nil, fmt.Errorf("measure: lesion mask has %d pixels, want %d×%d = %d", len(m.Lesion), m.W, m.H, n)
	}
	if m.Seen != nil && len(m.Seen) != n {
		return nil, fmt.Errorf("measure: seen mask has %d pixels, want %d", len(m.Seen), n)
	}
	seen := func(i int) bool { return m.Seen == nil || m.Seen[i] }
	pl := &Plan{w: m.W, h: m.H, params: p, lesion: make([]bool, n)}
	for i, b := range m.Lesion {
		if b && seen(i) {
			pl.lesion[i] = true
			pl.lesionN++
		}
	}
	names := make([]string, 0, len(m.Artefacts))
	for k := range m.Artefacts {
		names = append(names, k)
	}
	sort.Strings(names)
	for _, k := range names {
		a := m.Artefacts[k]
		if len(a) != n {
			return nil, fmt.Errorf("measure: artefact mask %q has %d pixels, want %d", k, len(a), n)
		}
		am := artefact{name: k, mask: make([]bool, n)}
		for i, b := range a {
			if b && seen(i) {
				am.mask[i] = true
				am.pixels++
			}
		}
		pl.artefacts = append(pl.artefacts, am)
	}
	pl.tolPx = p.PointingTolerance224 * float64(min(m.W, m.H)) / 224
	switch {
	case pl.lesionN > 0:
	case m.SourceLesionPixels > 0:
		pl.noLesion = fmt.Sprintf("lesion (%d px in the source mask) lies entirely outside the region the model saw", m.SourceLesionPixels)
	default:
		pl.noLesion = "lesion mask is empty"
	}
	switch v, ok := m.LesionUnseen.Float(); {
	case ok && (v < 0 || v > 1):
		return nil, fmt.Errorf("measure: unseen lesion fraction %v is outside [0, 1]", v)
	case m.SourceLesionPixels > 0 && pl.lesionN == 0:
		pl.unseen = Num(1)
	case ok:
		pl.unseen = m.LesionUnseen
	case m.SourceLesionPixels == 0 && pl.lesionN == 0:
		pl.unseen = Undef("lesion mask is empty")
	case m.LesionUnseen.Reason != "":
		pl.unseen = m.LesionUnseen
	default:
		pl.unseen = Undef("not measured: the caller gave no image geometry")
	}
	if pl.noLesion != "" {
		return pl, nil
	}
	pl.bandPx = p.BandFraction * 2 * math.Sqrt(float64(pl.lesionN)/math.Pi)
	d2 := squaredEDT(pl.lesion, m.W, m.H)
	pl.near = make([]bool, n)
	pl.band = make([]bool, n)
	pl.far = make([]bool, n)
	t2, b2 := pl.tolPx*pl.tolPx, pl.bandPx*pl.bandPx
	for i, d := range d2 {
		pl.near[i] = d <= t2
		switch {
		case d == 0:
		case d <= b2:
			pl.band[i] = true
		default:
			pl.far[i] = true
		}
	}
	return pl, nil
}

// TolerancePx is the pointing-game tolerance used, in model-input pixels.
func (pl *Plan) TolerancePx() float64 { return pl.tolPx }

// BandWidthPx is the peri-lesional band width in model-input pixels (0 when
// the lesion is empty).
func (pl *Plan) BandWidthPx() float64 { return pl.bandPx }

// LesionPixels is the lesion area in model-input pixels, seen part only.
func (pl *Plan) LesionPixels() int { return pl.lesionN }

// LesionUnseen is the fraction of the source lesion the model never saw.
func (pl *Plan) LesionUnseen() Value { return pl.unseen }

// Result is one image × method.
type Result struct {
	Method string `json:"method"`
	Sign   Sign   `json:"sign"`
	// Undefined is non-empty when the map itself is unusable (non-finite
	// values, no positive relevance); every Value then carries the reason.
	Undefined string `json:"undefined,omitempty"`

	// InsideMass = Σ A⁺·M / Σ A⁺ (relevance mass accuracy, Arras et al.
	// 2022), a fraction in [0, 1].
	InsideMass Value `json:"inside_mass"`
	// RankAccuracy = |top-K ∩ M| / K, K = |M| (Arras et al. 2022). Ties at
	// the K-th value are counted fractionally: a tied pixel contributes the
	// share of tied pixels inside M, which is the expectation under a random
	// tie-break and does not depend on pixel order.
	RankAccuracy Value `json:"rank_accuracy"`
	// PointingHit is 1 (hit) or 0 (miss): the maximum of A⁺ lies within
	// TolerancePx of the lesion (Zhang et al. 2016). With tied maxima it is a
	// hit when more than half of them lie within the tolerance.
	PointingHit Value `json:"pointing_hit"`
	PeakX       int   `json:"peak_x"` // first maximum in row-major order
	PeakY       int   `json:"peak_y"`
	PeakTies    int   `json:"peak_ties"` // number of pixels at the maximum
	// BandMass and FarMass are the fractions of Σ A⁺ in the peri-lesional
	// band and beyond it; InsideMass + BandMass + FarMass = 1.
	BandMass Value `json:"band_mass"`
	FarMass  Value `json:"far_mass"`
	// ArtefactMass is the fraction of Σ A⁺ on each artefact category's
	// mask. Categories may overlap each other and the lesion.
	ArtefactMass   map[string]Value `json:"artefact_mass"`
	ArtefactPixels map[string]int   `json:"artefact_pixels"`
	// HotThreshold is the relevance value at the top-q cut; HotRegions are
	// the 8-connected components of pixels at or above it (and > 0) in the
	// far background, by descending mass.
	HotThreshold Value    `json:"hot_threshold"`
	HotRegions   []Region `json:"hot_regions"`

	LesionPixels int `json:"lesion_px"`
	// LesionUnseen is the fraction (0–1) of the lesion in the source mask
	// that the model never saw because the resize cropped it away; the
	// lesion measures describe only the seen part.
	LesionUnseen Value   `json:"lesion_unseen_fraction"`
	TolerancePx  float64 `json:"pointing_tolerance_px"`
	BandWidthPx  float64 `json:"band_width_px"`
}

// Region is one off-lesion hot region. The bounding box is inclusive:
// columns X0..X1, rows Y0..Y1.
type Region struct {
	AreaPx       int     `json:"area_px"`
	AreaFraction float64 `json:"area_fraction"` // of all W·H pixels
	X0           int     `json:"x0"`
	Y0           int     `json:"y0"`
	X1           int     `json:"x1"`
	Y1           int     `json:"y1"`
	Mass         float64 `json:"mass"` // fraction of Σ A⁺
	Peak         float64 `json:"peak"` // largest A⁺ in the region
}

// Measure scores one method's map; the sign convention comes from
// [SignFor]. A map of the wrong size or an unknown method is an error; an
// unusable map yields a Result whose values are undefined with the reason.
func (pl *Plan) Measure(method string, m explain.Map) (Result, error) {
	s, err := SignFor(method)
	if err != nil {
		return Result{}, err
	}
	return pl.MeasureSign(method, s, m)
}

// MeasureSign is Measure with an explicit sign convention.
func (pl *Plan) MeasureSign(method string, s Sign, m explain.Map) (Result, error) {
	if s != Positive && s != Absolute {
		return Result{}, fmt.Errorf("measure: %s: invalid sign convention %v", method, s)
	}
	if m.W != pl.w || m.H != pl.h || len(m.Data) != pl.w*pl.h {
		return Result{}, fmt.Errorf("measure: %s: map is %d×%d with %d values, masks are %d×%d", method, m.W, m.H, len(m.Data), pl.w, pl.h)
	}
	r := Result{
		Method: method, Sign: s, LesionPixels: pl.lesionN, LesionUnseen: pl.unseen,
		TolerancePx: pl.tolPx, BandWidthPx: pl.bandPx,
		ArtefactMass: map[string]Value{}, ArtefactPixels: map[string]int{},
	}
	for _, a := range pl.artefacts {
		r.ArtefactPixels[a.name] = a.pixels
	}
	n := len(m.Data)
	a := make([]float64, n)
	total := 0.0
	for i, x := range m.Data {
		if math.IsNaN(float64(x)) || math.IsInf(float64(x), 0) {
			r.setAllUndefined(pl, fmt.Sprintf("map has a non-finite value %v at x=%d y=%d", x, i%pl.w, i/pl.w))
			return r, nil
		}
		a[i] = s.apply(x)
		total += a[i]
	}
	if !(total > 0) {
		r.setAllUndefined(pl, fmt.Sprintf("map has no relevance left after taking the %s (all zero)", s))
		return r, nil
	}
	for _, am := range pl.artefacts {
		if am.pixels == 0 {
			r.ArtefactMass[am.name] = Undef("artefact mask is empty")
			continue
		}
		r.ArtefactMass[am.name] = Num(maskedSum(a, am.mask) / total)
	}
	// The peak is reported even when the lesion is missing.
	mx, ties, first := -1.0, 0, 0
	for i, v := range a {
		switch {
		case v > mx:
			mx, ties, first = v, 1, i
		case v == mx:
			ties++
		}
	}
	r.PeakX, r.PeakY, r.PeakTies = first%pl.w, first/pl.w, ties
	if pl.noLesion != "" {
		for _, v := range []*Value{&r.InsideMass, &r.RankAccuracy, &r.PointingHit, &r.BandMass, &r.FarMass, &r.HotThreshold} {
			*v = Undef(pl.noLesion)
		}
		return r, nil
	}
	r.InsideMass = Num(maskedSum(a, pl.lesion) / total)
	r.BandMass = Num(maskedSum(a, pl.band) / total)
	r.FarMass = Num(maskedSum(a, pl.far) / total)

	// One ascending sort serves both cuts: the K-th largest value is
	// asc[n−K].
	asc := append([]float64(nil), a...)
	slices.Sort(asc)
	r.RankAccuracy = Num(rankAccuracy(a, pl.lesion, pl.lesionN, asc[n-pl.lesionN]))

	near := 0
	for i, v := range a {
		if v == mx && pl.near[i] {
			near++
		}
	}
	if 2*near > ties {
		r.PointingHit = Num(1)
	} else {
		r.PointingHit = Num(0)
	}

	k := int(math.Ceil(pl.params.HotFraction * float64(n)))
	t := asc[n-max(k, 1)]
	r.HotThreshold = Num(t)
	r.HotRegions = hotRegions(a, pl.far, t, total, pl.w, pl.h)
	return r, nil
}

func (r *Result) setAllUndefined(pl *Plan, reason string) {
	r.Undefined = reason
	for _, v := range []*Value{&r.InsideMass, &r.RankAccuracy, &r.PointingHit, &r.BandMass, &r.FarMass, &r.HotThreshold} {
		*v = Undef(reason)
	}
	for _, am := range pl.artefacts {
		r.ArtefactMass[am.name] = Undef(reason)
	}
}

func maskedSum(a []float64, m []bool) float64 {
	s := 0.0
	for i, b := range m {
		if b {
			s += a[i]
		}
	}
	return s
}

// rankAccuracy counts lesion pixels among the top K, where t is the K-th
// largest value; pixels tied at t share the remaining places in proportion.
func rankAccuracy(a []float64, lesion []bool, k int, t float64) float64 {
	above, aboveIn, tied, tiedIn := 0, 0, 0, 0
	for i, v := range a {
		switch {
		case v > t:
			above++
			if lesion[i] {
				aboveIn++
			}
		case v == t:
			tied++
			if lesion[i] {
				tiedIn++
			}
		}
	}
	hits := float64(aboveIn) + float64(k-above)*float64(tiedIn)/float64(tied)
	return hits / float64(k)
}

// hotRegions labels 8-connected components (a pixel touches its eight
// neighbours, so diagonal chains stay one region) of pixels with a ≥ t,
// a > 0 inside region.
func hotRegions(a []float64, region []bool, t, total float64, w, h int) []Region {
	hot := func(i int) bool { return region[i] && a[i] > 0 && a[i] >= t }
	visited := make([]bool, len(a))
	var out []Region
	var stack []int
	for start := range a {
		if visited[start] || !hot(start) {
			continue
		}
		visited[start] = true
		stack = append(stack[:0], start)
		rg := Region{X0: w, Y0: h, X1: -1, Y1: -1}
		mass := 0.0
		for len(stack) > 0 {
			i := stack[len(stack)-1]
			stack = stack[:len(stack)-1]
			x, y := i%w, i/w
			rg.AreaPx++
			mass += a[i]
			rg.Peak = max(rg.Peak, a[i])
			rg.X0, rg.X1 = min(rg.X0, x), max(rg.X1, x)
			rg.Y0, rg.Y1 = min(rg.Y0, y), max(rg.Y1, y)
			for dy := -1; dy <= 1; dy++ {
				for dx := -1; dx <= 1; dx++ {
					nx, ny := x+dx, y+dy
					if nx < 0 || ny < 0 || nx >= w || ny >= h {
						continue
					}
					j := ny*w + nx
					if !visited[j] && hot(j) {
						visited[j] = true
						stack = append(stack, j)
					}
				}
			}
		}
		rg.Mass = mass / total
		rg.AreaFraction = float64(rg.AreaPx) / float64(len(a))
		out = append(out, rg)
	}
	sort.SliceStable(out, func(i, j int) bool {
		if out[i].Mass != out[j].Mass {
			return out[i].Mass > out[j].Mass
		}
		return out[i].AreaPx > out[j].AreaPx
	})
	return out
}

// MarshalText encodes the sign as "positive-part" or "absolute-value".
func (s Sign) MarshalText() ([]byte, error) {
	if s != Positive && s != Absolute {
		return nil, errors.New("measure: invalid sign")
	}
	return []byte(s.String()), nil
}

// UnmarshalText is the inverse of MarshalText.
func (s *Sign) UnmarshalText(b []byte) error {
	switch string(b) {
	case "positive-part":
		*s = Positive
	case "absolute-value":
		*s = Absolute
	default:
		return fmt.Errorf("measure: unknown sign convention %q", b)
	}
	return nil
}
