package report

import (
	"bufio"
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"os"
	"path/filepath"

	"heedmap/explain/measure"
)

// WriteJSON writes report.json, indented for diffing. The images are
// encoded one at a time (see ImageSource); the bytes are those
// encoding/json's indenting Encoder writes for the whole report.
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
	out.Images, out.Source = []ImageRecord{}, nil
	var frame bytes.Buffer
	enc := json.NewEncoder(&frame)
	enc.SetIndent("", "  ")
	if err := enc.Encode(&out); err != nil {
		return err
	}
	// The images array is the only top-level key at two spaces' indent
	// with an empty array; nested keys are indented further and string
	// values cannot hold a raw newline.
	const slot = "\n  \"images\": ["
	at := bytes.Index(frame.Bytes(), []byte(slot+"]"))
	if at < 0 {
		return fmt.Errorf("report: encoding report.json: no images slot")
	}
	head, tail := frame.Bytes()[:at+len(slot)], frame.Bytes()[at+len(slot):]
	bw := bufio.NewWriterSize(w, 1<<16)
	bw.Write(head)
	n := 0
	err := r.eachImage(func(im *ImageRecord) error {
		b, err := json.MarshalIndent(im, "    ", "  ")
		if err != nil {
			return fmt.Errorf("report: encoding image %s: %w", im.ID, err)
		}
		if n > 0 {
			bw.WriteByte(',')
		}
		n++
		bw.WriteString("\n    ")
		_, err = bw.Write(b)
		return err
	})
	if err != nil {
		return err
	}
	if n > 0 {
		bw.WriteString("\n  ")
	}
	bw.Write(tail)
	return bw.Flush()
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
