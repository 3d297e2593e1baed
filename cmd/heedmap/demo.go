package main

import (
	"context"
	_ "embed"
	"fmt"
	"html/template"
	"io"
	"math"
	"path/filepath"
	"strings"

	"heedmap/batch"
	"heedmap/explain/measure"
	"heedmap/render/report"
	"heedmap/synth"
)

// The two demo classifiers of testdata/demo (copied here by
// testdata/demo/train_demo.py because go:embed cannot reach testdata/; a
// test fails if the copies drift). Both are 47k-parameter CNNs trained on
// invented synthetic scenes. The shortcut model saw a ruler in 98 % of
// malignant-like and 2 % of benign-like scenes and learnt to look at it; the
// clean model saw a ruler in half the scenes of either class.
var (
	//go:embed demo_shortcut.onnx
	demoShortcut []byte
	//go:embed demo_clean.onnx
	demoClean []byte
)

const demoLabels = "benign-like\nmalignant-like\n"

// demoModel is one model the demo explains.
type demoModel struct {
	name, about string
	onnx        []byte
}

func demoModels() []demoModel {
	return []demoModel{
		{"shortcut", "trained where a ruler appeared in 98 % of malignant-like and 2 % of benign-like scenes", demoShortcut},
		{"clean", "trained where a ruler appeared in half the scenes of either class", demoClean},
	}
}

// Demo-sized method parameters: small enough that both models and all seven
// methods finish in well under a minute on two cores, large enough that the
// maps are stable at 64×64 (stated in the help and in each report's
// config.yaml and provenance).
const (
	demoSize      = 64
	demoPatch     = 8   // occlusion patch, model-input pixels
	demoStride    = 4   // occlusion stride
	demoSteps     = 32  // integrated-gradients steps
	demoSamples   = 16  // SmoothGrad samples
	demoRiseMasks = 500 // RISE masks
	demoPrimary   = "grad-cam"
	demoSeed      = 2026 // synthetic scenes
)

const demoHelp = `Usage: heedmap demo [--out DIR] [--n N] [--workers N]

Runs heedmap end to end on an invented scenario. It draws N synthetic,
dermoscopy-like scenes (a lesion plus rulers, ink, hair, dark corners and gel
bubbles, each with its own mask; no real images and no patient data) into
DIR/data, then explains two bundled demo classifiers on them with every
method (occlusion, gradient, gradient-x-input, integrated-gradients,
smoothgrad, grad-cam, rise):

  shortcut  trained where a ruler co-occurred with the malignant-like class,
            so it learnt to look at the ruler
  clean     trained where the ruler carried no class information

Each model gets a full report (DIR/shortcut/, DIR/clean/, each laid out as
in 'heedmap run --help') judged against the acceptance criteria the demo
writes to DIR/criteria.yaml; DIR/index.html links both reports. The
shortcut model is expected to FAIL its criteria and the clean one to PASS:
that contrast is the point of the demo, so the exit status is 0 either way.

Demo-sized settings: 64x64 input, occlusion patch 8 stride 4, integrated
gradients 32 steps, SmoothGrad 16 samples, RISE 500 masks, primary method
grad-cam. Rerunning resumes.

Example:
  heedmap demo --out /tmp/heedmap-demo

Flags:
  --out DIR      output folder (default heedmap-demo)
  --n N          synthetic images (default 12)
  --workers N    images processed at once; 0 = one per CPU core

Exit codes:
  0    both models ran and both reports were written (whatever the verdicts)
  1    an image failed or a report could not be written
  2    usage error, or the output folder cannot be written
  130  interrupted (Ctrl-C or SIGTERM); rerun the same command to resume
`

func cmdDemo(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := newFlagSet("demo", stderr)
	out := fs.String("out", "heedmap-demo", "output folder")
	n := fs.Int("n", 12, "number of synthetic images")
	workers := fs.Int("workers", 0, "images processed at once; 0 = one per CPU core")
	testWorker := fs.String("x-test-worker", "", "")
	help := func(w io.Writer) { fmt.Fprint(w, demoHelp) }
	if code, done := parse(fs, args, help, stdout, stderr); done {
		return code
	}
	if *n < 1 || *n > 100000 {
		fmt.Fprintln(stderr, "heedmap demo: --n must be between 1 and 100000")
		return exitUsage
	}
	data := filepath.Join(*out, "data")
	rates := map[string][2]float64{synth.Ruler: {0.5, 0.5}, synth.Ink: {0.25, 0.25}, synth.Hair: {0.25, 0.25}, synth.Bubbles: {0.25, 0.25}, synth.DarkCorners: {0.25, 0.25}}
	if err := synth.WriteDataset(data, *n, synth.Options{Size: demoSize, Seed: demoSeed, Rates: rates}); err != nil {
		fmt.Fprintf(stderr, "heedmap demo: %v\n", err)
		return exitUsage
	}
	geo, err := demoGeometry(data)
	if err != nil {
		fmt.Fprintf(stderr, "heedmap demo: %v\n", err)
		return exitUsage
	}
	crit := filepath.Join(*out, "criteria.yaml")
	labels := filepath.Join(data, "labels.txt")
	files := map[string][]byte{labels: []byte(demoLabels), crit: demoCriteria(geo, *n)}
	for _, m := range demoModels() {
		files[filepath.Join(data, m.name+".onnx")] = m.onnx
	}
	for p, b := range files {
		if err := batch.WriteFileAtomic(p, b); err != nil {
			fmt.Fprintf(stderr, "heedmap demo: %v\n", err)
			return exitUsage
		}
	}
	fmt.Fprintf(stderr, "demo: %d invented synthetic scenes in %s (lesions cover %.1f %% of a scene on average, rulers %.1f %%); criteria in %s\n",
		*n, data, 100*geo.lesion, 100*geo.ruler, crit)

	var rows []demoRow
	for _, m := range demoModels() {
		cfg := demoConfig(data, filepath.Join(*out, m.name), m, geo)
		cfg.Criteria, cfg.Labels, cfg.Workers = crit, labels, *workers
		fmt.Fprintf(stderr, "\ndemo: %s model (%s)\n", m.name, m.about)
		code, oc := execute(ctx, cfg, runFlags{testWorker: *testWorker}, stdout, stderr)
		switch {
		case code == exitInterrupted || ctx.Err() != nil:
			return exitInterrupted
		case *testWorker != "" && code == exitOK:
			continue // no model, no report: the batch machinery only
		case oc.Report == nil || oc.Summary.Failed > 0:
			// The criteria failing is a result; anything else is an error.
			fmt.Fprintf(stderr, "heedmap demo: the %s model's run did not complete cleanly (exit %d)\n", m.name, code)
			if code == exitOK {
				code = exitFailed
			}
			return code
		}
		rows = append(rows, newDemoRow(m, oc.Report))
	}
	if len(rows) == 0 {
		return exitOK
	}
	if err := writeDemoIndex(filepath.Join(*out, "index.html"), rows, geo, *n); err != nil {
		fmt.Fprintf(stderr, "heedmap demo: %v\n", err)
		return exitFailed
	}
	writeDemoTable(stdout, rows)
	fmt.Fprintf(stdout, "\nThe shortcut model failing its criteria is the expected outcome of this demo, not an error.\nOverview: %s\n", filepath.Join(*out, "index.html"))
	return exitOK
}

// demoConfig is the run configuration of one demo model.
func demoConfig(data, out string, m demoModel, geo demoGeo) Config {
	cfg := defaultConfig()
	cfg.Model, cfg.Images, cfg.Out = filepath.Join(data, m.name+".onnx"), filepath.Join(data, "manifest.csv"), out
	cfg.Title = "heedmap demo: " + m.name + " model on invented synthetic scenes (no patient data)"
	cfg.Methods = append([]string(nil), methodNames...)
	// The demo models' preprocessing (testdata/demo/README.md).
	cfg.Size, cfg.Mean, cfg.Std = demoSize, []float64{0.5, 0.5, 0.5}, []float64{0.25, 0.25, 0.25}
	cfg.Patch, cfg.Stride, cfg.Steps, cfg.Samples, cfg.RiseMasks = demoPatch, demoStride, demoSteps, demoSamples, demoRiseMasks
	cfg.Primary = demoPrimary
	cfg.FlagInside = geo.insideThreshold()
	cfg.FlagArtefact = fmt.Sprintf("0.2,%s=%.2f", synth.Ruler, geo.rulerThreshold())
	return cfg
}

// demoGeo is the geometry of the generated scenes the thresholds derive
// from: the mean fraction of a scene covered by the lesion, and by the
// ruler over scenes that have one.
type demoGeo struct{ lesion, ruler float64 }

// An attribution map spread evenly over the scene puts a share of its
// evidence on a region equal to the region's area fraction. The demo asks
// for twice that on the lesion, and flags a ruler holding more than twice
// its area share: a map has to concentrate on the lesion, and not on the
// ruler, beyond what an uninformative map would do. Rounded to 0.01.
func (g demoGeo) insideThreshold() float64 { return math.Round(200*g.lesion) / 100 }
func (g demoGeo) rulerThreshold() float64  { return math.Round(200*g.ruler) / 100 }

func demoGeometry(data string) (demoGeo, error) {
	mean := func(pattern string) (float64, error) {
		paths, err := filepath.Glob(filepath.Join(data, pattern))
		if err != nil || len(paths) == 0 {
			return 0, err
		}
		s := 0.0
		for _, p := range paths {
			m, w, h, err := loadMask(p)
			if err != nil {
				return 0, err
			}
			s += float64(count(m)) / float64(w*h)
		}
		return s / float64(len(paths)), nil
	}
	var g demoGeo
	var err error
	if g.lesion, err = mean("masks/*.png"); err != nil {
		return g, err
	}
	g.ruler, err = mean(filepath.Join("artefacts", synth.Ruler, "*.png"))
	return g, err
}

// demoCriteria is the acceptance criteria file of the demo (format: see
// measure.ParseCriteria). The thresholds follow from the scenes' geometry
// and plain proportions, not from either model's results.
func demoCriteria(g demoGeo, n int) []byte {
	t := g.insideThreshold()
	return []byte(fmt.Sprintf(`# Acceptance criteria of the heedmap demo (invented synthetic scenes).
#
# The thresholds follow from the geometry of the %d generated scenes, not
# from either model's results. The lesion covers %.1f %% of a scene on
# average, so a map spread evenly over the scene would put about %.2f of its
# evidence on the lesion. The criteria ask for twice that (%.2f), with 95 %%
# confidence, from the primary method (grad-cam) and from a second,
# independent one (gradient); for the map's peak to land on the lesion in
# more than half the images (lower Wilson bound); and for at most a quarter
# of the images to be flagged. The flag rule (each report's config.yaml:
# flag-inside, flag-artefact) marks an image whose grad-cam inside mass is
# below %.2f, or that has more than twice the ruler's area share (ruler
# %.1f %% of a scene with one, so %.2f) or more than 0.2 on any other
# artefact.
criteria:
  - id: evidence-on-lesion
    method: grad-cam
    statistic: median_inside_mass_lower95
    compare: ">="
    threshold: %.2f
  - id: second-method-agrees
    method: gradient
    statistic: median_inside_mass_lower95
    compare: ">="
    threshold: %.2f
  - id: peak-on-lesion
    method: grad-cam
    statistic: pointing_accuracy_lower95
    compare: ">="
    threshold: 0.5
  - id: few-flagged
    method: grad-cam
    statistic: flagged_rate
    compare: "<="
    threshold: 0.25
`, n, 100*g.lesion, g.lesion, t, t, 100*g.ruler, g.rulerThreshold(), t, t))
}

// demoRow is one line of the demo's closing table.
type demoRow struct {
	Model, About, Link string
	Verdict            string // PASS or FAIL
	Met, Criteria      int
	Primary            string
	Flagged            measure.Proportion
	Median             measure.Value
	MedianCI           measure.Interval
	Ruler              int // flagged images whose reasons name the ruler
}

func newDemoRow(m demoModel, r *report.Report) demoRow {
	row := demoRow{Model: m.name, About: m.about, Link: m.name + "/report.html", Criteria: len(r.Verdicts), Verdict: "PASS"}
	for _, v := range r.Verdicts {
		if v.Pass {
			row.Met++
		} else {
			row.Verdict = "FAIL"
		}
	}
	if s := r.Summary; s != nil {
		row.Primary = s.Primary
		if ms, ok := s.Method(s.Primary); ok {
			row.Flagged, row.Median, row.MedianCI = ms.Flagged, ms.MedianInside, ms.MedianInsideCI
		}
		for _, f := range s.Flagged {
			if strings.Contains(strings.Join(f.Reasons, ";"), synth.Ruler) {
				row.Ruler++
			}
		}
	}
	return row
}

func (r demoRow) flaggedText() string {
	if !r.Flagged.P.OK {
		return "undefined"
	}
	return fmt.Sprintf("%d/%d (%.0f %%)", r.Flagged.K, r.Flagged.N, 100*r.Flagged.P.V)
}

func (r demoRow) medianText() string {
	if !r.Median.OK {
		return "undefined"
	}
	return fmt.Sprintf("%.3f [%s]", r.Median.V, fmtCI(r.MedianCI))
}

func fmtCI(iv measure.Interval) string {
	if !iv.Lo.OK || !iv.Hi.OK {
		return "undefined"
	}
	return fmt.Sprintf("%.3f–%.3f", iv.Lo.V, iv.Hi.V)
}

// writeDemoTable prints model, verdict, flagged rate and median inside mass.
func writeDemoTable(w io.Writer, rows []demoRow) {
	p := demoPrimary
	if len(rows) > 0 && rows[0].Primary != "" {
		p = rows[0].Primary
	}
	fmt.Fprintf(w, "\n%-9s %-8s %-10s %-18s %-13s %s\n", "model", "verdict", "criteria", "flagged ("+p+")", "ruler flags", "median inside mass ("+p+") [95 % CI]")
	for _, r := range rows {
		fmt.Fprintf(w, "%-9s %-8s %-10s %-18s %-13d %s\n", r.Model, r.Verdict, fmt.Sprintf("%d of %d", r.Met, r.Criteria), r.flaggedText(), r.Ruler, r.medianText())
	}
}

var demoIndex = template.Must(template.New("index").Parse(`<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>heedmap demo</title>
<style>
html { font-size: 22px; } body { font-family: "DejaVu Sans", "Liberation Sans", Arial, sans-serif; margin: 1.5rem auto; max-width: 1400px; padding: 0 1.5rem; color: #111; line-height: 1.45; }
h1 { color: #0f2a5c; } table { border-collapse: collapse; margin: 1rem 0; } th, td { border: 1px solid #9ca3af; padding: .4rem .7rem; text-align: left; }
th { background: #e8edf6; } td.n { white-space: nowrap; font-variant-numeric: tabular-nums; } .PASS, .FAIL { color: #fff; font-weight: bold; padding: .1em .5em; border-radius: .3em; } .PASS { background: #0b6b2e; } .FAIL { background: #b00020; }
.note { background: #fff1b8; border: 3px solid #7a5b00; padding: .6rem 1rem; font-weight: bold; }
</style></head><body>
<h1>heedmap demo: a shortcut model and a clean model</h1>
<p class="note">Invented scenario: {{.N}} synthetic, dermoscopy-like scenes drawn by heedmap itself; no real images, no patient data. Research and quality-assurance tool, not a diagnostic device.</p>
<p>Both classifiers were trained on synthetic scenes; the shortcut model where a ruler co-occurred with the malignant-like class, the clean model where it did not. Each is explained on the same scenes with all seven methods and judged against the same <a href="criteria.yaml">acceptance criteria</a> (thresholds from the scenes' geometry: lesions cover {{printf "%.1f" .Lesion}} % of a scene, rulers {{printf "%.1f" .Ruler}} %).</p>
<table><thead><tr><th>Model</th><th>Trained</th><th>Verdict</th><th>Criteria met</th><th>Flagged ({{.Primary}})</th><th>Flagged for the ruler</th><th>Median inside mass ({{.Primary}}) [95 % CI]</th><th>Report</th></tr></thead><tbody>
{{range .Rows}}<tr><td><strong>{{.Model}}</strong></td><td>{{.About}}</td><td><span class="{{.Verdict}}">{{.Verdict}}</span></td><td>{{.Met}} of {{.Criteria}}</td><td class="n">{{.FlaggedText}}</td><td class="n">{{.Ruler}}</td><td class="n">{{.MedianText}}</td><td><a href="{{.Link}}">{{.Link}}</a></td></tr>
{{end}}</tbody></table>
<p>The shortcut model failing its criteria is the expected outcome: its evidence sits on the ruler, not on the lesion.</p>
</body></html>
`))

func writeDemoIndex(path string, rows []demoRow, g demoGeo, n int) error {
	type row struct {
		demoRow
		FlaggedText, MedianText string
	}
	d := struct {
		N             int
		Lesion, Ruler float64
		Primary       string
		Rows          []row
	}{N: n, Lesion: 100 * g.lesion, Ruler: 100 * g.ruler, Primary: demoPrimary}
	for _, r := range rows {
		d.Rows = append(d.Rows, row{r, r.flaggedText(), r.medianText()})
	}
	var b strings.Builder
	if err := demoIndex.Execute(&b, d); err != nil {
		return err
	}
	return batch.WriteFileAtomic(path, []byte(b.String()))
}
