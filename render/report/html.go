package report

import (
	_ "embed"
	"fmt"
	"html/template"
	"io"
	"math"
	"sort"
	"strings"

	"heedmap/explain/measure"
)

//go:embed report.html.tmpl
var pageSource string

// page is parsed once; html/template escapes every user-supplied string
// (image IDs, class names, paths, reasons) for its context.
var page = template.Must(template.New("report").Funcs(template.FuncMap{
	"f1":  func(x float64) string { return fmt.Sprintf("%.1f", x) },
	"f3":  func(x float64) string { return fmt.Sprintf("%.3f", x) },
	"val": fmtValue,
	"ci":  fmtInterval,
	"pct": func(v measure.Value) string {
		if !v.OK {
			return "undefined"
		}
		return fmt.Sprintf("%.1f\u00a0%%", 100*v.V)
	},
	"dv": func(v measure.Value) string { // data-v attribute for sorting; "" = undefined
		if !v.OK {
			return ""
		}
		return fmt.Sprintf("%.6g", v.V)
	},
	"pci": func(iv measure.Interval) string { // a proportion's interval in percent
		if !iv.Lo.OK || !iv.Hi.OK {
			return "—"
		}
		return fmt.Sprintf("%.1f – %.1f\u00a0%%", 100*iv.Lo.V, 100*iv.Hi.V)
	},
	"rule": func(c string) string { // criteria compare ">=" or "<=", shown as ≥ / ≤
		switch c {
		case ">=":
			return "≥"
		case "<=":
			return "≤"
		}
		return c
	},
	"join": strings.Join,
}).Parse(pageSource))

func fmtValue(v measure.Value) string {
	if !v.OK {
		return "undefined"
	}
	return fmt.Sprintf("%.3f", v.V)
}

func fmtInterval(iv measure.Interval) string {
	if !iv.Lo.OK || !iv.Hi.OK {
		return "—"
	}
	return fmt.Sprintf("%.3f – %.3f", iv.Lo.V, iv.Hi.V)
}

type galleryItem struct {
	Rank       int
	ID         string
	Image      string // relative path of the picture shown
	Link       string // relative path opened on click
	Inside     measure.Value
	Flagged    bool
	Reasons    []string
	TrueClass  string
	PredClass  string
	Score      float64
	Correct    string
	ArtLabel   string
	ArtPercent string
}

type tableRow struct {
	ID, TrueClass, PredClass, Correct string
	Score                             float64
	Inside                            []measure.Value // per method
	Pointing                          measure.Value   // primary
	WorstArt                          string
	WorstArtMass                      measure.Value
	Unseen                            measure.Value // primary method's lesion_unseen_fraction
	Flagged                           bool
	Link                              string
	Warnings                          []string // WarningLine per warning
}

type pageData struct {
	*Report
	Primary    string
	Methods    []string
	Passed     int
	Failed     int
	Plots      []svgPlot
	Gallery    []galleryItem
	Rows       []tableRow
	Columns    []Column
	Statistics []measure.StatisticDoc
	Breakdowns []measure.Breakdown
	// BreakdownGroups are the breakdowns by dimension, in the order true
	// class, predicted class, correctness, artefact.
	BreakdownGroups []breakdownGroup
	FlaggedN        int
	TolNote         string
	BandNote        string
	HotNote         string
	MaxGallery      int
	GalleryMore     int
	// Preprocess is the resolved preprocessing in one line; "" when the
	// report does not record it.
	Preprocess string
	// Warnings are the distinct method warnings, most frequent first.
	Warnings []warningGroup
}

// maxGallery bounds the gallery so a large dataset still gives a page a
// browser opens quickly; the table lists every image.
const maxGallery = 48

// WriteHTML writes report.html. With a Source, the page is built from a
// trimmed copy of each record (see pageRecord), read in one pass.
func WriteHTML(w io.Writer, r *Report) error {
	if r.Caution == "" || r.Source != nil {
		c := *r
		if c.Caution == "" {
			c.Caution = Caution
		}
		if c.Source != nil {
			c.Images, c.Source = nil, nil
			if err := r.Source.EachImage(func(im *ImageRecord) error {
				c.Images = append(c.Images, pageRecord(im))
				return nil
			}); err != nil {
				return err
			}
		}
		r = &c
	}
	d := pageData{Report: r, Methods: methodNames(r), Columns: ColumnDocs(), Statistics: measure.Statistics(), MaxGallery: maxGallery,
		Preprocess: PreprocessText(r.Provenance.Preprocessing), Warnings: warningGroups(r.Images)}
	for _, v := range r.Verdicts {
		if v.Pass {
			d.Passed++
		} else {
			d.Failed++
		}
	}
	opt := measure.DefaultSummaryOptions()
	if r.Summary != nil {
		d.Primary = r.Summary.Primary
		d.Breakdowns = r.Summary.Breakdowns
		d.BreakdownGroups = groupBreakdowns(r.Summary.Breakdowns)
		d.FlaggedN = len(r.Summary.Flagged)
		opt = r.Summary.Options
	}
	mp := r.Provenance.Measure
	d.TolNote = fmt.Sprintf("%.3g px per 224 px of the shorter model-input side", mp.PointingTolerance224)
	d.BandNote = fmt.Sprintf("%.3g × the lesion's equivalent diameter", mp.BandFraction)
	d.HotNote = fmt.Sprintf("%.3g %%", 100*mp.HotFraction)
	d.Plots = []svgPlot{insidePlot(r), scatterPlot(r), artefactPlot(r)}

	byID := map[string]*ImageRecord{}
	for i := range r.Images {
		im := &r.Images[i]
		byID[im.ID] = im
		row := tableRow{ID: im.ID, TrueClass: im.TrueClass, PredClass: im.PredClass, Correct: im.Correctness(), Score: im.Score, Link: picture(im), Warnings: imageWarnings(im)}
		for _, m := range d.Methods {
			if res, ok := im.Result(m); ok {
				row.Inside = append(row.Inside, res.InsideMass)
			} else {
				row.Inside = append(row.Inside, measure.Undef("not run"))
			}
		}
		row.Pointing = measure.Undef("not run")
		row.Unseen = measure.Undef("not run")
		row.WorstArtMass = measure.Undef("no artefact mask")
		if res, ok := im.Result(d.Primary); ok {
			row.Pointing = res.PointingHit
			row.Unseen = res.LesionUnseen
			row.Flagged, _ = measure.IsFlagged(res, opt)
			if name, m := worstArtefact(res); name != "" {
				row.WorstArt, row.WorstArtMass = name, measure.Num(m)
			}
		}
		d.Rows = append(d.Rows, row)
	}
	// Gallery: flagged images worst first, then the rest by inside mass.
	done := map[string]bool{}
	add := func(im *ImageRecord, flagged bool, reasons []string) {
		done[im.ID] = true
		g := galleryItem{Rank: len(d.Gallery) + 1, ID: im.ID, Image: picture(im), Link: im.Panel, Flagged: flagged, Reasons: reasons,
			TrueClass: im.TrueClass, PredClass: im.PredClass, Score: im.Score, Correct: im.Correctness(), Inside: measure.Undef("not run")}
		if g.Link == "" {
			g.Link = g.Image
		}
		if res, ok := im.Result(d.Primary); ok {
			g.Inside = res.InsideMass
			if name, m := worstArtefact(res); name != "" {
				g.ArtLabel, g.ArtPercent = name, fmt.Sprintf("%.1f\u00a0%%", 100*m)
			}
		}
		d.Gallery = append(d.Gallery, g)
	}
	if r.Summary != nil {
		for _, f := range r.Summary.Flagged {
			if im, ok := byID[f.ID]; ok && !done[f.ID] {
				add(im, true, f.Reasons)
			}
		}
	}
	var rest []*ImageRecord
	for i := range r.Images {
		if !done[r.Images[i].ID] {
			rest = append(rest, &r.Images[i])
		}
	}
	insideOf := func(im *ImageRecord) float64 {
		if res, ok := im.Result(d.Primary); ok && res.InsideMass.OK {
			return res.InsideMass.V
		}
		return math.Inf(1)
	}
	sort.SliceStable(rest, func(i, j int) bool { return insideOf(rest[i]) < insideOf(rest[j]) })
	for _, im := range rest {
		add(im, false, nil)
	}
	if len(d.Gallery) > maxGallery {
		d.GalleryMore = len(d.Gallery) - maxGallery
		d.Gallery = d.Gallery[:maxGallery]
	}
	return page.Execute(w, d)
}

// pageRecord is the part of a record the page shows: everything but the
// hot-region lists and the method parameters, which only report.json and
// metrics.csv carry.
func pageRecord(im *ImageRecord) ImageRecord {
	c := *im
	c.Results = append([]measure.Result(nil), im.Results...)
	for i := range c.Results {
		c.Results[i].HotRegions = nil
	}
	c.Attributions = append([]Attribution(nil), im.Attributions...)
	for i := range c.Attributions {
		c.Attributions[i].Params = nil
	}
	return c
}

type breakdownGroup struct {
	Label string
	Rows  []measure.Breakdown
}

// groupBreakdowns splits the breakdowns by dimension so that each gets its
// own table, in a fixed order with unknown dimensions last.
func groupBreakdowns(bs []measure.Breakdown) []breakdownGroup {
	labels := map[string]string{"true_class": "true class", "pred_class": "predicted class", "correctness": "correctness", "artefact": "artefact category"}
	order := []string{"true_class", "pred_class", "correctness", "artefact"}
	var out []breakdownGroup
	idx := map[string]int{}
	for _, by := range order {
		idx[by] = len(out)
		out = append(out, breakdownGroup{Label: labels[by]})
	}
	for _, b := range bs {
		i, ok := idx[b.By]
		if !ok {
			idx[b.By] = len(out)
			i = len(out)
			out = append(out, breakdownGroup{Label: b.By})
		}
		out[i].Rows = append(out[i].Rows, b)
	}
	kept := out[:0]
	for _, g := range out {
		if len(g.Rows) > 0 {
			kept = append(kept, g)
		}
	}
	return kept
}

// picture is the image shown for a record: its panel, else the primary
// overlay, else any overlay.
func picture(im *ImageRecord) string {
	if im.Panel != "" {
		return im.Panel
	}
	keys := make([]string, 0, len(im.Overlays))
	for k := range im.Overlays {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	if len(keys) > 0 {
		return im.Overlays[keys[0]]
	}
	return ""
}

func worstArtefact(r *measure.Result) (string, float64) {
	name, m := "", -1.0
	keys := make([]string, 0, len(r.ArtefactMass))
	for k := range r.ArtefactMass {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	for _, k := range keys {
		if v := r.ArtefactMass[k]; v.OK && v.V > m {
			name, m = k, v.V
		}
	}
	if name == "" {
		return "", 0
	}
	return name, m
}
