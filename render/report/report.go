// Package report writes heedmap's report files: metrics.csv (one row per
// image × method), report.json (versioned schema, provenance, per-image
// records, dataset summary, verdicts) and report.html (a self-contained page
// for a projector: summary and verdicts first, inline SVG plots, a sortable
// table, a worst-first gallery, metric definitions).
//
// Every file is written atomically: a temporary file in the target
// directory, fsync, rename. A reader never sees a half-written report, and
// a crash leaves the previous report intact.
package report

import (
	"heedmap/explain/measure"
)

// Schema identifies the report.json layout. Bump the number on any change
// that removes or re-types a field; adding a field keeps it.
const Schema = "heedmap-report/1"

// Caution is printed at the top of the HTML page and stored in report.json.
const Caution = "Research and quality-assurance tool, not a diagnostic device; results do not replace clinical judgement, local regulation or licensed clinical practice."

// Report is everything the three files are written from.
//
// report.json fields (JSON names; SCHEMA.md documents every field with
// units, and TestSchemaDocumented keeps it complete):
//
//	schema       "heedmap-report/1"
//	caution      the caution text above
//	provenance   see Provenance
//	images       per-image records, see ImageRecord
//	failures     images that could not be measured: file, stage, reason
//	summary      dataset summary (measure.Summary): per-method statistics
//	             with 95 % intervals, breakdowns, worst-first flagged list
//	criteria_file path of the acceptance criteria file, "" when none
//	verdicts     one per criterion: the criterion, measured value, pass
//
// Every measured number is encoded as {"value": x} or, when undefined,
// {"value": null, "reason": "..."}.
type Report struct {
	Schema     string        `json:"schema"`
	Caution    string        `json:"caution"`
	Title      string        `json:"title"`
	Provenance Provenance    `json:"provenance"`
	Images     []ImageRecord `json:"images"`
	// Source, when set, yields the per-image records in place of Images;
	// see ImageSource.
	Source       ImageSource            `json:"-"`
	Failures     []Failure              `json:"failures"`
	Summary      *measure.Summary       `json:"summary"`
	CriteriaFile string                 `json:"criteria_file,omitempty"`
	Verdicts     []measure.Verdict      `json:"verdicts"`
	ColumnDocs   []Column               `json:"-"`
	Statistics   []measure.StatisticDoc `json:"-"`
}

// ImageSource yields a report's per-image records in order. The writers
// walk it (metrics.csv twice, report.json and report.html once each)
// instead of holding every record, so a source that decodes the records
// from disk one at a time writes a report of any size in flat memory; the
// page keeps only a trimmed copy of each record (no hot-region lists, no
// method parameters). Each record passed to f is f's to keep: a source
// must not reuse it. EachImage stops at f's first error and returns it.
type ImageSource interface {
	EachImage(f func(*ImageRecord) error) error
}

// eachImage walks the report's images: Source when set, else Images.
func (r *Report) eachImage(f func(*ImageRecord) error) error {
	if r.Source != nil {
		return r.Source.EachImage(f)
	}
	for i := range r.Images {
		if err := f(&r.Images[i]); err != nil {
			return err
		}
	}
	return nil
}

// ImageRecord is one image's measurements plus where its files are.
// Paths in Overlays and Panel are relative to the report directory (for
// example "overlays/img001.occlusion.png", "panels/img001.png").
type ImageRecord struct {
	measure.Image
	File     string `json:"file"`
	MaskFile string `json:"mask_file,omitempty"`
	// ArtefactFiles maps an artefact category to its mask file.
	ArtefactFiles map[string]string `json:"artefact_files,omitempty"`
	Overlays      map[string]string `json:"overlays,omitempty"` // method → relative PNG path
	Panel         string            `json:"panel,omitempty"`
	// Attributions are, per method in run order, the target, settings and
	// warnings behind Results.
	Attributions []Attribution `json:"attributions,omitempty"`
}

// Failure is an image that could not be measured.
type Failure struct {
	File   string `json:"file"`
	Stage  string `json:"stage"` // e.g. "decode", "mask", "model", "method:rise"
	Reason string `json:"reason"`
}
