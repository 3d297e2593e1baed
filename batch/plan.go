package batch

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"hash/fnv"
	"image"
	_ "image/jpeg" // decoders for DecodeConfig
	_ "image/png"
	"io"
	"os"
	"sort"
	"strconv"
	"strings"
	"sync"
)

// Problem is one thing wrong with the input. Warnings do not stop an item;
// other problems make the item invalid: it is not given to the Worker and
// gets an error record instead.
type Problem struct {
	ID      string `json:"id,omitempty"`
	File    string `json:"file,omitempty"`
	Reason  string `json:"reason"`
	Warning bool   `json:"warning,omitempty"`
}

func (p Problem) String() string {
	var b strings.Builder
	if p.Warning {
		b.WriteString("warning: ")
	}
	if p.ID != "" {
		fmt.Fprintf(&b, "%s: ", p.ID)
	}
	if p.File != "" {
		fmt.Fprintf(&b, "%s: ", p.File)
	}
	b.WriteString(p.Reason)
	return b.String()
}

// Shard selects the items one of Count cooperating processes handles.
// The zero value (Count 0) means all items.
type Shard struct{ Index, Count int }

func (s Shard) String() string {
	if s.Count <= 1 {
		return "all"
	}
	return fmt.Sprintf("%d/%d", s.Index, s.Count)
}

// Has reports whether the item with this id belongs to the shard. The
// assignment is FNV-1a 64 of the id modulo Count: it depends only on the id,
// so it is the same on every machine and run, and does not shift when other
// images are added.
func (s Shard) Has(id string) bool {
	if s.Count <= 1 {
		return true
	}
	h := fnv.New64a()
	io.WriteString(h, id)
	return h.Sum64()%uint64(s.Count) == uint64(s.Index)
}

// ParseShard parses "I/N" with 0 ≤ I < N.
func ParseShard(s string) (Shard, error) {
	a, b, ok := strings.Cut(s, "/")
	if !ok {
		return Shard{}, fmt.Errorf("shard %q: want I/N, e.g. 0/4", s)
	}
	i, err1 := strconv.Atoi(strings.TrimSpace(a))
	n, err2 := strconv.Atoi(strings.TrimSpace(b))
	if err1 != nil || err2 != nil || n < 1 || i < 0 || i >= n {
		return Shard{}, fmt.Errorf("shard %q: want I/N with 0 <= I < N", s)
	}
	return Shard{i, n}, nil
}

// ResolveShard picks the shard from, in order: the flag value ("I/N"); a
// Slurm job array (SLURM_ARRAY_TASK_ID minus SLURM_ARRAY_TASK_MIN, of
// SLURM_ARRAY_TASK_COUNT); a Kubernetes Indexed Job (JOB_COMPLETION_INDEX,
// of HEEDMAP_SHARD_COUNT, which the manifest must set to the completions).
// getenv is os.Getenv in production. No source gives all items.
func ResolveShard(flagValue string, getenv func(string) string) (Shard, string, error) {
	if flagValue != "" {
		s, err := ParseShard(flagValue)
		return s, "--shard", err
	}
	if id := getenv("SLURM_ARRAY_TASK_ID"); id != "" {
		cnt := getenv("SLURM_ARRAY_TASK_COUNT")
		i, err1 := strconv.Atoi(id)
		n, err2 := strconv.Atoi(cnt)
		if err1 != nil || err2 != nil {
			return Shard{}, "slurm", fmt.Errorf("SLURM_ARRAY_TASK_ID=%q SLURM_ARRAY_TASK_COUNT=%q: not integers", id, cnt)
		}
		if m := getenv("SLURM_ARRAY_TASK_MIN"); m != "" {
			lo, err := strconv.Atoi(m)
			if err != nil {
				return Shard{}, "slurm", fmt.Errorf("SLURM_ARRAY_TASK_MIN=%q: not an integer", m)
			}
			i -= lo
		}
		s, err := ParseShard(fmt.Sprintf("%d/%d", i, n))
		if err != nil {
			err = fmt.Errorf("slurm array (use a contiguous --array range such as 0-%d): %w", n-1, err)
		}
		return s, "slurm", err
	}
	if id := getenv("JOB_COMPLETION_INDEX"); id != "" {
		cnt := getenv("HEEDMAP_SHARD_COUNT")
		if cnt == "" {
			return Shard{}, "kubernetes", errors.New("JOB_COMPLETION_INDEX is set but HEEDMAP_SHARD_COUNT is not: set it to the Job's completions")
		}
		s, err := ParseShard(id + "/" + cnt)
		return s, "kubernetes", err
	}
	return Shard{}, "", nil
}

// Plan is validated work for one shard.
type Plan struct {
	Fingerprint string
	Shard       Shard
	Items       []Item    // valid items of the shard, sorted by id, keys set
	Invalid     []Invalid // items of the shard that cannot be processed
	Problems    []Problem // everything found, including warnings
	Discovered  int       // items before sharding
}

// Invalid is an item that failed validation, with the reason recorded in
// its error record.
type Invalid struct {
	Item
	Reason string
}

// Checks are the validation settings that depend on the run.
type Checks struct {
	// Workers is the number of goroutines hashing files (at least 1).
	Workers int
	// ResizeMasks accepts lesion and artefact masks of another size than
	// their image (the worker resamples them); otherwise a size mismatch
	// makes the item invalid.
	ResizeMasks bool
}

// Validate checks every item of the shard before any heavy work: files
// exist and decode as images (header only), a mask that was expected is
// present, lesion and artefact masks match their image's size (unless
// c.ResizeMasks). It hashes file contents into each item's key; hashing
// streams files and runs on up to c.Workers goroutines. fingerprint
// identifies the model and the resolved configuration and enters every key.
func Validate(ctx context.Context, items []Item, probs []Problem, shard Shard, fingerprint string, c Checks) (*Plan, error) {
	workers := c.Workers
	p := &Plan{Fingerprint: fingerprint, Shard: shard, Problems: append([]Problem(nil), probs...), Discovered: len(items)}
	var mine []Item
	for _, it := range items {
		if shard.Has(it.ID) {
			mine = append(mine, it)
		}
	}
	if workers < 1 {
		workers = 1
	}
	type res struct {
		key    string
		reason string
		warn   []Problem
	}
	out := make([]res, len(mine))
	idx := make(chan int)
	var wg sync.WaitGroup
	for w := 0; w < workers; w++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range idx {
				k, reason, warn := check(mine[i], fingerprint, c.ResizeMasks)
				out[i] = res{k, reason, warn}
			}
		}()
	}
	var err error
feed:
	for i := range mine {
		select {
		case idx <- i:
		case <-ctx.Done():
			err = ctx.Err()
			break feed
		}
	}
	close(idx)
	wg.Wait()
	if err != nil {
		return nil, err
	}
	for i, it := range mine {
		r := out[i]
		p.Problems = append(p.Problems, r.warn...)
		if r.reason != "" {
			it.Key = invalidKey(it, fingerprint, r.reason)
			p.Invalid = append(p.Invalid, Invalid{it, r.reason})
			p.Problems = append(p.Problems, Problem{ID: it.ID, Reason: r.reason})
			continue
		}
		it.Key = r.key
		p.Items = append(p.Items, it)
	}
	return p, nil
}

// check validates one item and computes its key; reason is "" when valid.
func check(it Item, fingerprint string, resizeMasks bool) (key, reason string, warn []Problem) {
	if it.Image == "" {
		return "", "no image path", nil
	}
	h := sha256.New()
	fmt.Fprintf(h, "heedmap-record-v1\x00%s\x00%s\x00%s\x00", fingerprint, it.ID, it.Label)
	w, hgt, err := hashImage(h, it.Image)
	if err != nil {
		return "", err.Error(), nil
	}
	if it.Problem != "" {
		return "", it.Problem, nil
	}
	part := func(kind, path string) string {
		fmt.Fprintf(h, "%s\x00", kind)
		if path == "" {
			return ""
		}
		mw, mh, err := hashImage(h, path)
		if err != nil {
			return kind + " " + err.Error()
		}
		if (mw != w || mh != hgt) && !resizeMasks {
			return fmt.Sprintf("%s %s is %d×%d but image %s is %d×%d (--mask-resize allows resampling)", kind, path, mw, mh, it.Image, w, hgt)
		}
		return ""
	}
	if r := part("mask", it.Mask); r != "" {
		return "", r, nil
	}
	names := make([]string, 0, len(it.Artefacts))
	for n := range it.Artefacts {
		names = append(names, n)
	}
	sort.Strings(names)
	for _, n := range names {
		// An unreadable or misfitting artefact mask is an error, not a
		// silently missing measure: the report would otherwise understate
		// the evidence on that artefact for this image.
		if r := part("artifact:"+n, it.Artefacts[n]); r != "" {
			return "", r, nil
		}
	}
	return hex.EncodeToString(h.Sum(nil)), "", nil
}

// hashImage streams a file into h and decodes its header.
func hashImage(h io.Writer, path string) (w, hgt int, err error) {
	f, err := os.Open(path)
	if err != nil {
		return 0, 0, fmt.Errorf("%s: %w", path, unwrapPathErr(err))
	}
	defer f.Close()
	if st, err := f.Stat(); err != nil {
		return 0, 0, fmt.Errorf("%s: %w", path, unwrapPathErr(err))
	} else if !st.Mode().IsRegular() {
		kind := "is not a regular file"
		if st.IsDir() {
			kind = "is a directory"
		}
		return 0, 0, fmt.Errorf("%s: %s, not an image file", path, kind)
	}
	cfg, format, err := image.DecodeConfig(f)
	if err != nil {
		return 0, 0, fmt.Errorf("%s: not a readable PNG or JPEG image (%v)", path, err)
	}
	if cfg.Width < 1 || cfg.Height < 1 || cfg.Width > 1<<15 || cfg.Height > 1<<15 {
		return 0, 0, fmt.Errorf("%s: %s image of %d×%d pixels out of range", path, format, cfg.Width, cfg.Height)
	}
	if _, err := f.Seek(0, io.SeekStart); err != nil {
		return 0, 0, err
	}
	if _, err := io.Copy(h, f); err != nil {
		return 0, 0, fmt.Errorf("%s: %w", path, err)
	}
	return cfg.Width, cfg.Height, nil
}

func unwrapPathErr(err error) error {
	var pe *os.PathError
	if errors.As(err, &pe) {
		return pe.Err
	}
	return err
}

// invalidKey keys an invalid item by its description, so fixing the input
// (which changes the reason or makes the item valid) leads to new work.
func invalidKey(it Item, fingerprint, reason string) string {
	h := sha256.New()
	fmt.Fprintf(h, "heedmap-invalid-v1\x00%s\x00%s\x00%s\x00%s\x00%s", fingerprint, it.ID, it.Image, it.Mask, reason)
	return hex.EncodeToString(h.Sum(nil))
}
