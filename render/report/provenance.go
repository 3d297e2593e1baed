package report

import (
	"bufio"
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"io"
	"os"
	"runtime"
	"runtime/debug"
	"sort"
	"strings"
	"time"

	"heedmap/explain/measure"
	"heedmap/explain/preprocess"
)

// Provenance says what produced a report, so that a reviewer can tell
// whether two reports are comparable.
//
//	tool, version     module path and version from the build information
//	                  ("(devel)" for a source build), with the VCS revision
//	                  and a "+modified" mark when built from a dirty tree
//	go, os, arch      Go toolchain version and platform
//	cpu, cpus         CPU model from /proc/cpuinfo ("" when absent) and count
//	start, end        wall-clock times of the run (RFC 3339)
//	model             path, SHA-256 and size of the ONNX model
//	images, masks     path, SHA-256 and size of every input file; a mask
//	                  entry's role says "lesion" or "artefact:<category>"
//	                  (fill both with Report.HashInputs)
//	config            the resolved configuration as the tool used it, and
//	                  config_sha256, the SHA-256 of its canonical bytes
//	seeds             every random seed by purpose (e.g. "smoothgrad",
//	                  "rise", "bootstrap")
//	methods           each method's parameters by method name
//	preprocessing     the preprocessing configuration resolved against the
//	                  model (size, resize mode, range, mean, std, channel
//	                  order, layout, pad colour)
//	measure           the measurement parameters (tolerance, band, hot
//	                  fraction)
type Provenance struct {
	Tool         string                    `json:"tool"`
	Version      string                    `json:"version"`
	Go           string                    `json:"go"`
	OS           string                    `json:"os"`
	Arch         string                    `json:"arch"`
	CPU          string                    `json:"cpu"`
	CPUs         int                       `json:"cpus"`
	Start        time.Time                 `json:"start"`
	End          time.Time                 `json:"end"`
	Model        FileDigest                `json:"model"`
	Images       []FileDigest              `json:"images"`
	Masks        []FileDigest              `json:"masks"`
	Config       any                       `json:"config,omitempty"`
	ConfigSHA256 string                    `json:"config_sha256"`
	Seeds        map[string]uint64         `json:"seeds"`
	Methods      map[string]map[string]any `json:"methods"`
	Measure      measure.Params            `json:"measure"`
	// Preprocessing is nil for reports built before it was recorded.
	Preprocessing *preprocess.Config `json:"preprocessing,omitempty"`
}

// FileDigest identifies one input file.
type FileDigest struct {
	Path   string `json:"path"`
	Role   string `json:"role,omitempty"` // masks: "lesion" or "artefact:<category>"
	SHA256 string `json:"sha256"`
	Bytes  int64  `json:"bytes"`
}

// NewProvenance fills the tool, platform and CPU fields and the start time.
func NewProvenance(start time.Time) Provenance {
	p := Provenance{
		Tool: "heedmap", Version: "(unknown)", Go: runtime.Version(),
		OS: runtime.GOOS, Arch: runtime.GOARCH, CPUs: runtime.NumCPU(),
		Start: start, CPU: cpuModel("/proc/cpuinfo"),
		Seeds: map[string]uint64{}, Methods: map[string]map[string]any{},
	}
	if bi, ok := debug.ReadBuildInfo(); ok {
		p.Tool = bi.Main.Path
		p.Version = bi.Main.Version
		var rev, modified string
		for _, s := range bi.Settings {
			switch s.Key {
			case "vcs.revision":
				rev = s.Value
			case "vcs.modified":
				modified = s.Value
			}
		}
		if rev != "" {
			p.Version += " " + rev
			if modified == "true" {
				p.Version += "+modified"
			}
		}
	}
	return p
}

func cpuModel(path string) string {
	f, err := os.Open(path)
	if err != nil {
		return ""
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		k, v, ok := strings.Cut(sc.Text(), ":")
		if ok && strings.TrimSpace(k) == "model name" {
			return strings.TrimSpace(v)
		}
	}
	return ""
}

// HashFile returns the SHA-256 and size of a file.
func HashFile(path string) (FileDigest, error) {
	f, err := os.Open(path)
	if err != nil {
		return FileDigest{}, fmt.Errorf("report: hashing %s: %w", path, err)
	}
	defer f.Close()
	h := sha256.New()
	n, err := io.Copy(h, f)
	if err != nil {
		return FileDigest{}, fmt.Errorf("report: hashing %s: %w", path, err)
	}
	return FileDigest{Path: path, SHA256: hex.EncodeToString(h.Sum(nil)), Bytes: n}, nil
}

// HashBytes returns the hex SHA-256 of b (for the resolved configuration).
func HashBytes(b []byte) string {
	s := sha256.Sum256(b)
	return hex.EncodeToString(s[:])
}

// HashInputs fills Provenance.Images and Provenance.Masks with the SHA-256
// of every image, lesion mask and artefact mask named in the records, in
// record order, each file once. Call it while the inputs are where the run
// read them; a file that cannot be read is an error naming it, since a
// report that cannot say which bytes it measured cannot stand in a safety
// case.
func (r *Report) HashInputs() error {
	seen := map[string]bool{}
	var imgs, masks []FileDigest
	add := func(list *[]FileDigest, path, role string) error {
		if path == "" || seen[role+"\x00"+path] {
			return nil
		}
		seen[role+"\x00"+path] = true
		d, err := HashFile(path)
		if err != nil {
			return err
		}
		d.Role = role
		*list = append(*list, d)
		return nil
	}
	err := r.eachImage(func(im *ImageRecord) error {
		if err := add(&imgs, im.File, ""); err != nil {
			return err
		}
		if err := add(&masks, im.MaskFile, "lesion"); err != nil {
			return err
		}
		cats := make([]string, 0, len(im.ArtefactFiles))
		for k := range im.ArtefactFiles {
			cats = append(cats, k)
		}
		sort.Strings(cats)
		for _, k := range cats {
			if err := add(&masks, im.ArtefactFiles[k], "artefact:"+k); err != nil {
				return err
			}
		}
		return nil
	})
	if err != nil {
		return err
	}
	r.Provenance.Images, r.Provenance.Masks = imgs, masks
	return nil
}

// HashFiles hashes each path in order; the first failure is returned with
// its path.
func HashFiles(paths []string) ([]FileDigest, error) {
	out := make([]FileDigest, 0, len(paths))
	for _, p := range paths {
		d, err := HashFile(p)
		if err != nil {
			return nil, err
		}
		out = append(out, d)
	}
	return out, nil
}
