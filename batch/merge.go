package batch

import (
	"fmt"
	"io"
	"os"
	"path/filepath"
	"sort"
)

func sortIndex(e []IndexEntry) {
	sort.Slice(e, func(i, j int) bool { return e[i].ID < e[j].ID })
}

// MergeOptions: Table is the per-image CSV name ("" = DefaultTable); Extra
// names files (such as the resolved config) copied from the first shard.
type MergeOptions struct {
	Table string
	Extra []string
}

// MergeReport says what Merge found.
type MergeReport struct {
	Summary Summary
	Shards  int      // shard folders read
	Missing []string // shard indices "I/N" absent from the inputs
}

// Merge combines shard output folders into out: it checks that the shards
// share a fingerprint and a shard count, copies every indexed record and
// the files each record lists, writes an index covering all shards and
// rebuilds the per-image table and summary.json. A missing shard is
// reported, not fatal; a mismatched one is an error.
func Merge(out string, shardDirs []string, opt MergeOptions) (MergeReport, error) {
	var rep MergeReport
	if len(shardDirs) == 0 {
		return rep, fmt.Errorf("merge: no shard folders given")
	}
	merged := Index{Version: 1}
	seen := map[int]string{}
	count := -1
	byID := map[string]string{}
	for _, d := range shardDirs {
		idx, err := ReadIndex(d)
		if err != nil {
			return rep, fmt.Errorf("merge: %s is not a heedmap output folder: %w", d, err)
		}
		n := max(idx.Shard.Count, 1)
		if count == -1 {
			count, merged.Fingerprint = n, idx.Fingerprint
		} else if n != count {
			return rep, fmt.Errorf("merge: %s has shard count %d, %s has %d", d, n, shardDirs[0], count)
		} else if idx.Fingerprint != merged.Fingerprint {
			return rep, fmt.Errorf("merge: %s used a different model or configuration (fingerprint %.12s, first shard %.12s)", d, idx.Fingerprint, merged.Fingerprint)
		}
		if prev, dup := seen[idx.Shard.Index]; dup {
			return rep, fmt.Errorf("merge: %s and %s are both shard %d/%d", prev, d, idx.Shard.Index, n)
		}
		seen[idx.Shard.Index] = d
		if err := os.MkdirAll(filepath.Join(out, "records"), 0o755); err != nil {
			return rep, err
		}
		for _, e := range idx.Items {
			if k, dup := byID[e.ID]; dup && k != e.Key {
				return rep, fmt.Errorf("merge: id %q appears in two shards with different inputs", e.ID)
			}
			byID[e.ID] = e.Key
			merged.Items = append(merged.Items, e)
			rec, ok := readRecord(d, e.Key)
			if !ok {
				continue // pending in that shard; counted by Finish
			}
			if err := writeRecord(out, rec); err != nil {
				return rep, err
			}
			for _, f := range rec.Files {
				if err := copyListed(d, out, f); err != nil {
					return rep, err
				}
			}
		}
		rep.Shards++
	}
	for i := 0; i < count; i++ {
		if _, ok := seen[i]; !ok {
			rep.Missing = append(rep.Missing, fmt.Sprintf("%d/%d", i, count))
		}
	}
	for _, name := range opt.Extra {
		if filepath.IsLocal(name) {
			copyFile(filepath.Join(shardDirs[0], name), filepath.Join(out, name)) // optional files
		}
	}
	sortIndex(merged.Items)
	if err := writeJSON(filepath.Join(out, "index.json"), merged); err != nil {
		return rep, err
	}
	sum, err := Finish(out, merged, opt.Table)
	if err != nil {
		return rep, err
	}
	sum.Shard = "all"
	sum.Complete = sum.Complete && len(rep.Missing) == 0
	rep.Summary = sum
	return rep, writeJSON(filepath.Join(out, "summary.json"), sum)
}

// copyListed copies one file a record lists (slash-separated, relative to
// the shard folder) into out. A listed path that would leave either folder
// is refused; a listed file that is missing is an error, since the merged
// report would link to it.
func copyListed(shard, out, rel string) error {
	p := filepath.FromSlash(rel)
	if !filepath.IsLocal(p) {
		return fmt.Errorf("merge: %s: record lists %q, outside the folder", shard, rel)
	}
	src := filepath.Join(shard, p)
	fi, err := os.Lstat(src)
	if err != nil {
		return fmt.Errorf("merge: %w", err)
	}
	if !fi.Mode().IsRegular() {
		return fmt.Errorf("merge: %s is not a regular file", src) // never follow links out of a shard folder
	}
	return copyFile(src, filepath.Join(out, p))
}

func copyFile(src, dst string) error {
	in, err := os.Open(src)
	if err != nil {
		return err
	}
	defer in.Close()
	if err := os.MkdirAll(filepath.Dir(dst), 0o755); err != nil {
		return err
	}
	data, err := io.ReadAll(in)
	if err != nil {
		return err
	}
	return WriteFileAtomic(dst, data)
}
