package report

import (
	"encoding/json"
	"fmt"
	"io"
	"os"
	"path/filepath"

	"heedmap/explain/measure"
)

// WriteJSON writes report.json, indented for diffing.
func WriteJSON(w io.Writer, r *Report) error {
	out := *r
	if out.Schema == "" {
		out.Schema = Schema
	}
	if out.Caution == "" {
		out.Caution = Caution
	}
	if out.Failures == nil {
		out.Failures = []Failure{}
	}
	if out.Verdicts == nil {
		out.Verdicts = []measure.Verdict{}
	}
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(&out)
}

// WriteAll writes metrics.csv, report.json and report.html into dir (which
// must exist), each atomically. Overlays and panels are the caller's; the
// HTML refers to them by the relative paths in the records.
func WriteAll(dir string, r *Report) error {
	if r.Schema == "" {
		r.Schema = Schema
	}
	if r.Caution == "" {
		r.Caution = Caution
	}
	if fi, err := os.Stat(dir); err != nil || !fi.IsDir() {
		return fmt.Errorf("report: output directory %s: not a directory (%v)", dir, err)
	}
	files := []struct {
		name  string
		write func(io.Writer, *Report) error
	}{{"metrics.csv", WriteCSV}, {"report.json", WriteJSON}, {"report.html", WriteHTML}}
	for _, f := range files {
		if err := WriteFileAtomic(filepath.Join(dir, f.name), func(w io.Writer) error { return f.write(w, r) }); err != nil {
			return err
		}
	}
	return nil
}
