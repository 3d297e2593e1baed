package batch

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"sync"
	"time"
)

// Worker does the per-image work. Process must honour ctx (return ctx's
// error promptly when cancelled) and write any files under dst. A returned
// error becomes the image's error record; it should name the file and the
// reason. Process is called concurrently from several goroutines.
type Worker interface {
	Process(ctx context.Context, it Item, dst Dest) (Result, error)
}

// WorkerFunc adapts a function to Worker.
type WorkerFunc func(ctx context.Context, it Item, dst Dest) (Result, error)

// Process calls f.
func (f WorkerFunc) Process(ctx context.Context, it Item, dst Dest) (Result, error) {
	return f(ctx, it, dst)
}

// Dest is where a worker writes an image's files. Files are grouped by
// kind, one folder per kind directly under Out, and named after the image:
// Out/FOLDER/NAME+SUFFIX, for example overlays/img001.occlusion.png or
// panels/img001.png. NAME is SafeName(id), so an id can never lead a file
// out of Out, and distinct ids give distinct names.
type Dest struct {
	Out  string // the output folder
	Name string // SafeName of the image id
}

// Path returns Out/folder/Name+suffix, creating the folder, and the same
// path relative to Out (slash-separated) for Result.Files. folder must be
// one plain path element and suffix must not contain a separator, so the
// file stays in folder whatever the caller passes.
func (d Dest) Path(folder, suffix string) (abs, rel string, err error) {
	base := d.Name + suffix
	switch {
	case d.Name == "" || strings.ContainsAny(d.Name, `/\`) || !filepath.IsLocal(d.Name):
		return "", "", fmt.Errorf("output name %q is not a safe file name", d.Name)
	case strings.ContainsAny(folder, `/\`) || !filepath.IsLocal(folder) || folder == "records":
		return "", "", fmt.Errorf("output folder %q must be one plain folder name other than records", folder)
	case strings.ContainsAny(suffix, `/\`) || !filepath.IsLocal(base):
		return "", "", fmt.Errorf("output suffix %q would leave folder %s", suffix, folder)
	}
	dir := filepath.Join(d.Out, folder)
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return "", "", err
	}
	return filepath.Join(dir, base), folder + "/" + base, nil
}

// Runner executes a Plan.
type Runner struct {
	Out     string
	Worker  Worker
	Workers int // 0 means runtime.NumCPU()
	// Progress receives progress output (nil: none). Terminal selects a
	// redrawn bar; otherwise a line is printed every Interval (default 10 s).
	Progress io.Writer
	Terminal bool
	Interval time.Duration
	// Table is the name of the per-image CSV written under Out; "" means
	// DefaultTable. A caller that writes its own metrics.csv (a report)
	// picks another name.
	Table string
}

// DefaultTable is the per-image CSV's default name.
const DefaultTable = "metrics.csv"

func tableName(t string) string {
	if t == "" {
		return DefaultTable
	}
	return t
}

// Summary counts a run's outcome.
type Summary struct {
	Shard    string `json:"shard"`
	Planned  int    `json:"planned"`  // items of the shard, valid or not
	Skipped  int    `json:"skipped"`  // already recorded by an earlier run
	OK       int    `json:"ok"`       // records with status ok (new or earlier)
	Failed   int    `json:"failed"`   // records with status error (new or earlier)
	Invalid  int    `json:"invalid"`  // of Failed: rejected by validation
	Pending  int    `json:"pending"`  // not finished (interrupted run)
	Complete bool   `json:"complete"` // every planned item has a record
	Warnings int    `json:"warnings"` // warning problems
	Problems int    `json:"problems"` // non-warning problems
	Elapsed  string `json:"-"`        // wall time, not written (kept out of files)
	Rate     string `json:"-"`        // images per second of new work
	NewWork  int    `json:"-"`        // images processed in this run
}

// Index is OUT/index.json: what a shard planned, so merge can find its
// records and check the shards belong together.
type Index struct {
	Version     int          `json:"version"`
	Fingerprint string       `json:"fingerprint"`
	Shard       Shard        `json:"shard"`
	Items       []IndexEntry `json:"items"`
}

// IndexEntry pairs an id with its record key.
type IndexEntry struct {
	ID  string `json:"id"`
	Key string `json:"key"`
}

// Run processes every planned item without a record, writing each record as
// it finishes, then writes metrics.csv and summary.json from all records of
// the plan. On cancellation it stops handing out work, lets running workers
// return, writes the files for what finished and returns ctx's error with
// the summary; a rerun resumes.
func (r *Runner) Run(ctx context.Context, p *Plan) (Summary, error) {
	if r.Worker == nil {
		return Summary{}, errors.New("batch: no worker")
	}
	if err := os.MkdirAll(filepath.Join(r.Out, "records"), 0o755); err != nil {
		return Summary{}, err
	}
	idx := Index{Version: 1, Fingerprint: p.Fingerprint, Shard: p.Shard}
	for _, it := range p.Items {
		idx.Items = append(idx.Items, IndexEntry{it.ID, it.Key})
	}
	for _, it := range p.Invalid {
		idx.Items = append(idx.Items, IndexEntry{it.ID, it.Key})
	}
	sortIndex(idx.Items)
	if err := writeJSON(filepath.Join(r.Out, "index.json"), idx); err != nil {
		return Summary{}, err
	}

	// Invalid items get their error records straight away: cheap, and the
	// reason is then in the results, not only in a log.
	for _, it := range p.Invalid {
		if _, ok := readRecord(r.Out, it.Key); ok {
			continue
		}
		rec := Record{Key: it.Key, ID: it.ID, Image: it.Image, Mask: it.Mask, Label: it.Label, Status: StatusError, Error: it.Reason}
		if err := writeRecord(r.Out, rec); err != nil {
			return Summary{}, err
		}
	}
	var todo []Item
	skipped := 0
	for _, it := range p.Items {
		if _, ok := readRecord(r.Out, it.Key); ok {
			skipped++
			continue
		}
		todo = append(todo, it)
	}

	n := r.Workers
	if n <= 0 {
		n = runtime.NumCPU()
	}
	n = max(1, min(n, len(todo)))
	start := time.Now()
	prog := newProgress(r.Progress, r.Terminal, r.Interval, len(todo))
	prog.start()
	jobs := make(chan Item)
	var wg sync.WaitGroup
	var mu sync.Mutex
	var firstErr error
	for w := 0; w < n; w++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for it := range jobs {
				rec, err := r.one(ctx, it)
				if err != nil {
					if ctx.Err() != nil {
						continue // cancelled mid-image: leave it for the rerun
					}
					mu.Lock()
					if firstErr == nil {
						firstErr = err
					}
					mu.Unlock()
					continue
				}
				prog.done(rec.Status == StatusOK)
			}
		}()
	}
	var runErr error
feed:
	for _, it := range todo {
		select {
		case jobs <- it:
		case <-ctx.Done():
			runErr = ctx.Err()
			break feed
		}
	}
	close(jobs)
	wg.Wait()
	prog.stop()
	if runErr == nil && ctx.Err() != nil {
		runErr = ctx.Err()
	}
	if firstErr != nil && runErr == nil {
		runErr = firstErr // a record could not be written: disk trouble
	}

	sum, err := Finish(r.Out, idx, r.Table)
	if err != nil && runErr == nil {
		runErr = err
	}
	sum.Shard = p.Shard.String()
	sum.Skipped = skipped
	for _, pr := range p.Problems {
		if pr.Warning {
			sum.Warnings++
		} else {
			sum.Problems++
		}
	}
	sum.Invalid = len(p.Invalid)
	el := time.Since(start)
	sum.NewWork = prog.count()
	sum.Elapsed = el.Round(time.Millisecond).String()
	if el > 0 {
		sum.Rate = fmt.Sprintf("%.2f img/s", float64(sum.NewWork)/el.Seconds())
	}
	if err := writeJSON(filepath.Join(r.Out, "summary.json"), sum); err != nil && runErr == nil {
		runErr = err
	}
	return sum, runErr
}

// one processes an item and writes its record. It returns an error only
// when no record could be written (cancellation or disk failure).
func (r *Runner) one(ctx context.Context, it Item) (Record, error) {
	rec := Record{Key: it.Key, ID: it.ID, Image: it.Image, Mask: it.Mask, Label: it.Label}
	res, err := safeProcess(ctx, r.Worker, it, Dest{Out: r.Out, Name: SafeName(it.ID)})
	if err != nil {
		if ctx.Err() != nil {
			return Record{}, ctx.Err()
		}
		rec.Status, rec.Error = StatusError, err.Error()
	} else {
		rec.Status, rec.Info, rec.Metrics, rec.Files = StatusOK, res.Info, res.Metrics, res.Files
		if res.Detail != nil {
			d, err := json.Marshal(res.Detail)
			if err != nil {
				rec.Status, rec.Error = StatusError, fmt.Sprintf("%s: result detail: %v", it.Image, err)
				rec.Info, rec.Metrics, rec.Files = nil, nil, nil
			} else {
				rec.Detail = d
			}
		}
	}
	if err := writeRecord(r.Out, rec); err != nil {
		return Record{}, fmt.Errorf("record for %s: %w", it.ID, err)
	}
	return rec, nil
}

// safeProcess turns a worker panic into that image's error, so one bad
// image cannot stop the batch.
func safeProcess(ctx context.Context, w Worker, it Item, d Dest) (res Result, err error) {
	defer func() {
		if p := recover(); p != nil {
			err = fmt.Errorf("%s: internal error: %v", it.Image, p)
		}
	}()
	return w.Process(ctx, it, d)
}

// Finish rebuilds the per-image table (named table, "" for DefaultTable)
// from the records listed in idx and returns the counts. Items without a
// record count as pending.
func Finish(out string, idx Index, table string) (Summary, error) {
	var recs []Record
	s := Summary{Planned: len(idx.Items)}
	for _, e := range idx.Items {
		rec, ok := readRecord(out, e.Key)
		if !ok {
			s.Pending++
			continue
		}
		if rec.Status == StatusOK {
			s.OK++
		} else {
			s.Failed++
		}
		rec.Detail = nil // not in the table; keeps memory at a row per image
		recs = append(recs, rec)
	}
	s.Complete = s.Pending == 0
	return s, WriteFileAtomic(filepath.Join(out, tableName(table)), MetricsCSV(recs))
}

func writeJSON(path string, v any) error {
	data, err := json.MarshalIndent(v, "", "  ")
	if err != nil {
		return err
	}
	return WriteFileAtomic(path, append(data, '\n'))
}

// Records returns the records listed in idx that exist in out, in index
// order (by id). It holds every record at once; EachRecord does not.
func Records(out string, idx Index) []Record {
	var recs []Record
	_ = EachRecord(out, idx, func(r Record) error { // f never fails
		recs = append(recs, r)
		return nil
	})
	return recs
}

// EachRecord calls f with each record listed in idx that exists in out, in
// index order, reading one record at a time so that memory stays flat
// however many images the batch has. It stops at f's first error and
// returns it.
func EachRecord(out string, idx Index, f func(Record) error) error {
	for _, e := range idx.Items {
		if r, ok := readRecord(out, e.Key); ok {
			if err := f(r); err != nil {
				return err
			}
		}
	}
	return nil
}

// ReadIndex reads OUT/index.json.
func ReadIndex(out string) (Index, error) {
	var idx Index
	data, err := os.ReadFile(filepath.Join(out, "index.json"))
	if err != nil {
		return idx, err
	}
	if err := json.Unmarshal(data, &idx); err != nil {
		return idx, fmt.Errorf("%s: %w", filepath.Join(out, "index.json"), err)
	}
	return idx, nil
}

// Done counts the plan's items that already have a record in out (what a
// run would skip).
func (p *Plan) Done(out string) int {
	n := 0
	for _, it := range p.Items {
		if _, ok := readRecord(out, it.Key); ok {
			n++
		}
	}
	return n
}

// WriteProblems prints problems to w, at most limit lines plus a count of
// the rest, errors before warnings.
func WriteProblems(w io.Writer, probs []Problem, limit int) {
	var errs, warns []Problem
	for _, p := range probs {
		if p.Warning {
			warns = append(warns, p)
		} else {
			errs = append(errs, p)
		}
	}
	all := append(errs, warns...)
	if len(all) == 0 {
		return
	}
	fmt.Fprintf(w, "input problems: %d error(s), %d warning(s)\n", len(errs), len(warns))
	for i, p := range all {
		if i == limit {
			fmt.Fprintf(w, "  ... and %d more (all are in the error records and metrics.csv)\n", len(all)-limit)
			break
		}
		fmt.Fprintf(w, "  %s\n", p)
	}
}
