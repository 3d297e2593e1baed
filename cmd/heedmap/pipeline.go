package main

import (
	"context"
	"encoding/json"
	"fmt"
	"image"
	"io"
	"math"
	"os"
	"sort"
	"strconv"
	"strings"
	"sync"
	"time"

	"heedmap/batch"
	"heedmap/engine"
	"heedmap/explain"
	"heedmap/explain/measure"
	"heedmap/explain/preprocess"
	"heedmap/occlusion"
	"heedmap/render"
	"heedmap/render/report"
)

// recordsTable is the per-image CSV the batch layer writes when the report
// owns metrics.csv (one row per image × method).
const recordsTable = "images.csv"

// pipeline is the real per-image work of `heedmap run` and what happens
// once all images are done.
type pipeline struct {
	worker batch.Worker
	// finish runs after a complete run (every planned image has a record):
	// dataset summary, acceptance criteria, report. It reports whether every
	// acceptance criterion passed.
	finish func(ctx context.Context) (*report.Report, bool, error)
	table  string
}

// attributionWorker preprocesses an image, runs every configured method,
// measures each map against the lesion and artefact masks and renders
// overlays and a case panel. One value serves all worker goroutines: the
// compiled graph is safe for concurrent runs and the rest is read-only.
type attributionWorker struct {
	cfg     Config
	pp      *preprocess.Preprocessor
	net     explain.Network
	methods []explain.Method
	labels  []string
	kind    explain.ScoreKind
	params  measure.Params
	// prep is the preprocessing resolved against the model, as recorded.
	prep preprocess.Config
	warn *warnLog
}

// warnLog prints the first occurrence of each kind of method warning on
// the run's error stream; every occurrence stays in the records. Warnings
// that differ only in their numbers (a completeness gap of 6.1 % or 7.4 %)
// are one kind, so a dataset-wide condition prints one line, not one per
// image.
type warnLog struct {
	mu   sync.Mutex
	w    io.Writer
	seen map[string]bool
}

func (l *warnLog) add(id, method, text string) {
	if l == nil || l.w == nil {
		return
	}
	k := method + "\x00" + report.WarningKind(text)
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.seen[k] {
		return
	}
	l.seen[k] = true
	fmt.Fprintf(l.w, "warning: %s (first seen on %s; every occurrence is in report.html)\n", report.WarningLine(method, text), id)
}

// detail is what the worker stores in each record for the report.
type detail struct {
	Image    measure.Image     `json:"image"`
	Overlays map[string]string `json:"overlays,omitempty"`
	Panel    string            `json:"panel,omitempty"`
	// Artefacts maps a category to the artefact mask read for it.
	Artefacts map[string]string `json:"artefact_files,omitempty"`
	// Inputs are the SHA-256 digests of the image and every mask, taken by
	// the worker that read them: a merge may run where the shards' paths
	// do not exist, and the report must still say which bytes were
	// measured.
	Inputs []report.FileDigest `json:"inputs,omitempty"`
	// Attributions: per method, the target, resolved settings and warnings.
	Attributions []report.Attribution `json:"attributions,omitempty"`
	// Preprocess is the run's resolved preprocessing, kept in every record
	// so that a report built by a merge can state it without the model.
	Preprocess *preprocess.Config `json:"preprocess,omitempty"`
}

// newPipeline compiles the model and the configured methods; method
// warnings are printed on warn (first occurrence of each kind).
func newPipeline(cfg Config, warn io.Writer) (*pipeline, error) {
	g, err := engine.Load(cfg.Model)
	if err != nil {
		return nil, fmt.Errorf("model: %w", err)
	}
	ins := g.Inputs()
	if len(ins) != 1 {
		return nil, fmt.Errorf("model %s has %d inputs; heedmap needs one image input", cfg.Model, len(ins))
	}
	shape := make([]int, len(ins[0].Shape))
	for i, d := range ins[0].Shape {
		shape[i] = -1
		if d.Param == "" && d.Value > 0 {
			shape[i] = int(d.Value)
		}
	}
	pc := preprocess.Config{Width: cfg.Size, Height: cfg.Size, Resize: preprocess.ResizeMode(cfg.Resize), Channels: strings.ToUpper(cfg.Channels)}
	for _, v := range cfg.Mean {
		pc.Mean = append(pc.Mean, float32(v))
	}
	for _, v := range cfg.Std {
		pc.Std = append(pc.Std, float32(v))
	}
	pc, err = pc.Resolve(shape)
	if err != nil {
		return nil, fmt.Errorf("preprocessing for %s: %w", cfg.Model, err)
	}
	pp, err := preprocess.New(pc)
	if err != nil {
		return nil, err
	}
	if cfg.Output != "" && !g.HasValue(cfg.Output) {
		return nil, fmt.Errorf("--output %s: the model %s has no value of that name (its outputs: %s)", cfg.Output, cfg.Model, outputNames(g))
	}
	net, err := explain.FromGraph(g, explain.GraphOptions{NHWC: pc.Layout == "NHWC", Output: cfg.Output})
	if err != nil {
		if cfg.Output != "" {
			return nil, fmt.Errorf("--output %s: %w", cfg.Output, err)
		}
		return nil, err
	}
	w := &attributionWorker{cfg: cfg, pp: pp, net: net, params: measure.DefaultParams(), prep: recordedPreprocess(pc),
		warn: &warnLog{w: warn, seen: map[string]bool{}}}
	if w.kind, err = explain.ParseScoreKind(cfg.Score); err != nil {
		return nil, err
	}
	if cfg.Labels != "" {
		if w.labels, err = explain.ReadLabels(cfg.Labels); err != nil {
			return nil, err
		}
	}
	if _, err := w.target(batch.Item{Label: "0"}); err != nil && cfg.Target != "label" {
		return nil, fmt.Errorf("--target %s: %w", cfg.Target, err)
	}
	norm := pp.Normalization()
	quad, err := explain.ParseQuadrature(cfg.IGQuadrature)
	if err != nil {
		return nil, err
	}
	baseline, err := explain.ParseBaseline(cfg.Baseline)
	if err != nil {
		return nil, err
	}
	ig := explain.IntegratedGradients{Steps: cfg.Steps, Quadrature: quad, Baseline: baseline, Norm: norm, BlurSigma: cfg.BlurSigma, Seed: cfg.Seed}
	for _, name := range cfg.Methods {
		var m explain.Method
		switch name {
		case "occlusion":
			o := occlusion.Occlusion{Patch: cfg.Patch, Stride: cfg.Stride, Norm: norm, BlurSigma: cfg.BlurSigma}
			if f, perr := occlusion.ParseFill(cfg.Fill); perr == nil {
				o.Fill = f
			} else if rgb, terr := parseTriple(cfg.Fill); terr == nil {
				o.Fill = occlusion.FillColor
				for i := range o.Color {
					o.Color[i] = float32(rgb[i] / 255)
				}
			} else {
				return nil, perr
			}
			m = o
		case "gradient":
			m = explain.Gradient{}
		case "gradient-x-input":
			m = explain.GradientTimesInput{}
		case "integrated-gradients":
			m = ig
		case "smoothgrad":
			sg := explain.SmoothGrad{Samples: cfg.Samples, Sigma: cfg.SmoothGradSigma, Seed: cfg.Seed}
			if sg.Sigma == 0 {
				sg.Sigma = -1 // the user's 0 is no noise; the method's 0 would mean its default
			}
			if cfg.SmoothGradOverIG {
				sg.OverIG = &ig
			}
			m = sg
		case "grad-cam":
			if cfg.Layer == "" {
				// Checked once here; the method then chooses the same layer
				// itself and records the choice as automatic.
				if _, err = g.GradCAMLayer(); err != nil {
					return nil, fmt.Errorf("grad-cam: %w (pass --layer)", err)
				}
			}
			m = explain.GradCAM{Layer: cfg.Layer}
		case "rise":
			n := cfg.Samples
			if cfg.RiseMasks > 0 {
				n = cfg.RiseMasks
			}
			m = explain.RISE{Masks: n, Grid: cfg.RiseGrid, P: cfg.RiseP, Seed: cfg.Seed}
		default:
			return nil, fmt.Errorf("unknown method %q", name)
		}
		w.methods = append(w.methods, m)
	}
	start := time.Now()
	return &pipeline{
		worker: w,
		table:  recordsTable,
		finish: func(ctx context.Context) (*report.Report, bool, error) { return writeReport(ctx, cfg, cfg.Out, start) },
	}, nil
}

// target resolves --target for one item (explain.ParseTarget: predicted,
// a class index, a class name or a group NAME=A+B).
func (w *attributionWorker) target(it batch.Item) (explain.Target, error) {
	t := w.cfg.Target
	if t == "label" {
		if it.Label == "" {
			return explain.Target{}, fmt.Errorf("--target label but %s has no label", it.ID)
		}
		t = it.Label
	}
	return explain.ParseTarget(t, w.labels, w.kind)
}

// recordedPreprocess is c as the report states it: the defaults that
// Resolve leaves implicit (value range, channel order, letterbox colour)
// written out.
func recordedPreprocess(c preprocess.Config) preprocess.Config {
	if c.Range == 0 {
		c.Range = 1
	}
	if c.Channels == "" {
		c.Channels = "RGB"
	}
	if len(c.PadColor) == 0 {
		// preprocess.Config's rule: the mean colour, or black without one.
		c.PadColor = []float32{0, 0, 0}
		if len(c.Mean) == 3 {
			c.PadColor = append([]float32(nil), c.Mean...)
			if strings.EqualFold(c.Channels, "BGR") { // Mean is in model channel order; PadColor is RGB
				c.PadColor[0], c.PadColor[2] = c.PadColor[2], c.PadColor[0]
			}
		}
	}
	return c
}

func (w *attributionWorker) className(i int) string {
	if i >= 0 && i < len(w.labels) {
		return w.labels[i]
	}
	return strconv.Itoa(i)
}

// loadMask reads a mask file by measure.MaskFromImage's rule, on its own grid.
func loadMask(path string) ([]bool, int, int, error) {
	img, err := decodeFile(path)
	if err != nil {
		return nil, 0, 0, fmt.Errorf("mask %w", err)
	}
	return measure.MaskFromImage(img, path)
}

// fitMask reads a mask that belongs to an upright picture of uw×uh pixels
// and returns it on the W×H grid the worker uses (smaller than uw×uh when
// the picture was reduced for the memory cap). A size mismatch with the
// picture is an error naming the file unless --mask-resize; the reduction
// itself always carries the mask along by the same nearest-neighbour rule.
func (w *attributionWorker) fitMask(path string, uw, uh, W, H int) ([]bool, error) {
	m, mw, mh, err := loadMask(path)
	if err != nil {
		return nil, err
	}
	if m, err = measure.FitMask(m, mw, mh, uw, uh, w.cfg.MaskResize, path); err != nil {
		return nil, err
	}
	return measure.FitMask(m, uw, uh, W, H, true, path)
}

// inputDigests hashes the image and every mask an item names.
func inputDigests(it batch.Item) ([]report.FileDigest, error) {
	var out []report.FileDigest
	add := func(path, role string) error {
		if path == "" {
			return nil
		}
		d, err := report.HashFile(path)
		d.Role = role
		out = append(out, d)
		return err
	}
	if err := add(it.Image, ""); err != nil {
		return nil, err
	}
	if err := add(it.Mask, "lesion"); err != nil {
		return nil, err
	}
	cats := make([]string, 0, len(it.Artefacts))
	for c := range it.Artefacts {
		cats = append(cats, c)
	}
	sort.Strings(cats)
	for _, c := range cats {
		if err := add(it.Artefacts[c], "artefact:"+c); err != nil {
			return nil, err
		}
	}
	return out, nil
}

// finite reports the first non-finite value of x (index, value, false).
func finite(x []float32) (int, float32, bool) {
	for i, v := range x {
		if math.IsNaN(float64(v)) || math.IsInf(float64(v), 0) {
			return i, v, false
		}
	}
	return 0, 0, true
}

func count(m []bool) int {
	n := 0
	for _, v := range m {
		if v {
			n++
		}
	}
	return n
}

func (w *attributionWorker) Process(ctx context.Context, it batch.Item, dst batch.Dest) (batch.Result, error) {
	src, uw, uh, reduced, err := w.loadSource(it.Image)
	if err != nil {
		return batch.Result{}, err
	}
	// Masks before the model: a bad mask costs no model time.
	sb := src.Image.Bounds()
	srcLesion := make([]bool, sb.Dx()*sb.Dy())
	if it.Mask != "" {
		if srcLesion, err = w.fitMask(it.Mask, uw, uh, sb.Dx(), sb.Dy()); err != nil {
			return batch.Result{}, err
		}
		if count(srcLesion) == 0 {
			return batch.Result{}, fmt.Errorf("mask %s is empty (no lesion pixel): every lesion measure of %s would be undefined", it.Mask, it.Image)
		}
	}
	srcArts := map[string][]bool{}
	for name, p := range it.Artefacts {
		if p == "" {
			continue // the image does not show this artefact
		}
		if srcArts[name], err = w.fitMask(p, uw, uh, sb.Dx(), sb.Dy()); err != nil {
			return batch.Result{}, err
		}
	}
	digests, err := inputDigests(it)
	if err != nil {
		return batch.Result{}, err
	}
	in, err := w.pp.Apply(ctx, src.Image)
	if err != nil {
		return batch.Result{}, fmt.Errorf("%s: %w", it.Image, err)
	}
	pl := in.Placement
	logits, err := w.net.Forward(ctx, in.Tensor)
	if err != nil {
		return batch.Result{}, fmt.Errorf("%s: model: %w", it.Image, err)
	}
	if i, v, ok := finite(logits.F32); !ok {
		return batch.Result{}, fmt.Errorf("%s: model output %d is %v (not finite); no attribution computed", it.Image, i, v)
	}
	tg, err := w.target(it)
	if err != nil {
		return batch.Result{}, fmt.Errorf("%s: %w", it.Image, err)
	}
	row := logits.F32
	pred := 0
	for i, v := range row {
		if v > row[pred] {
			pred = i
		}
	}
	probs := softmax(row)

	// Masks in model space (for measures); the source-grid ones draw overlays.
	lesion, err := pl.MaskToModel(srcLesion, sb.Dx(), sb.Dy())
	if err != nil {
		return batch.Result{}, err
	}
	masks := measure.Masks{W: pl.W, H: pl.H, Lesion: lesion, Seen: seenMask(pl), Artefacts: map[string][]bool{}, SourceLesionPixels: count(srcLesion)}
	if it.Mask != "" {
		f, err := pl.UnseenFraction(srcLesion, sb.Dx(), sb.Dy())
		if err != nil {
			return batch.Result{}, fmt.Errorf("%s: %w", it.Mask, err)
		}
		masks.LesionUnseen = measure.Num(f)
	}
	for name, m := range srcArts {
		if masks.Artefacts[name], err = pl.MaskToModel(m, sb.Dx(), sb.Dy()); err != nil {
			return batch.Result{}, err
		}
	}
	plan, err := measure.NewPlan(masks, w.params)
	if err != nil {
		return batch.Result{}, fmt.Errorf("%s: masks: %w", it.Image, err)
	}

	res := batch.Result{Metrics: map[string]float64{}, Info: map[string]string{}}
	res.Info["predicted"] = w.className(pred)
	if reduced != "" {
		res.Info["reduced"] = reduced
	}
	prep := w.prep
	d := detail{Overlays: map[string]string{}, Inputs: digests, Preprocess: &prep}
	for name, p := range it.Artefacts {
		if p != "" {
			if d.Artefacts == nil {
				d.Artefacts = map[string]string{}
			}
			d.Artefacts[name] = p
		}
	}
	d.Image = measure.Image{ID: it.ID, TrueClass: w.trueClass(it.Label), PredClass: w.className(pred)}
	var views []render.MethodView
	for _, m := range w.methods {
		mt := tg
		if m.Name() == "rise" && mt.Score == explain.Logit {
			// RISE weights each mask by the class probability (Petsiuk,
			// Das & Saenko, BMVC 2018). A logit can be negative for every
			// mask, which makes the whole map negative and leaves no
			// relevance to measure, so RISE always explains a probability.
			mt.Score = explain.Softmax
			if len(row) == 1 {
				mt.Score = explain.Sigmoid
			}
		}
		r, err := m.Attribute(ctx, w.net, in.Tensor, mt)
		if err != nil {
			return batch.Result{}, fmt.Errorf("%s: %s: %w", it.Image, m.Name(), err)
		}
		if i, v, ok := finite(r.Map.Data); !ok {
			return batch.Result{}, fmt.Errorf("%s: %s: map value %d is %v (not finite)", it.Image, m.Name(), i, v)
		}
		// The image's score is the probability of what is explained: the
		// class, or the sum over a group's members (its definition).
		var p float64
		for _, c := range r.Target.Classes {
			if c >= 0 && c < len(probs) {
				p += float64(probs[c])
			}
		}
		d.Image.Score = p
		tname := r.Target.Name
		if len(r.Target.Classes) == 1 {
			tname = w.className(r.Target.Classes[0])
		}
		res.Info["target"] = tname
		att := report.Attribution{Method: r.Method, Target: tname, ScoreKind: r.Target.Score.String(), Warnings: r.Warnings}
		for _, p := range r.Params {
			att.Params = append(att.Params, report.Param{Name: p.Name, Value: p.Value})
		}
		if r.Method == "integrated-gradients" || !math.IsNaN(r.Gap) {
			v := measure.Undef("not computed")
			if !math.IsNaN(r.Gap) {
				v = measure.Num(r.Gap)
			}
			att.CompletenessGap = &v
		}
		for _, wt := range r.Warnings {
			w.warn.add(it.ID, r.Method, wt)
		}
		d.Attributions = append(d.Attributions, att)
		mr, err := plan.Measure(r.Method, r.Map)
		if err != nil {
			return batch.Result{}, fmt.Errorf("%s: %s: measure: %w", it.Image, r.Method, err)
		}
		d.Image.Results = append(d.Image.Results, mr)
		put := func(k string, v measure.Value) {
			if f, ok := v.Float(); ok {
				res.Metrics[r.Method+"."+k] = f
			}
		}
		put("inside_mass", mr.InsideMass)
		put("rank_accuracy", mr.RankAccuracy)
		put("pointing_hit", mr.PointingHit)
		put("band_mass", mr.BandMass)
		put("far_mass", mr.FarMass)
		for a, v := range mr.ArtefactMass {
			put("artifact_mass:"+a, v)
		}
		res.Metrics[r.Method+".score"] = r.Score
		if !math.IsNaN(r.Gap) {
			res.Metrics[r.Method+".completeness_gap"] = r.Gap
		}

		values, seen := pl.ToOriginal(r.Map)
		attr := render.Attribution{Values: values, Seen: seen, Signed: signed(r.Method), HotRegions: hotBoxes(pl, mr.HotRegions)}
		met := renderMetrics(mr)
		img, err := render.Overlay(render.Scene{Image: src.Image, Map: attr, Lesion: srcLesion, Artefacts: srcArts,
			Caption: render.Caption{Method: r.Method, Target: res.Info["target"], ScoreKind: r.Target.Score.String(), Score: r.Score, Metrics: met}})
		if err != nil {
			return batch.Result{}, fmt.Errorf("%s: %s: overlay: %w", it.Image, r.Method, err)
		}
		abs, rel, err := dst.Path("overlays", "."+r.Method+".png")
		if err != nil {
			return batch.Result{}, err
		}
		if err := render.WritePNG(abs, img); err != nil {
			return batch.Result{}, err
		}
		d.Overlays[r.Method] = rel
		res.Files = append(res.Files, rel)
		if w.cfg.SaveMaps {
			abs, rel, err := dst.Path("maps", "."+r.Method+".npy")
			if err != nil {
				return batch.Result{}, err
			}
			// The saved map is the signed channel sum (Result.Signed), the
			// method output as the tool defines it; r.Map may be the
			// gradient's max-|·| display map.
			if err := explain.SaveNPY(abs, r.Signed); err != nil {
				return batch.Result{}, err
			}
			res.Files = append(res.Files, rel)
		}
		if len(views) < render.MaxPanelMethods {
			views = append(views, render.MethodView{Name: r.Method, Map: attr, Metrics: met})
		}
	}
	panel, err := render.Panel(render.Case{ID: it.ID, TrueClass: d.Image.TrueClass, PredictedClass: d.Image.PredClass,
		ScoreKind: "probability", Score: float64(probs[pred]), Image: src.Image, Lesion: srcLesion, Artefacts: srcArts, Methods: views})
	if err != nil {
		return batch.Result{}, fmt.Errorf("%s: panel: %w", it.Image, err)
	}
	abs, rel, err := dst.Path("panels", ".png")
	if err != nil {
		return batch.Result{}, err
	}
	if err := render.WritePNG(abs, panel); err != nil {
		return batch.Result{}, err
	}
	d.Panel = rel
	res.Files = append(res.Files, rel)
	res.Detail = d
	return res, nil
}

func (w *attributionWorker) trueClass(label string) string {
	if label == "" {
		return ""
	}
	if i, err := strconv.Atoi(label); err == nil {
		return w.className(i)
	}
	return label
}

func softmax(x []float32) []float32 {
	out := make([]float32, len(x))
	mx := math.Inf(-1)
	for _, v := range x {
		mx = math.Max(mx, float64(v))
	}
	s := 0.0
	for i, v := range x {
		e := math.Exp(float64(v) - mx)
		out[i] = float32(e)
		s += e
	}
	for i := range out {
		out[i] = float32(float64(out[i]) / s)
	}
	return out
}

// seenMask marks model pixels that show the picture (not letterbox
// padding); nil when every pixel does.
func seenMask(p preprocess.Placement) []bool {
	if p.OffX <= 0 && p.OffY <= 0 && p.OffX+p.ScaledW >= p.W && p.OffY+p.ScaledH >= p.H {
		return nil
	}
	s := make([]bool, p.W*p.H)
	for y := max(0, p.OffY); y < min(p.H, p.OffY+p.ScaledH); y++ {
		for x := max(0, p.OffX); x < min(p.W, p.OffX+p.ScaledW); x++ {
			s[y*p.W+x] = true
		}
	}
	return s
}

// signed says whether a method's map is drawn on the diverging ramp.
func signed(method string) bool {
	s, err := measure.SignFor(method)
	return err == nil && s == measure.Positive && method != "grad-cam" && method != "rise"
}

// maxBoxes caps the hot regions drawn per overlay: noisy maps (integrated
// gradients) can have dozens of tiny components, and numbered boxes beyond
// the first few hide the picture without adding information. All regions
// stay in the records.
const maxBoxes = 5

// hotBoxes carries the largest off-lesion regions to source pixels.
func hotBoxes(p preprocess.Placement, rs []measure.Region) []image.Rectangle {
	var out []image.Rectangle
	for _, r := range rs[:min(len(rs), maxBoxes)] {
		x0, y0 := p.ToSourcePoint(float64(r.X0), float64(r.Y0))
		x1, y1 := p.ToSourcePoint(float64(r.X1+1), float64(r.Y1+1))
		out = append(out, image.Rect(int(math.Floor(x0)), int(math.Floor(y0)), int(math.Ceil(x1)), int(math.Ceil(y1))))
	}
	return out
}

func renderMetrics(r measure.Result) render.Metrics {
	m := render.NoMetrics()
	if v, ok := r.InsideMass.Float(); ok {
		m.InsideMass = v
	} else {
		m.InsideMassUndefined = r.InsideMass.Reason
	}
	if v, ok := r.RankAccuracy.Float(); ok {
		m.RankAccuracy = v
	}
	if v, ok := r.PointingHit.Float(); ok {
		m.Pointing = render.PointingMiss
		if v == 1 {
			m.Pointing = render.PointingHit
		}
	}
	if len(r.HotRegions) > 0 {
		m.OffLesion, m.OffLesionBox = r.HotRegions[0].Mass, 1
	} else if r.HotThreshold.OK {
		m.OffLesion = 0 // measured, and no hot region lies off the lesion
	}
	return m
}

// writeReport builds report.json, report.html and metrics.csv (one row per
// image × method) from the records of OUT's index. It returns whether every
// acceptance criterion passed (true when there are none).
func writeReport(ctx context.Context, cfg Config, out string, start time.Time) (*report.Report, bool, error) {
	r, pass, err := buildReport(ctx, cfg, out, start)
	if err != nil {
		return nil, false, err
	}
	return r, pass, report.WriteAll(out, r)
}

// summaryOptions is the dataset summary's configuration: the default
// bootstrap and intervals with the run's primary method and flag rule.
func summaryOptions(cfg Config) (measure.SummaryOptions, error) {
	o := measure.DefaultSummaryOptions()
	o.Primary = cfg.Primary
	if o.Primary == "smoothgrad" && cfg.SmoothGradOverIG {
		o.Primary = "smoothgrad-ig" // the name its results carry
	}
	o.InsideThreshold = cfg.FlagInside
	def, per, err := parseArtefactRule(cfg.FlagArtefact)
	if err != nil {
		return o, fmt.Errorf("flag-artefact: %w", err)
	}
	if def >= 0 {
		o.ArtefactThreshold = def
	}
	o.ArtefactThresholds = per
	return o, nil
}

// buildReport reads OUT's records once to summarise them and returns a
// report whose images come from a recordSource, so the writers read the
// records again one at a time: memory holds each image's summary numbers,
// not its full record, however large the batch.
func buildReport(ctx context.Context, cfg Config, out string, start time.Time) (*report.Report, bool, error) {
	idx, err := batch.ReadIndex(out)
	if err != nil {
		return nil, false, err
	}
	opt, err := summaryOptions(cfg)
	if err != nil {
		return nil, false, err
	}
	var images []measure.Image
	var inputs inputSet
	var pre *preprocess.Config
	r := &report.Report{Title: cfg.reportTitle(), Source: recordSource{out: out, idx: idx}}
	err = batch.EachRecord(out, idx, func(rec batch.Record) error {
		if err := ctx.Err(); err != nil {
			return err
		}
		d, err := recordDetail(rec)
		if err != nil {
			r.Failures = append(r.Failures, report.Failure{File: rec.Image, Stage: "record", Reason: err.Error()})
			return nil
		}
		if d == nil {
			r.Failures = append(r.Failures, report.Failure{File: rec.Image, Stage: "image", Reason: rec.Error})
			return nil
		}
		images = append(images, summaryImage(d.Image))
		inputs.add(d.Inputs)
		if pre == nil {
			pre = d.Preprocess
		}
		return nil
	})
	if err != nil {
		return nil, false, err
	}
	pass := true
	if len(images) > 0 {
		if r.Summary, err = measure.Summarize(ctx, images, opt); err != nil {
			return nil, false, err
		}
		if cfg.Criteria != "" {
			data, err := os.ReadFile(cfg.Criteria)
			if err != nil {
				return nil, false, err
			}
			cs, err := measure.ParseCriteria(data, cfg.Criteria)
			if err != nil {
				return nil, false, err
			}
			if r.Verdicts, err = measure.Evaluate(cs, r.Summary, cfg.Criteria); err != nil {
				return nil, false, err
			}
			r.CriteriaFile = cfg.Criteria
			for _, v := range r.Verdicts {
				pass = pass && v.Pass
			}
		}
	}
	p := report.NewProvenance(start)
	p.End = time.Now()
	if cfg.Model != "" {
		if p.Model, err = report.HashFile(cfg.Model); err != nil {
			return nil, false, err
		}
	}
	p.Config = cfg
	p.ConfigSHA256 = report.HashBytes(cfg.marshal())
	p.Seeds["methods"] = cfg.Seed
	p.Seeds["bootstrap"] = opt.Seed
	p.Measure = measure.DefaultParams()
	p.Methods = methodSettings(cfg)
	p.Preprocessing = pre
	r.Provenance = p
	if inputs.legacy {
		// Records written before workers stored digests: hash the inputs
		// now, from their paths.
		if err := r.HashInputs(); err != nil {
			return nil, false, err
		}
	} else {
		r.Provenance.Images, r.Provenance.Masks = inputs.images, inputs.masks
	}
	return r, pass, nil
}

// recordDetail decodes an ok record's detail; it returns nil, nil for a
// record of a failed image.
func recordDetail(rec batch.Record) (*detail, error) {
	if rec.Status != batch.StatusOK {
		return nil, nil
	}
	d := new(detail)
	if err := json.Unmarshal(rec.Detail, d); err != nil {
		return nil, err
	}
	return d, nil
}

// summaryImage is the part of an image's measures the dataset summary
// reads: everything but the hot-region lists, which are most of a record
// and which only report.json and metrics.csv show.
func summaryImage(im measure.Image) measure.Image {
	im.Results = append([]measure.Result(nil), im.Results...)
	for i := range im.Results {
		im.Results[i].HotRegions = nil
	}
	return im
}

// recordSource yields the report's per-image records from OUT's record
// files, decoding one at a time (report.ImageSource). Records that fail to
// decode are skipped here; buildReport lists them as failures.
type recordSource struct {
	out string
	idx batch.Index
}

func (s recordSource) EachImage(f func(*report.ImageRecord) error) error {
	return batch.EachRecord(s.out, s.idx, func(rec batch.Record) error {
		d, err := recordDetail(rec)
		if d == nil || err != nil {
			return nil
		}
		return f(&report.ImageRecord{Image: d.Image, File: rec.Image, MaskFile: rec.Mask, ArtefactFiles: d.Artefacts, Overlays: d.Overlays, Panel: d.Panel, Attributions: d.Attributions})
	})
}

// inputSet collects the report's image and mask digests from the digests
// the workers stored in the records, which hold wherever the report is
// built (a merge may not see the shards' input paths), each file once.
type inputSet struct {
	seen          map[string]bool
	images, masks []report.FileDigest
	// legacy is set when a record holds no digests (written before
	// workers stored them).
	legacy bool
}

func (s *inputSet) add(fs []report.FileDigest) {
	if len(fs) == 0 {
		s.legacy = true
		return
	}
	if s.seen == nil {
		s.seen = map[string]bool{}
	}
	for _, f := range fs {
		k := f.Role + "\x00" + f.Path
		if s.seen[k] {
			continue
		}
		s.seen[k] = true
		if f.Role == "" {
			s.images = append(s.images, f)
		} else {
			s.masks = append(s.masks, f)
		}
	}
}

// methodSettings is each configured method's settings as given (option
// names; 0 = the method's default, which every image's record states
// resolved), keyed by the method name its results carry.
func methodSettings(cfg Config) map[string]map[string]any {
	out := map[string]map[string]any{}
	igs := func() map[string]any {
		return map[string]any{"steps": cfg.Steps, "baseline": cfg.Baseline, "ig-quadrature": cfg.IGQuadrature, "blur-sigma": cfg.BlurSigma, "seed": cfg.Seed}
	}
	for _, m := range cfg.Methods {
		var s map[string]any
		switch m {
		case "occlusion":
			s = map[string]any{"patch": cfg.Patch, "stride": cfg.Stride, "fill": cfg.Fill, "blur-sigma": cfg.BlurSigma}
		case "integrated-gradients":
			s = igs()
		case "smoothgrad":
			s = map[string]any{"samples": cfg.Samples, "smoothgrad-sigma": cfg.SmoothGradSigma, "seed": cfg.Seed}
			if cfg.SmoothGradOverIG {
				m = "smoothgrad-ig"
				for k, v := range igs() {
					s["ig-"+strings.TrimPrefix(k, "ig-")] = v
				}
			}
		case "grad-cam":
			s = map[string]any{"layer": cfg.Layer}
		case "rise":
			s = map[string]any{"rise-masks": cfg.RiseMasks, "samples": cfg.Samples, "rise-grid": cfg.RiseGrid, "rise-p": cfg.RiseP, "seed": cfg.Seed}
		default:
			s = map[string]any{}
		}
		s["target"], s["score"] = cfg.Target, cfg.Score
		if cfg.Output != "" {
			s["output"] = cfg.Output
		}
		out[m] = s
	}
	return out
}

func outputNames(g *engine.Graph) string {
	var s []string
	for _, o := range g.Outputs() {
		s = append(s, o.Name)
	}
	return strings.Join(s, ", ")
}
