package measure

import (
	"context"
	"fmt"
	"hash/fnv"

	"sort"
)

// Image is one image's measurements as the summary needs them.
type Image struct {
	ID        string   `json:"id"`
	TrueClass string   `json:"true_class,omitempty"` // "" when the label is unknown
	PredClass string   `json:"pred_class"`
	Score     float64  `json:"score"` // model score of the explained class (probability)
	Results   []Result `json:"results"`
}

// Correctness is "correct", "incorrect" or "unknown" (no true label).
func (im *Image) Correctness() string {
	switch {
	case im.TrueClass == "":
		return "unknown"
	case im.TrueClass == im.PredClass:
		return "correct"
	}
	return "incorrect"
}

// ArtefactsPresent lists, sorted, the categories whose mask has pixels in
// any of the image's results.
func (im *Image) ArtefactsPresent() []string {
	set := map[string]bool{}
	for _, r := range im.Results {
		for k, n := range r.ArtefactPixels {
			if n > 0 {
				set[k] = true
			}
		}
	}
	out := make([]string, 0, len(set))
	for k := range set {
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}

// Result returns the image's result for a method.
func (im *Image) Result(method string) (*Result, bool) {
	for i := range im.Results {
		if im.Results[i].Method == method {
			return &im.Results[i], true
		}
	}
	return nil, false
}

// SummaryOptions are the dataset-level choices. Start from
// [DefaultSummaryOptions].
type SummaryOptions struct {
	// Primary is the method whose numbers decide the flagged list; "" picks
	// the first method of the first image.
	Primary string `json:"primary" yaml:"primary"`
	// InsideThreshold flags an image whose inside mass is below it
	// (default 0.5: less than half the positive evidence on the lesion).
	InsideThreshold float64 `json:"inside_threshold" yaml:"inside_threshold"`
	// ArtefactThreshold flags an image with more than this fraction of
	// evidence on any one artefact category (default 0.2);
	// ArtefactThresholds overrides it per category.
	ArtefactThreshold  float64            `json:"artefact_threshold" yaml:"artefact_threshold"`
	ArtefactThresholds map[string]float64 `json:"artefact_thresholds,omitempty" yaml:"artefact_thresholds"`
	// Resamples and Seed drive the percentile bootstrap (default 2000, 1).
	Resamples int    `json:"bootstrap_resamples" yaml:"bootstrap_resamples"`
	Seed      uint64 `json:"bootstrap_seed" yaml:"bootstrap_seed"`
	// Z is the normal quantile for the Wilson intervals (default Z95).
	Z float64 `json:"wilson_z" yaml:"wilson_z"`
}

// DefaultSummaryOptions: thresholds 0.5 and 0.2, 2000 resamples, seed 1,
// 95 % intervals.
func DefaultSummaryOptions() SummaryOptions {
	return SummaryOptions{InsideThreshold: 0.5, ArtefactThreshold: 0.2, Resamples: 2000, Seed: 1, Z: Z95}
}

func (o SummaryOptions) artefactThreshold(cat string) float64 {
	if t, ok := o.ArtefactThresholds[cat]; ok {
		return t
	}
	return o.ArtefactThreshold
}

// Proportion is k of n with its Wilson interval; P, Lo and Hi are undefined
// when n = 0.
type Proportion struct {
	K  int      `json:"k"`
	N  int      `json:"n"`
	P  Value    `json:"p"`
	CI Interval `json:"ci95"`
}

func proportion(k, n int, z float64) Proportion {
	p := Proportion{K: k, N: n}
	if n == 0 {
		p.P = Undef("no images with a defined value")
		p.CI = undefInterval(p.P.Reason)
		return p
	}
	lo, hi, err := Wilson(k, n, z)
	if err != nil {
		p.P = Undef(err.Error())
		p.CI = undefInterval(err.Error())
		return p
	}
	p.P = Num(float64(k) / float64(n))
	p.CI = Interval{Num(lo), Num(hi)}
	return p
}

// MethodStats summarises one method over a set of images.
type MethodStats struct {
	Method string `json:"method"`
	Images int    `json:"images"` // images with a result for the method
	// Defined counts images whose inside mass is defined; Undefined counts
	// the rest, with their reasons tallied in UndefinedReasons.
	Defined          int            `json:"defined"`
	Undefined        int            `json:"undefined"`
	UndefinedReasons map[string]int `json:"undefined_reasons,omitempty"`

	MeanInside     Value    `json:"mean_inside_mass"`
	MeanInsideCI   Interval `json:"mean_inside_mass_ci95"`
	MedianInside   Value    `json:"median_inside_mass"`
	MedianInsideCI Interval `json:"median_inside_mass_ci95"`
	MeanRank       Value    `json:"mean_rank_accuracy"`
	MeanBand       Value    `json:"mean_band_mass"`
	MeanFar        Value    `json:"mean_far_mass"`
	// Pointing counts hits over images with a defined pointing result.
	Pointing Proportion `json:"pointing"`
	// Flagged counts flagged images over images whose map was usable.
	Flagged Proportion `json:"flagged"`
	// ArtefactMean is the mean artefact mass per category over images where
	// that category is present.
	ArtefactMean map[string]Value `json:"artefact_mean_mass"`
}

// Breakdown is the per-method statistics of one group of images.
type Breakdown struct {
	By      string        `json:"by"` // true_class, pred_class, correctness, artefact
	Group   string        `json:"group"`
	Images  int           `json:"images"`
	Methods []MethodStats `json:"methods"`
}

// Flag is one flagged image under the primary method.
type Flag struct {
	Rank       int    `json:"rank"` // 1 = worst
	ID         string `json:"id"`
	InsideMass Value  `json:"inside_mass"`
	// WorstArtefact is the category with the largest mass ("" when none).
	WorstArtefact     string   `json:"worst_artefact,omitempty"`
	WorstArtefactMass float64  `json:"worst_artefact_mass"`
	Reasons           []string `json:"reasons"`
}

// Summary is the dataset summary.
type Summary struct {
	Images     int            `json:"images"`
	Primary    string         `json:"primary_method"`
	Options    SummaryOptions `json:"options"`
	Methods    []MethodStats  `json:"methods"`
	Breakdowns []Breakdown    `json:"breakdowns"`
	Flagged    []Flag         `json:"flagged"` // worst first
}

// Method returns the overall statistics of a method.
func (s *Summary) Method(name string) (*MethodStats, bool) {
	for i := range s.Methods {
		if s.Methods[i].Method == name {
			return &s.Methods[i], true
		}
	}
	return nil, false
}

// Summarize computes the dataset summary. Methods appear in first-seen
// order. The bootstrap stream of each (group, method) is seeded from
// Options.Seed and a hash of the group and method names, so adding a
// method or a group never changes another one's intervals.
func Summarize(ctx context.Context, images []Image, o SummaryOptions) (*Summary, error) {
	if o.Resamples < 1 {
		return nil, fmt.Errorf("measure: bootstrap resamples %d must be ≥ 1", o.Resamples)
	}
	if !(o.Z > 0) {
		return nil, fmt.Errorf("measure: Wilson z %v must be > 0", o.Z)
	}
	var methods []string
	seen := map[string]bool{}
	for _, im := range images {
		for _, r := range im.Results {
			if !seen[r.Method] {
				seen[r.Method] = true
				methods = append(methods, r.Method)
			}
		}
	}
	if o.Primary == "" && len(methods) > 0 {
		o.Primary = methods[0]
	}
	if o.Primary != "" && len(methods) > 0 && !seen[o.Primary] {
		return nil, fmt.Errorf("measure: primary method %q has no results (methods: %v)", o.Primary, methods)
	}
	s := &Summary{Images: len(images), Primary: o.Primary, Options: o}
	var err error
	if s.Methods, err = groupStats(ctx, "all", images, methods, o); err != nil {
		return nil, err
	}
	groups := []struct {
		by  string
		key func(*Image) []string
	}{
		{"true_class", func(im *Image) []string {
			if im.TrueClass == "" {
				return []string{"(unknown)"}
			}
			return []string{im.TrueClass}
		}},
		{"pred_class", func(im *Image) []string { return []string{im.PredClass} }},
		{"correctness", func(im *Image) []string { return []string{im.Correctness()} }},
		{"artefact", func(im *Image) []string {
			a := im.ArtefactsPresent()
			if len(a) == 0 {
				return []string{"(none)"}
			}
			return a
		}},
	}
	for _, g := range groups {
		members := map[string][]Image{}
		var keys []string
		for i := range images {
			for _, k := range g.key(&images[i]) {
				if _, ok := members[k]; !ok {
					keys = append(keys, k)
				}
				members[k] = append(members[k], images[i])
			}
		}
		sort.Strings(keys)
		for _, k := range keys {
			ms, err := groupStats(ctx, g.by+"="+k, members[k], methods, o)
			if err != nil {
				return nil, err
			}
			s.Breakdowns = append(s.Breakdowns, Breakdown{By: g.by, Group: k, Images: len(members[k]), Methods: ms})
		}
	}
	s.Flagged = flagList(images, o)
	return s, nil
}

// IsFlagged reports whether a result is flagged off-lesion under the
// options and why: inside mass below InsideThreshold, or any artefact mass
// above its threshold. A result whose map is unusable is never flagged (it
// is counted as undefined instead).
func IsFlagged(r *Result, o SummaryOptions) (bool, []string) {
	if r.Undefined != "" {
		return false, nil
	}
	var why []string
	if v, ok := r.InsideMass.Float(); ok && v < o.InsideThreshold {
		why = append(why, fmt.Sprintf("inside mass %.3f < %.3g", v, o.InsideThreshold))
	}
	cats := make([]string, 0, len(r.ArtefactMass))
	for k := range r.ArtefactMass {
		cats = append(cats, k)
	}
	sort.Strings(cats)
	for _, k := range cats {
		if v, ok := r.ArtefactMass[k].Float(); ok && v > o.artefactThreshold(k) {
			why = append(why, fmt.Sprintf("%s mass %.3f > %.3g", k, v, o.artefactThreshold(k)))
		}
	}
	return len(why) > 0, why
}

func worstArtefact(r *Result) (string, float64) {
	name, m := "", 0.0
	for k, v := range r.ArtefactMass {
		if x, ok := v.Float(); ok && (x > m || (x == m && name != "" && k < name)) {
			name, m = k, x
		}
	}
	return name, m
}

// flagList ranks flagged images worst first: defined inside mass ascending
// (undefined after all defined), then worst artefact mass descending, then
// ID.
func flagList(images []Image, o SummaryOptions) []Flag {
	var out []Flag
	for i := range images {
		r, ok := images[i].Result(o.Primary)
		if !ok {
			continue
		}
		f, why := IsFlagged(r, o)
		if !f {
			continue
		}
		name, m := worstArtefact(r)
		out = append(out, Flag{ID: images[i].ID, InsideMass: r.InsideMass, WorstArtefact: name, WorstArtefactMass: m, Reasons: why})
	}
	sort.SliceStable(out, func(i, j int) bool {
		a, b := out[i], out[j]
		if a.InsideMass.OK != b.InsideMass.OK {
			return a.InsideMass.OK
		}
		if a.InsideMass.OK && a.InsideMass.V != b.InsideMass.V {
			return a.InsideMass.V < b.InsideMass.V
		}
		if a.WorstArtefactMass != b.WorstArtefactMass {
			return a.WorstArtefactMass > b.WorstArtefactMass
		}
		return a.ID < b.ID
	})
	for i := range out {
		out[i].Rank = i + 1
	}
	return out
}

func seedFor(group, method string) uint64 {
	h := fnv.New64a()
	h.Write([]byte(group))
	h.Write([]byte{0})
	h.Write([]byte(method))
	return h.Sum64()
}

func groupStats(ctx context.Context, group string, images []Image, methods []string, o SummaryOptions) ([]MethodStats, error) {
	out := make([]MethodStats, 0, len(methods))
	for _, m := range methods {
		if err := ctx.Err(); err != nil {
			return nil, err
		}
		ms := MethodStats{Method: m, ArtefactMean: map[string]Value{}}
		var inside, rank, band, far []float64
		hits, pointN, flags, usable := 0, 0, 0, 0
		art := map[string][]float64{}
		for i := range images {
			r, ok := images[i].Result(m)
			if !ok {
				continue
			}
			ms.Images++
			if v, ok := r.InsideMass.Float(); ok {
				inside = append(inside, v)
			} else {
				if ms.UndefinedReasons == nil {
					ms.UndefinedReasons = map[string]int{}
				}
				ms.UndefinedReasons[r.InsideMass.Reason]++
			}
			if v, ok := r.RankAccuracy.Float(); ok {
				rank = append(rank, v)
			}
			if v, ok := r.BandMass.Float(); ok {
				band = append(band, v)
			}
			if v, ok := r.FarMass.Float(); ok {
				far = append(far, v)
			}
			if v, ok := r.PointingHit.Float(); ok {
				pointN++
				if v == 1 {
					hits++
				}
			}
			if r.Undefined == "" {
				usable++
				if f, _ := IsFlagged(r, o); f {
					flags++
				}
			}
			for k, v := range r.ArtefactMass {
				if x, ok := v.Float(); ok {
					art[k] = append(art[k], x)
				}
			}
		}
		ms.Defined, ms.Undefined = len(inside), ms.Images-len(inside)
		none := "no image with a defined value"
		mean := func(x []float64) Value {
			if len(x) == 0 {
				return Undef(none)
			}
			return Num(Mean(x))
		}
		ms.MeanInside, ms.MeanRank, ms.MeanBand, ms.MeanFar = mean(inside), mean(rank), mean(band), mean(far)
		for k, x := range art {
			ms.ArtefactMean[k] = mean(x)
		}
		if len(inside) == 0 {
			ms.MedianInside = Undef(none)
			ms.MeanInsideCI, ms.MedianInsideCI = undefInterval(none), undefInterval(none)
		} else {
			ms.MedianInside = Num(Median(append([]float64(nil), inside...)))
			cfg := BootstrapConfig{Resamples: o.Resamples, Level: 0.95, Seed1: o.Seed, Seed2: seedFor(group, m)}
			lo, hi, err := Bootstrap(inside, Mean, cfg)
			if err != nil {
				return nil, err
			}
			ms.MeanInsideCI = Interval{Num(lo), Num(hi)}
			cfg.Seed2 = seedFor(group+"/median", m)
			if lo, hi, err = Bootstrap(inside, Median, cfg); err != nil {
				return nil, err
			}
			ms.MedianInsideCI = Interval{Num(lo), Num(hi)}
		}
		ms.Pointing = proportion(hits, pointN, o.Z)
		ms.Flagged = proportion(flags, usable, o.Z)
		out = append(out, ms)
	}
	return out, nil
}
