// Package batch runs per-image work over a folder or manifest of images:
// discovery, validation before any heavy work, a bounded worker pool,
// progress, clean cancellation, crash-safe per-image records with resume,
// sharding across machines and merging of shard outputs.
//
// The per-image work itself (preprocess, attribution, measures, rendering)
// is a Worker supplied by the caller, so this package knows nothing about
// models and is tested with a deterministic worker.
//
// Output layout under the output folder OUT:
//
//	OUT/records/KEY.json   one record per finished image (ok or error)
//	OUT/FOLDER/NAME...     files a worker writes for an image through Dest.Path,
//	                       e.g. overlays/NAME.grad-cam.png (NAME = SafeName(id))
//	OUT/index.json         the shard's plan: fingerprint, shard, id→key
//	OUT/metrics.csv        one row per planned image, rebuilt from records
//	                       (Runner.Table renames it when a report owns metrics.csv)
//	OUT/summary.json       counts of the last run
//
// KEY is the SHA-256 of the item's id, label, image bytes, mask bytes and
// artefact-mask bytes together with a caller fingerprint (model bytes and
// resolved configuration), so a rerun skips exactly the work whose inputs
// did not change. The id is part of the key so that two ids with identical
// bytes keep separate rows.
package batch

import (
	"encoding/csv"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"sort"
	"strings"
)

// Item is one image to process.
type Item struct {
	ID    string
	Image string // path to the image file
	Mask  string // path to the lesion mask, "" when none
	Label string // ground-truth class from a manifest, "" when unknown
	// Artefacts maps an artefact name to its mask path; "" means the
	// manifest says the artefact is absent.
	Artefacts map[string]string
	// Problem is set when listing already shows the item cannot be
	// processed (its mask is missing); Validate turns it into the item's
	// error record.
	Problem string
	// Key is filled in by Validate.
	Key string
}

// ImageExts are the file extensions discovered in an image folder.
var imageExts = []string{".png", ".jpg", ".jpeg"}

func isImage(name string) bool {
	ext := strings.ToLower(filepath.Ext(name))
	for _, e := range imageExts {
		if ext == e {
			return true
		}
	}
	return false
}

// Input describes where the images are.
type Input struct {
	// Images is a folder of images or a CSV manifest (a file ending in .csv).
	Images string
	// Masks is a folder of masks paired with images by file stem plus
	// MaskSuffix (image a.png pairs with mask a{suffix}.png/.jpg/.jpeg).
	// Ignored for manifests, which name their masks.
	Masks      string
	MaskSuffix string
	// Artefacts is a folder of artefact masks for folder input, one
	// subfolder per category: Artefacts/CATEGORY/STEM.png where STEM is
	// the image stem plus MaskSuffix, like the lesion masks. An image with
	// no file in a category's folder does not show that artefact.
	// Manifests name their artefact masks in artifact:NAME columns.
	Artefacts string
}

// Discover lists the items of in, sorted by id, and the problems found
// while listing (for example an image without a mask). Only an unreadable
// folder or manifest is an error.
func Discover(in Input) ([]Item, []Problem, error) {
	st, err := os.Stat(in.Images)
	if err != nil {
		return nil, nil, fmt.Errorf("images: %w", err)
	}
	if !st.IsDir() {
		if !strings.EqualFold(filepath.Ext(in.Images), ".csv") {
			return nil, nil, fmt.Errorf("images: %s is neither a folder nor a .csv manifest", in.Images)
		}
		f, err := os.Open(in.Images)
		if err != nil {
			return nil, nil, err
		}
		defer f.Close()
		items, probs, err := ReadManifest(f, filepath.Dir(in.Images))
		if err != nil {
			return nil, nil, fmt.Errorf("manifest %s: %w", in.Images, err)
		}
		if in.Masks != "" {
			probs = append(probs, Problem{File: in.Masks, Reason: "masks folder ignored: the manifest names the masks", Warning: true})
		}
		if in.Artefacts != "" {
			probs = append(probs, Problem{File: in.Artefacts, Reason: "artefacts folder ignored: the manifest names artefact masks in artifact:NAME columns", Warning: true})
		}
		return items, probs, nil
	}
	ents, err := os.ReadDir(in.Images)
	if err != nil {
		return nil, nil, err
	}
	var masks map[string]string
	if in.Masks != "" {
		masks, err = maskIndex(in.Masks, in.MaskSuffix)
		if err != nil {
			return nil, nil, err
		}
	}
	var arts map[string]map[string]string // category → stem → path
	if in.Artefacts != "" {
		cats, err := os.ReadDir(in.Artefacts)
		if err != nil {
			return nil, nil, fmt.Errorf("artefacts: %w", err)
		}
		arts = map[string]map[string]string{}
		for _, c := range cats {
			if !c.IsDir() {
				continue
			}
			m, err := maskIndex(filepath.Join(in.Artefacts, c.Name()), in.MaskSuffix)
			if err != nil {
				return nil, nil, fmt.Errorf("artefacts: %w", err)
			}
			arts[c.Name()] = m
		}
		if len(arts) == 0 {
			return nil, nil, fmt.Errorf("artefacts: %s has no category subfolders (want %s/CATEGORY/STEM.png)", in.Artefacts, in.Artefacts)
		}
	}
	var items []Item
	var probs []Problem
	seen := map[string]string{}
	for _, e := range ents {
		if e.IsDir() || !isImage(e.Name()) {
			continue
		}
		id := strings.TrimSuffix(e.Name(), filepath.Ext(e.Name()))
		path := filepath.Join(in.Images, e.Name())
		if other, dup := seen[id]; dup {
			probs = append(probs, Problem{ID: id, File: path, Reason: "duplicate id: same stem as " + other})
			continue
		}
		seen[id] = path
		it := Item{ID: id, Image: path}
		if masks != nil {
			if m, ok := masks[id]; ok {
				it.Mask = m
			} else {
				it.Problem = fmt.Sprintf("%s: missing mask: no %s%s.png/.jpg in %s", path, id, in.MaskSuffix, in.Masks)
			}
		}
		if arts != nil {
			it.Artefacts = map[string]string{}
			for cat, m := range arts {
				it.Artefacts[cat] = m[id] // "" when the image does not show it
			}
		}
		items = append(items, it)
	}
	sort.Slice(items, func(i, j int) bool { return items[i].ID < items[j].ID })
	return items, probs, nil
}

// maskIndex maps an image stem to its mask path.
func maskIndex(dir, suffix string) (map[string]string, error) {
	ents, err := os.ReadDir(dir)
	if err != nil {
		return nil, fmt.Errorf("masks: %w", err)
	}
	m := map[string]string{}
	for _, e := range ents {
		if e.IsDir() || !isImage(e.Name()) {
			continue
		}
		stem := strings.TrimSuffix(e.Name(), filepath.Ext(e.Name()))
		id, ok := strings.CutSuffix(stem, suffix)
		if !ok {
			continue
		}
		if _, dup := m[id]; !dup || strings.EqualFold(filepath.Ext(e.Name()), ".png") {
			m[id] = filepath.Join(dir, e.Name()) // prefer PNG (lossless) when both exist
		}
	}
	return m, nil
}

// ReadManifest reads a CSV manifest with a header row. Columns: id and
// image (required), mask and label (optional), artifact:NAME (optional,
// one per artefact: a mask path, or empty when absent). Relative paths are
// resolved against dir. Rows with problems are reported, not fatal.
func ReadManifest(r io.Reader, dir string) ([]Item, []Problem, error) {
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1
	head, err := cr.Read()
	if err != nil {
		return nil, nil, fmt.Errorf("header: %w", err)
	}
	col := map[string]int{}
	var arts []string
	var probs []Problem
	for i, h := range head {
		h = strings.TrimSpace(strings.TrimPrefix(h, "\ufeff"))
		if _, dup := col[h]; dup {
			return nil, nil, fmt.Errorf("duplicate column %q", h)
		}
		col[h] = i
		if name, ok := strings.CutPrefix(h, "artifact:"); ok {
			if name == "" {
				return nil, nil, fmt.Errorf("column %d: empty artefact name", i+1)
			}
			arts = append(arts, name)
		} else if h != "id" && h != "image" && h != "mask" && h != "label" {
			probs = append(probs, Problem{Reason: fmt.Sprintf("unknown manifest column %q ignored", h), Warning: true})
		}
	}
	for _, need := range []string{"id", "image"} {
		if _, ok := col[need]; !ok {
			return nil, nil, fmt.Errorf("missing required column %q (have %v)", need, head)
		}
	}
	get := func(row []string, name string) string {
		i, ok := col[name]
		if !ok || i >= len(row) {
			return ""
		}
		return strings.TrimSpace(row[i])
	}
	resolve := func(p string) string {
		if p == "" || filepath.IsAbs(p) {
			return p
		}
		return filepath.Join(dir, filepath.FromSlash(p))
	}
	var items []Item
	seen := map[string]int{}
	for line := 2; ; line++ {
		row, err := cr.Read()
		if err == io.EOF {
			break
		}
		if err != nil {
			return nil, nil, err
		}
		id := get(row, "id")
		if id == "" {
			probs = append(probs, Problem{Reason: fmt.Sprintf("line %d: empty id; row skipped", line)})
			continue
		}
		if prev, dup := seen[id]; dup {
			probs = append(probs, Problem{ID: id, Reason: fmt.Sprintf("line %d: duplicate id (first on line %d); row skipped", line, prev)})
			continue
		}
		seen[id] = line
		it := Item{ID: id, Image: resolve(get(row, "image")), Mask: resolve(get(row, "mask")), Label: get(row, "label")}
		if it.Image == "" {
			probs = append(probs, Problem{ID: id, Reason: fmt.Sprintf("line %d: empty image path", line)})
		}
		if _, hasMasks := col["mask"]; hasMasks && it.Mask == "" && it.Image != "" {
			// A manifest with a mask column promises a mask per image; a
			// blank one is a missing mask, not an image without a lesion.
			it.Problem = fmt.Sprintf("%s: missing mask: the manifest's mask column is empty on line %d", it.Image, line)
		}
		if len(arts) > 0 {
			it.Artefacts = map[string]string{}
			for _, a := range arts {
				it.Artefacts[a] = resolve(get(row, "artifact:"+a))
			}
		}
		items = append(items, it)
	}
	sort.Slice(items, func(i, j int) bool { return items[i].ID < items[j].ID })
	return items, probs, nil
}
