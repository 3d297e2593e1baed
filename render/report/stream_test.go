package report

import (
	"bytes"
	"encoding/json"
	"errors"
	"testing"

	"heedmap/explain/measure"
)

// sliceSource yields copies of a slice's records, as a source that decodes
// each record afresh from disk would, and counts its passes.
type sliceSource struct {
	images []ImageRecord
	passes int
	failAt int // yield this many records, then fail; <0 never
}

var errSource = errors.New("record unreadable")

func (s *sliceSource) EachImage(f func(*ImageRecord) error) error {
	s.passes++
	for i := range s.images {
		if i == s.failAt {
			return errSource
		}
		c := s.images[i]
		if err := f(&c); err != nil {
			return err
		}
	}
	return nil
}

// The streamed report.json is byte for byte what encoding/json's indenting
// Encoder writes for the whole report held in memory (the reference here is
// the standard library, not our writer).
func TestJSONStreamMatchesEncoder(t *testing.T) {
	for _, n := range []int{0, 1, 14} {
		r := syntheticReport(t, "")
		r.Images = r.Images[:n]
		ref := *r
		ref.Schema, ref.Caution = Schema, Caution
		if ref.Failures == nil {
			ref.Failures = []Failure{}
		}
		if ref.Verdicts == nil {
			ref.Verdicts = []measure.Verdict{}
		}
		if n == 0 {
			ref.Images = []ImageRecord{}
		}
		var want bytes.Buffer
		enc := json.NewEncoder(&want)
		enc.SetIndent("", "  ")
		if err := enc.Encode(&ref); err != nil {
			t.Fatal(err)
		}
		var got bytes.Buffer
		if err := WriteJSON(&got, r); err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(got.Bytes(), want.Bytes()) {
			t.Errorf("%d images: streamed JSON differs from encoding/json (%d vs %d bytes)", n, got.Len(), want.Len())
		}
	}
}

// A report whose records come from a Source writes the same three files as
// one holding them, and the page does not need the parts pageRecord drops.
func TestSourceWritesSameFiles(t *testing.T) {
	held := syntheticReport(t, "")
	hot := 0
	for _, im := range held.Images {
		for _, res := range im.Results {
			hot += len(res.HotRegions)
		}
	}
	if hot == 0 {
		t.Fatal("fixture has no hot regions; the comparison would not cover them")
	}
	for _, w := range []struct {
		name   string
		write  func(*bytes.Buffer, *Report) error
		passes int
	}{
		{"metrics.csv", func(b *bytes.Buffer, r *Report) error { return WriteCSV(b, r) }, 2},
		{"report.json", func(b *bytes.Buffer, r *Report) error { return WriteJSON(b, r) }, 1},
		{"report.html", func(b *bytes.Buffer, r *Report) error { return WriteHTML(b, r) }, 1},
	} {
		var want, got bytes.Buffer
		if err := w.write(&want, held); err != nil {
			t.Fatal(err)
		}
		streamed := *held
		src := &sliceSource{images: held.Images, failAt: -1}
		streamed.Images, streamed.Source = nil, src
		if err := w.write(&got, &streamed); err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(got.Bytes(), want.Bytes()) {
			t.Errorf("%s from a source differs from the held report (%d vs %d bytes)", w.name, got.Len(), want.Len())
		}
		if src.passes != w.passes {
			t.Errorf("%s read the source %d times, want %d", w.name, src.passes, w.passes)
		}
		if streamed.Source != src || streamed.Images != nil {
			t.Errorf("%s changed the caller's report", w.name)
		}
	}
}

// A source that fails stops every writer with its error.
func TestSourceErrorStopsWriters(t *testing.T) {
	r := syntheticReport(t, "")
	r.Source, r.Images = &sliceSource{images: r.Images, failAt: 3}, nil
	for name, write := range map[string]func(*bytes.Buffer, *Report) error{
		"csv":  func(b *bytes.Buffer, r *Report) error { return WriteCSV(b, r) },
		"json": func(b *bytes.Buffer, r *Report) error { return WriteJSON(b, r) },
		"html": func(b *bytes.Buffer, r *Report) error { return WriteHTML(b, r) },
	} {
		var b bytes.Buffer
		if err := write(&b, r); !errors.Is(err, errSource) {
			t.Errorf("%s: error %v, want the source's", name, err)
		}
	}
	r.Source = &sliceSource{images: r.Source.(*sliceSource).images, failAt: 0}
	if err := r.HashInputs(); !errors.Is(err, errSource) {
		t.Errorf("HashInputs: error %v, want the source's", err)
	}
}
