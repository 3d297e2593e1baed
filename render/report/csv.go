package report

import (
	"encoding/csv"
	"fmt"
	"io"
	"sort"
	"strconv"
	"strings"

	"heedmap/explain/measure"
)

// Column documents one metrics.csv column.
type Column struct {
	Name string `json:"name"`
	Unit string `json:"unit"`
	Doc  string `json:"doc"`
}

// metrics.csv has one row per image × method, in image order then method
// order. Empty cells mean "undefined"; the undefined_reason column says
// why. The columns, in order (see ColumnDocs for units):
//
//	image_id, image_file, true_class, pred_class, correctness, score,
//	method, sign, inside_mass, rank_accuracy, pointing_hit,
//	pointing_tolerance_px, peak_x, peak_y, peak_ties, band_mass, far_mass,
//	band_width_px, lesion_px, lesion_unseen_fraction, hot_regions, hot_top_mass, hot_top_area_px,
//	hot_top_bbox, flagged, flag_reasons, undefined_reason,
//	ig_completeness_gap, warnings,
//	then artefact_<category>_mass for every category in the dataset,
//	sorted by name.
var columns = []Column{
	{"image_id", "text", "image identifier"},
	{"image_file", "path", "image file as given on the command line"},
	{"true_class", "text", "true class label; empty when unknown"},
	{"pred_class", "text", "predicted class label"},
	{"correctness", "text", "correct, incorrect or unknown (no true label)"},
	{"score", "probability 0–1", "model score of the explained class"},
	{"method", "text", "attribution method"},
	{"sign", "text", "positive-part (max(A,0)) or absolute-value (|A|) relevance convention"},
	{"inside_mass", "fraction 0–1", "relevance mass inside the lesion, Σ A⁺·M / Σ A⁺ (Arras et al. 2022)"},
	{"rank_accuracy", "fraction 0–1", "|top-K ∩ M| / K with K = lesion pixels; ties shared fractionally (Arras et al. 2022)"},
	{"pointing_hit", "0 or 1", "1 when the map's maximum lies within the pointing tolerance of the lesion (Zhang et al. 2016)"},
	{"pointing_tolerance_px", "model-input pixels", "pointing tolerance used: 15 px per 224 px of the shorter input side by default"},
	{"peak_x", "model-input pixels", "column of the first maximum in row-major order"},
	{"peak_y", "model-input pixels", "row of the first maximum in row-major order"},
	{"peak_ties", "pixels", "number of pixels sharing the maximum"},
	{"band_mass", "fraction 0–1", "relevance mass in the peri-lesional band"},
	{"far_mass", "fraction 0–1", "relevance mass beyond the band; inside + band + far = 1"},
	{"band_width_px", "model-input pixels", "band width: fraction (default 0.25) of the lesion's equivalent diameter 2·sqrt(area/π)"},
	{"lesion_px", "model-input pixels", "lesion area seen by the model"},
	{"lesion_unseen_fraction", "fraction 0–1", "share of the source mask's lesion pixels the model never saw (cropped away by the resize); empty when not measured"},
	{"hot_regions", "count", "off-lesion hot regions: 8-connected components of the top q % (default 5 %) of relevance beyond the band"},
	{"hot_top_mass", "fraction 0–1", "relevance mass of the largest-mass hot region"},
	{"hot_top_area_px", "model-input pixels", "area of the largest-mass hot region"},
	{"hot_top_bbox", "model-input pixels", "inclusive bounding box x0 y0 x1 y1 of the largest-mass hot region"},
	{"flagged", "0 or 1", "1 when inside_mass < the inside threshold (default 0.5) or any artefact mass > its threshold (default 0.2)"},
	{"flag_reasons", "text", "why the row is flagged, separated by \"; \""},
	{"undefined_reason", "text", "why empty cells are undefined (empty mask, no positive relevance, lesion outside the view...)"},
	{"ig_completeness_gap", "fraction (0.05 = 5 %)", "integrated gradients' relative completeness gap |Σ IG − (F(x) − F(x′))| / |F(x) − F(x′)| with F the explained score and x′ the baseline (Sundararajan et al. 2017); the absolute residual |Σ IG| when F(x) = F(x′); empty for other methods"},
	{"warnings", "text", "the method's warnings for this image (default black occlusion fill, completeness gap above 5 %...), separated by \"; \""},
}

// artefactColumn documents the per-category columns.
var artefactColumn = Column{"artefact_<category>_mass", "fraction 0–1", "relevance mass on the category's mask; one column per category in the dataset"}

// ColumnDocs returns the metrics.csv column documentation in column order,
// with the per-artefact pattern last.
func ColumnDocs() []Column {
	return append(append([]Column(nil), columns...), artefactColumn)
}

func cell(v measure.Value) string {
	if !v.OK {
		return ""
	}
	return strconv.FormatFloat(v.V, 'g', 6, 64)
}

func num(x float64) string { return strconv.FormatFloat(x, 'g', 6, 64) }

// artefactCategories lists every category in the records, sorted.
func artefactCategories(images []ImageRecord) []string {
	set := map[string]bool{}
	for i := range images {
		addCategories(set, &images[i])
	}
	return sortedKeys(set)
}

func addCategories(set map[string]bool, im *ImageRecord) {
	for _, r := range im.Results {
		for k := range r.ArtefactMass {
			set[k] = true
		}
	}
}

func sortedKeys(set map[string]bool) []string {
	out := make([]string, 0, len(set))
	for k := range set {
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}

// WriteCSV writes metrics.csv.
func WriteCSV(w io.Writer, r *Report) error {
	cw := csv.NewWriter(w)
	set := map[string]bool{}
	if err := r.eachImage(func(im *ImageRecord) error { addCategories(set, im); return nil }); err != nil {
		return err
	}
	cats := sortedKeys(set)
	head := make([]string, 0, len(columns)+len(cats))
	for _, c := range columns {
		head = append(head, c.Name)
	}
	for _, c := range cats {
		head = append(head, "artefact_"+c+"_mass")
	}
	if err := cw.Write(head); err != nil {
		return err
	}
	opt := measure.DefaultSummaryOptions()
	if r.Summary != nil {
		opt = r.Summary.Options
	}
	err := r.eachImage(func(im *ImageRecord) error {
		for i := range im.Results {
			res := &im.Results[i]
			var reasons []string
			addReason := func(name string, v measure.Value) {
				if !v.OK {
					reasons = append(reasons, name+": "+v.Reason)
				}
			}
			sign, _ := res.Sign.MarshalText()
			row := []string{im.ID, im.File, im.TrueClass, im.PredClass, im.Correctness(), num(im.Score),
				res.Method, string(sign), cell(res.InsideMass), cell(res.RankAccuracy), cell(res.PointingHit),
				num(res.TolerancePx), strconv.Itoa(res.PeakX), strconv.Itoa(res.PeakY), strconv.Itoa(res.PeakTies),
				cell(res.BandMass), cell(res.FarMass), num(res.BandWidthPx), strconv.Itoa(res.LesionPixels), cell(res.LesionUnseen)}
			if res.HotThreshold.OK {
				row = append(row, strconv.Itoa(len(res.HotRegions)))
				if len(res.HotRegions) > 0 {
					h := res.HotRegions[0]
					row = append(row, num(h.Mass), strconv.Itoa(h.AreaPx), fmt.Sprintf("%d %d %d %d", h.X0, h.Y0, h.X1, h.Y1))
				} else {
					row = append(row, "", "", "")
				}
			} else {
				row = append(row, "", "", "", "")
			}
			f, why := measure.IsFlagged(res, opt)
			fl := "0"
			if f {
				fl = "1"
			}
			if res.Undefined != "" {
				fl = ""
			}
			row = append(row, fl, strings.Join(why, "; "))
			if res.Undefined != "" {
				reasons = []string{res.Undefined}
			} else {
				addReason("inside_mass", res.InsideMass)
				// The lesion measures share one reason; name it once.
				if len(reasons) == 0 {
					addReason("rank_accuracy", res.RankAccuracy)
					addReason("pointing_hit", res.PointingHit)
				}
				for _, c := range cats {
					if v, ok := res.ArtefactMass[c]; ok {
						addReason("artefact_"+c+"_mass", v)
					}
				}
			}
			row = append(row, strings.Join(reasons, "; "))
			gap, warn := "", ""
			if a := im.Attribution(res.Method); a != nil {
				if a.CompletenessGap != nil {
					gap = cell(*a.CompletenessGap)
				}
				warn = strings.Join(a.Warnings, "; ")
			}
			row = append(row, gap, warn)
			for _, c := range cats {
				row = append(row, cell(res.ArtefactMass[c]))
			}
			if err := cw.Write(row); err != nil {
				return err
			}
		}
		return nil
	})
	if err != nil {
		return err
	}
	cw.Flush()
	return cw.Error()
}
