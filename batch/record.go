package batch

import (
	"bytes"
	"crypto/sha256"
	"encoding/csv"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
)

// Record is the durable result for one image. It holds no timestamps or
// host names, so the same inputs give byte-identical records on any machine.
type Record struct {
	Key    string `json:"key"`
	ID     string `json:"id"`
	Image  string `json:"image"`
	Mask   string `json:"mask,omitempty"`
	Label  string `json:"label,omitempty"`
	Status string `json:"status"` // StatusOK or StatusError
	// Error names the file and the reason when Status is StatusError.
	Error string `json:"error,omitempty"`
	// Info holds string results (predicted class, target used...).
	Info map[string]string `json:"info,omitempty"`
	// Metrics holds numeric results; non-finite values are dropped.
	Metrics map[string]float64 `json:"metrics,omitempty"`
	// Files lists outputs written for the image, relative to OUT, with
	// forward slashes.
	Files []string `json:"files,omitempty"`
	// Detail is the worker's own structured result (for example full
	// measurements for a report), stored verbatim.
	Detail json.RawMessage `json:"detail,omitempty"`
}

// Record statuses.
const (
	StatusOK    = "ok"
	StatusError = "error"
)

// Result is what a Worker returns for an image.
type Result struct {
	Info    map[string]string
	Metrics map[string]float64
	Files   []string // relative to OUT; Dest.Path makes them
	// Detail, if not nil, is marshalled to JSON into Record.Detail. It must
	// marshal deterministically (no maps of floats keyed by time...) for
	// reruns to give identical records.
	Detail any
}

// SafeName turns an id into a single path element that cannot escape a
// folder: characters outside [A-Za-z0-9._-] become '_', leading dots are
// dropped, and the length is bounded. When anything had to change, the
// first 8 hex digits of the id's SHA-256 are appended so distinct ids
// (say "a/b" and "a_b") keep distinct names.
func SafeName(id string) string {
	var b strings.Builder
	changed := false
	for _, r := range id {
		switch {
		case r >= 'a' && r <= 'z', r >= 'A' && r <= 'Z', r >= '0' && r <= '9', r == '-', r == '_', r == '.':
			b.WriteRune(r)
		default:
			b.WriteByte('_')
			changed = true
		}
	}
	s := b.String()
	if t := strings.TrimLeft(s, "."); t != s {
		s, changed = t, true
	}
	if len(s) > 80 {
		s, changed = s[:80], true
	}
	if s == "" {
		changed = true
	}
	if changed {
		sum := sha256.Sum256([]byte(id))
		if s != "" {
			s += "-"
		}
		s += hex.EncodeToString(sum[:4])
	}
	return s
}

// within joins elem onto root and fails if the result is not inside root.
func within(root string, elem ...string) (string, error) {
	rel := filepath.Join(elem...)
	if !filepath.IsLocal(rel) {
		return "", fmt.Errorf("path %q escapes the output folder", rel)
	}
	return filepath.Join(root, rel), nil
}

// WriteFileAtomic writes data to path so that readers (and a rerun after a
// crash) see either the old file or the complete new one: temp file in the
// same folder, fsync, rename, fsync of the folder.
func WriteFileAtomic(path string, data []byte) error {
	dir := filepath.Dir(path)
	f, err := os.CreateTemp(dir, ".tmp-"+filepath.Base(path)+"-*")
	if err != nil {
		return err
	}
	tmp := f.Name()
	ok := false
	defer func() {
		if !ok {
			f.Close()
			os.Remove(tmp)
		}
	}()
	if _, err := f.Write(data); err != nil {
		return err
	}
	if err := f.Sync(); err != nil {
		return err
	}
	if err := f.Close(); err != nil {
		return err
	}
	if err := os.Rename(tmp, path); err != nil {
		return err
	}
	ok = true
	if d, err := os.Open(dir); err == nil {
		d.Sync() // best effort: not every filesystem supports syncing a folder
		d.Close()
	}
	return nil
}

func writeRecord(out string, r Record) error {
	for k, v := range r.Metrics {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			delete(r.Metrics, k)
		}
	}
	data, err := json.MarshalIndent(r, "", "  ")
	if err != nil {
		return err
	}
	p, err := within(out, "records", r.Key+".json")
	if err != nil {
		return err
	}
	return WriteFileAtomic(p, append(data, '\n'))
}

// readRecord returns the record for key, or ok=false if none is complete.
func readRecord(out, key string) (Record, bool) {
	p, err := within(out, "records", key+".json")
	if err != nil {
		return Record{}, false
	}
	data, err := os.ReadFile(p)
	if err != nil {
		return Record{}, false
	}
	var r Record
	if json.Unmarshal(data, &r) != nil || r.Key != key {
		return Record{}, false
	}
	return r, true
}

// MetricsCSV renders records as CSV sorted by id: id, status, label, the
// union of Info keys, the union of Metrics keys (each sorted), error.
// Floats use the shortest representation that round-trips.
func MetricsCSV(recs []Record) []byte {
	recs = append([]Record(nil), recs...)
	sort.Slice(recs, func(i, j int) bool { return recs[i].ID < recs[j].ID })
	infoSet, metSet := map[string]bool{}, map[string]bool{}
	for _, r := range recs {
		for k := range r.Info {
			infoSet[k] = true
		}
		for k := range r.Metrics {
			metSet[k] = true
		}
	}
	infos, mets := sortedKeys(infoSet), sortedKeys(metSet)
	var buf bytes.Buffer
	w := csv.NewWriter(&buf)
	head := append([]string{"id", "status", "label"}, infos...)
	head = append(head, mets...)
	w.Write(append(head, "error"))
	for _, r := range recs {
		row := []string{r.ID, r.Status, r.Label}
		for _, k := range infos {
			row = append(row, r.Info[k])
		}
		for _, k := range mets {
			v, ok := r.Metrics[k]
			if ok {
				row = append(row, strconv.FormatFloat(v, 'g', -1, 64))
			} else {
				row = append(row, "")
			}
		}
		w.Write(append(row, r.Error))
	}
	w.Flush()
	return buf.Bytes()
}

func sortedKeys(m map[string]bool) []string {
	out := make([]string, 0, len(m))
	for k := range m {
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}
