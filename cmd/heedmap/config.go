package main

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"

	"gopkg.in/yaml.v3"
)

// Methods lists the attribution methods `run --methods` accepts.
var methodNames = []string{"occlusion", "gradient", "gradient-x-input", "integrated-gradients", "smoothgrad", "grad-cam", "rise"}

// Config is the resolved configuration of a run: defaults, then the YAML
// file given with --config, then flags set on the command line. YAML keys
// are the flag names. The resolved value is written to OUT/config.yaml.
type Config struct {
	Model      string   `yaml:"model"`
	Images     string   `yaml:"images"`
	Masks      string   `yaml:"masks,omitempty"`
	MaskSuffix string   `yaml:"mask-suffix,omitempty"`
	Artefacts  string   `yaml:"artefacts,omitempty"`
	MaskResize bool     `yaml:"mask-resize"`
	Out        string   `yaml:"out"`
	Methods    []string `yaml:"methods,flow"`
	Target     string   `yaml:"target"`
	Score      string   `yaml:"score"`
	SaveMaps   bool     `yaml:"save-maps"`
	Labels     string   `yaml:"labels,omitempty"`
	Criteria   string   `yaml:"criteria,omitempty"`

	// Preprocessing.
	Size     int       `yaml:"size"`
	Resize   string    `yaml:"resize"`
	Mean     []float64 `yaml:"mean,flow,omitempty"`
	Std      []float64 `yaml:"std,flow,omitempty"`
	Channels string    `yaml:"channels"`
	// MaxMegapixels is the memory cap (reduce.go states the rule).
	MaxMegapixels float64 `yaml:"max-megapixels"`

	// Method parameters.
	Patch    int    `yaml:"patch"`
	Stride   int    `yaml:"stride"`
	Fill     string `yaml:"fill"`
	Baseline string `yaml:"baseline"`
	Steps    int    `yaml:"steps"`
	Samples  int    `yaml:"samples"`
	// RiseMasks overrides Samples for RISE, whose useful mask count is two
	// orders of magnitude above SmoothGrad's sample count.
	RiseMasks int    `yaml:"rise-masks,omitempty"`
	Layer     string `yaml:"layer,omitempty"`
	Seed      uint64 `yaml:"seed"`
	// SmoothGradSigma is the noise level as a fraction of the input's
	// range; 0 means no noise (SmoothGrad then equals the gradient).
	SmoothGradSigma  float64 `yaml:"smoothgrad-sigma"`
	SmoothGradOverIG bool    `yaml:"smoothgrad-over-ig"`
	IGQuadrature     string  `yaml:"ig-quadrature"`
	// BlurSigma is the Gaussian σ in model-input pixels of the blurred
	// occlusion fill and integrated-gradients baseline; 0 = each method's
	// default (patch/2 and width/16).
	BlurSigma float64 `yaml:"blur-sigma"`
	RiseGrid  int     `yaml:"rise-grid"`
	RiseP     float64 `yaml:"rise-p"`
	// Output names the graph value holding the logits; empty = the graph's
	// first output.
	Output string `yaml:"output,omitempty"`

	// Report: title, the dataset summary's primary method and flag rule. They do
	// not change per-image results and stay out of the record key.
	Title        string  `yaml:"title,omitempty"`
	Primary      string  `yaml:"primary,omitempty"`
	FlagInside   float64 `yaml:"flag-inside"`
	FlagArtefact string  `yaml:"flag-artefact"`

	// Execution; these do not change results and stay out of the record key.
	Workers int    `yaml:"workers"`
	Shard   string `yaml:"shard,omitempty"`
	// ShardCount gives the shard count when the index comes from the
	// environment (a Kubernetes Indexed Job's JOB_COMPLETION_INDEX).
	ShardCount int  `yaml:"shard-count,omitempty"`
	Strict     bool `yaml:"strict"`
}

// defaultConfig holds the stated defaults. Patch/stride 0 mean "chosen
// from the input size by the occlusion method"; steps/samples 0 mean each
// method's own default; size 0 means "from the model's input shape";
// workers 0 means one per core.
func defaultConfig() Config {
	return Config{
		Methods:  []string{"occlusion", "gradient", "integrated-gradients", "grad-cam"},
		Target:   "predicted",
		Score:    "logit",
		Resize:   "stretch",
		Channels: "rgb",
		Fill:     "mean",
		Baseline: "black",
		Seed:     1,
		// The methods' published defaults (explain package doc comments).
		SmoothGradSigma: 0.15,
		IGQuadrature:    "midpoint",
		RiseGrid:        7,
		RiseP:           0.5,
		// The memory cap's default (reduce.go).
		MaxMegapixels: defaultMegapixels,
		// The summary's default flag rule (measure.DefaultSummaryOptions).
		FlagInside:   0.5,
		FlagArtefact: "0.2",
	}
}

// option is one flag that can also come from the YAML file.
type option struct {
	name, arg, usage, group string
	set                     func(c *Config, v string) error
	get                     func(c *Config) string
	boolean                 bool
}

func parseInt(dst *int, min int) func(v string) error {
	return func(v string) error {
		n, err := strconv.Atoi(strings.TrimSpace(v))
		if err != nil || n < min {
			return fmt.Errorf("want an integer >= %d, got %q", min, v)
		}
		*dst = n
		return nil
	}
}

func parseTriple(v string) ([]float64, error) {
	parts := strings.Split(v, ",")
	if len(parts) != 3 && len(parts) != 1 {
		return nil, fmt.Errorf("want R,G,B or one value, got %q", v)
	}
	out := make([]float64, len(parts))
	for i, p := range parts {
		f, err := strconv.ParseFloat(strings.TrimSpace(p), 64)
		if err != nil {
			return nil, fmt.Errorf("want numbers R,G,B, got %q", v)
		}
		out[i] = f
	}
	if len(out) == 1 {
		out = []float64{out[0], out[0], out[0]}
	}
	return out, nil
}

func oneOf(v string, allowed ...string) error {
	for _, a := range allowed {
		if v == a {
			return nil
		}
	}
	return fmt.Errorf("want one of %s, got %q", strings.Join(allowed, "|"), v)
}

func joinFloats(f []float64) string {
	s := make([]string, len(f))
	for i, v := range f {
		s[i] = strconv.FormatFloat(v, 'g', -1, 64)
	}
	return strings.Join(s, ",")
}

// runOptions is the flag table of `heedmap run`; the same table validates a
// YAML config, so a bad value reads the same from either source.
func runOptions() []option {
	str := func(p func(c *Config) *string) (func(*Config, string) error, func(*Config) string) {
		return func(c *Config, v string) error { *p(c) = v; return nil }, func(c *Config) string { return *p(c) }
	}
	num := func(p func(c *Config) *int, min int) (func(*Config, string) error, func(*Config) string) {
		return func(c *Config, v string) error { return parseInt(p(c), min)(v) }, func(c *Config) string { return strconv.Itoa(*p(c)) }
	}
	flg := func(p func(c *Config) *bool) (func(*Config, string) error, func(*Config) string) {
		return func(c *Config, v string) error {
				b, err := strconv.ParseBool(v)
				*p(c) = b
				return err
			}, func(c *Config) string {
				return strconv.FormatBool(*p(c))
			}
	}
	var opts []option
	add := func(group, name, arg, usage string, set func(*Config, string) error, get func(*Config) string) {
		opts = append(opts, option{name: name, arg: arg, usage: usage, group: group, set: set, get: get})
	}
	addBool := func(group, name, usage string, set func(*Config, string) error, get func(*Config) string) {
		opts = append(opts, option{name: name, usage: usage, group: group, set: set, get: get, boolean: true})
	}
	const io, pre, met, rep, exe = "Input and output", "Preprocessing", "Methods", "Report", "Execution"
	s, g := str(func(c *Config) *string { return &c.Model })
	add(io, "model", "M.onnx", "ONNX image classifier (required)", s, g)
	s, g = str(func(c *Config) *string { return &c.Images })
	add(io, "images", "DIR|manifest.csv", "folder of PNG/JPEG images, or a CSV manifest with columns id,image[,mask,label,artifact:NAME...] (required)", s, g)
	s, g = str(func(c *Config) *string { return &c.Masks })
	add(io, "masks", "DIR", "folder of lesion masks paired with images by file stem (folder input only)", s, g)
	s, g = str(func(c *Config) *string { return &c.MaskSuffix })
	add(io, "mask-suffix", "S", "mask file stem = image stem + S, e.g. _segmentation", s, g)
	s, g = str(func(c *Config) *string { return &c.Artefacts })
	add(io, "artefacts", "DIR", "folder of artefact masks, DIR/CATEGORY/STEM.png with STEM as for --masks; no file = artefact absent (folder input; manifests use artifact:NAME columns)", s, g)
	s, g = flg(func(c *Config) *bool { return &c.MaskResize })
	addBool(io, "mask-resize", "resample masks of another size than their image by nearest neighbour; otherwise a size mismatch is that image's error", s, g)
	s, g = str(func(c *Config) *string { return &c.Out })
	add(io, "out", "DIR", "output folder (required); reruns resume in it", s, g)
	add(io, "methods", "LIST", "comma-separated: "+strings.Join(methodNames, ","), func(c *Config, v string) error {
		var m []string
		for _, p := range strings.Split(v, ",") {
			p = strings.TrimSpace(p)
			if p == "" {
				continue
			}
			if err := oneOf(p, methodNames...); err != nil {
				return err
			}
			m = append(m, p)
		}
		if len(m) == 0 {
			return fmt.Errorf("no method in %q", v)
		}
		c.Methods = m
		return nil
	}, func(c *Config) string { return strings.Join(c.Methods, ",") })
	s, g = str(func(c *Config) *string { return &c.Target })
	add(io, "target", "T", "what to explain: predicted, label (from the manifest), a class index, a class name from --labels, or a group NAME=A+B+... whose score is the sum of the members' probabilities (needs --score prob or sigmoid)", s, g)
	s, g = str(func(c *Config) *string { return &c.Output })
	add(io, "output", "NAME", "graph value holding the logits; for a model ending in Softmax name the tensor that feeds it; empty = the graph's first output", s, g)
	add(io, "score", "logit|prob|sigmoid", "explain the raw logit, the softmax probability or the sigmoid probability (multi-label models) of the target", func(c *Config, v string) error {
		if err := oneOf(v, "logit", "prob", "sigmoid"); err != nil {
			return err
		}
		c.Score = v
		return nil
	}, func(c *Config) string { return c.Score })
	s, g = flg(func(c *Config) *bool { return &c.SaveMaps })
	addBool(io, "save-maps", "also save each method's map as OUT/maps/ID.METHOD.npy: float32 H×W in model-input space, signed and summed over colour channels (gradient: Σ_c ∂score/∂x_c; gradient-x-input: Σ_c x_c·∂score/∂x_c; SmoothGrad: channel sum of the mean gradient), i.e. before any absolute value or clipping; overlays and measures use the method's display map (max over channels of |gradient| for gradient and SmoothGrad)", s, g)
	s, g = str(func(c *Config) *string { return &c.Labels })
	add(io, "labels", "FILE", "class names, one per line, in logit order", s, g)
	s, g = str(func(c *Config) *string { return &c.Criteria })
	add(io, "criteria", "FILE", "YAML acceptance criteria evaluated on the dataset summary", s, g)

	s, g = num(func(c *Config) *int { return &c.Size }, 0)
	add(pre, "size", "N", "model input width and height; 0 = from the model", s, g)
	add(pre, "resize", "stretch|crop|pad", "how pictures of another aspect ratio are fitted", func(c *Config, v string) error {
		if err := oneOf(v, "stretch", "crop", "pad"); err != nil {
			return err
		}
		c.Resize = v
		return nil
	}, func(c *Config) string { return c.Resize })
	add(pre, "mean", "R,G,B", "per-channel mean on the 0-1 scale subtracted before --std", func(c *Config, v string) error {
		f, err := parseTriple(v)
		c.Mean = f
		return err
	}, func(c *Config) string { return joinFloats(c.Mean) })
	add(pre, "std", "R,G,B", "per-channel standard deviation on the 0-1 scale", func(c *Config, v string) error {
		f, err := parseTriple(v)
		for _, x := range f {
			if x <= 0 {
				return fmt.Errorf("std must be positive, got %q", v)
			}
		}
		c.Std = f
		return err
	}, func(c *Config) string { return joinFloats(c.Std) })
	add(pre, "max-megapixels", "MP", "memory cap: a larger picture is reduced by the smallest whole factor k that fits, each pixel the mean of a k×k block, and masks follow by nearest neighbour; above 4× the cap the image is an error; 0 = no cap", func(c *Config, v string) error {
		f, err := strconv.ParseFloat(strings.TrimSpace(v), 64)
		if err != nil || f < 0 || math.IsInf(f, 0) || math.IsNaN(f) {
			return fmt.Errorf("want megapixels >= 0, got %q", v)
		}
		c.MaxMegapixels = f
		return nil
	}, func(c *Config) string { return strconv.FormatFloat(c.MaxMegapixels, 'g', -1, 64) })
	add(pre, "channels", "rgb|bgr", "channel order the model expects", func(c *Config, v string) error {
		if err := oneOf(v, "rgb", "bgr"); err != nil {
			return err
		}
		c.Channels = v
		return nil
	}, func(c *Config) string { return c.Channels })

	s, g = num(func(c *Config) *int { return &c.Patch }, 0)
	add(met, "patch", "PX", "occlusion patch side in model-input pixels; 0 = automatic", s, g)
	s, g = num(func(c *Config) *int { return &c.Stride }, 0)
	add(met, "stride", "PX", "occlusion stride; 0 = automatic", s, g)
	add(met, "fill", "F", "occlusion fill: mean (the --mean colour, i.e. zero model input), image-mean, black, blur or R,G,B (0-255)", func(c *Config, v string) error {
		if oneOf(v, "mean", "image-mean", "black", "blur") != nil {
			f, err := parseTriple(v)
			if err != nil || len(f) != 3 {
				return fmt.Errorf("want mean|image-mean|black|blur|R,G,B, got %q", v)
			}
		}
		c.Fill = v
		return nil
	}, func(c *Config) string { return c.Fill })
	add(met, "baseline", "B", "integrated-gradients baseline: black, mean (the image's mean colour), blur or noise", func(c *Config, v string) error {
		if err := oneOf(v, "black", "mean", "blur", "noise"); err != nil {
			return err
		}
		c.Baseline = v
		return nil
	}, func(c *Config) string { return c.Baseline })
	s, g = num(func(c *Config) *int { return &c.Steps }, 0)
	add(met, "steps", "N", "integrated-gradients steps; 0 = the method's default (64)", s, g)
	s, g = num(func(c *Config) *int { return &c.Samples }, 0)
	add(met, "samples", "N", "SmoothGrad noise samples and RISE masks; 0 = the methods' defaults (25 and 2000)", s, g)
	s, g = num(func(c *Config) *int { return &c.RiseMasks }, 0)
	add(met, "rise-masks", "N", "RISE masks; 0 = --samples if set, else the method's default (2000)", s, g)
	fnum := func(p func(c *Config) *float64, ok func(float64) bool, want string) (func(*Config, string) error, func(*Config) string) {
		return func(c *Config, v string) error {
				f, err := strconv.ParseFloat(strings.TrimSpace(v), 64)
				if err != nil || math.IsNaN(f) || math.IsInf(f, 0) || !ok(f) {
					return fmt.Errorf("want %s, got %q", want, v)
				}
				*p(c) = f
				return nil
			}, func(c *Config) string {
				return strconv.FormatFloat(*p(c), 'g', -1, 64)
			}
	}
	s, g = fnum(func(c *Config) *float64 { return &c.SmoothGradSigma }, func(f float64) bool { return f >= 0 }, "a fraction >= 0")
	add(met, "smoothgrad-sigma", "F", "SmoothGrad noise σ as a fraction of the input's value range; 0 = no noise", s, g)
	s, g = flg(func(c *Config) *bool { return &c.SmoothGradOverIG })
	addBool(met, "smoothgrad-over-ig", "SmoothGrad averages integrated gradients (--steps, --baseline, --ig-quadrature) instead of the gradient; costs samples × steps gradients; reported as method smoothgrad-ig", s, g)
	add(met, "ig-quadrature", "midpoint|gauss-legendre", "integrated-gradients path integral rule", func(c *Config, v string) error {
		if err := oneOf(v, "midpoint", "gauss-legendre"); err != nil {
			return err
		}
		c.IGQuadrature = v
		return nil
	}, func(c *Config) string { return c.IGQuadrature })
	s, g = fnum(func(c *Config) *float64 { return &c.BlurSigma }, func(f float64) bool { return f >= 0 }, "pixels >= 0")
	add(met, "blur-sigma", "PX", "Gaussian σ in model-input pixels of the blurred occlusion fill and integrated-gradients baseline; 0 = patch/2 and width/16", s, g)
	s, g = num(func(c *Config) *int { return &c.RiseGrid }, 1)
	add(met, "rise-grid", "S", "RISE mask grid: S×S cells before upsampling", s, g)
	s, g = fnum(func(c *Config) *float64 { return &c.RiseP }, func(f float64) bool { return f > 0 && f <= 1 }, "a probability in (0, 1]")
	add(met, "rise-p", "P", "RISE probability that a grid cell is kept", s, g)
	s, g = str(func(c *Config) *string { return &c.Layer })
	add(met, "layer", "NAME", "Grad-CAM layer (tensor name); empty = last 4-D activation before global pooling", s, g)
	add(met, "seed", "N", "seed for SmoothGrad noise and RISE masks", func(c *Config, v string) error {
		n, err := strconv.ParseUint(v, 10, 64)
		c.Seed = n
		return err
	}, func(c *Config) string { return strconv.FormatUint(c.Seed, 10) })

	s, g = str(func(c *Config) *string { return &c.Title })
	add(rep, "title", "TEXT", "report title; empty = \"heedmap: \" and the model's file name", s, g)
	add(rep, "primary", "METHOD", "method whose maps decide the flagged list and the gallery order; empty = the first of --methods", func(c *Config, v string) error {
		if v != "" {
			if err := oneOf(v, methodNames...); err != nil {
				return err
			}
		}
		c.Primary = v
		return nil
	}, func(c *Config) string { return c.Primary })
	add(rep, "flag-inside", "X", "flag an image whose inside-lesion mass (primary method) is below X", func(c *Config, v string) error {
		f, err := strconv.ParseFloat(strings.TrimSpace(v), 64)
		if err != nil || f < 0 || f > 1 {
			return fmt.Errorf("want a fraction between 0 and 1, got %q", v)
		}
		c.FlagInside = f
		return nil
	}, func(c *Config) string { return strconv.FormatFloat(c.FlagInside, 'g', -1, 64) })
	add(rep, "flag-artefact", "LIST", "flag an image with more than this fraction of its evidence on one artefact category: X for every category, NAME=X for one, e.g. 0.2,ruler=0.06", func(c *Config, v string) error {
		if _, _, err := parseArtefactRule(v); err != nil {
			return err
		}
		c.FlagArtefact = v
		return nil
	}, func(c *Config) string { return c.FlagArtefact })

	s, g = num(func(c *Config) *int { return &c.Workers }, 0)
	add(exe, "workers", "N", "images processed at once; 0 = one per CPU core", s, g)
	s, g = str(func(c *Config) *string { return &c.Shard })
	add(exe, "shard", "I/N", "process shard I of N (0-based); default from SLURM_ARRAY_TASK_ID/COUNT or JOB_COMPLETION_INDEX with HEEDMAP_SHARD_COUNT", s, g)
	s, g = num(func(c *Config) *int { return &c.ShardCount }, 0)
	add(exe, "shard-count", "N", "shard count for a Kubernetes Indexed Job (index from JOB_COMPLETION_INDEX); overrides HEEDMAP_SHARD_COUNT", s, g)
	s, g = flg(func(c *Config) *bool { return &c.Strict })
	addBool(exe, "strict", "exit 1 if any image is invalid or fails", s, g)
	return opts
}

// reportTitle is the report's title.
func (c Config) reportTitle() string {
	if c.Title != "" {
		return c.Title
	}
	return "heedmap: " + filepath.Base(c.Model)
}

// parseArtefactRule reads --flag-artefact: comma-separated entries, a bare
// fraction for every category and NAME=fraction for one; def is -1 when no
// bare fraction was given.
func parseArtefactRule(v string) (def float64, per map[string]float64, err error) {
	def = -1
	for _, part := range strings.Split(v, ",") {
		part = strings.TrimSpace(part)
		if part == "" {
			continue
		}
		name, num, named := strings.Cut(part, "=")
		if !named {
			num = name
		}
		f, err := strconv.ParseFloat(strings.TrimSpace(num), 64)
		if err != nil || f < 0 || f > 1 {
			return 0, nil, fmt.Errorf("want X or NAME=X with X between 0 and 1, got %q", part)
		}
		if !named {
			def = f
			continue
		}
		if per == nil {
			per = map[string]float64{}
		}
		per[strings.TrimSpace(name)] = f
	}
	return def, per, nil
}

// recorder is a flag.Value that remembers what was given, so flags can be
// applied after the YAML file.
type recorder struct {
	name    string
	val     *[]kv
	boolean bool
}

type kv struct{ name, value string }

func (r recorder) String() string { return "" }
func (r recorder) Set(v string) error {
	*r.val = append(*r.val, kv{r.name, v})
	return nil
}
func (r recorder) IsBoolFlag() bool { return r.boolean }

// loadYAML reads a config file over c. Unknown keys are errors (a typo must
// not silently fall back to a default); each value goes through the same
// parser as its flag.
func loadYAML(path string, c *Config, opts []option) error {
	data, err := os.ReadFile(path)
	if err != nil {
		return err
	}
	var raw map[string]yaml.Node
	if err := yaml.Unmarshal(data, &raw); err != nil {
		return fmt.Errorf("%s: %w", path, err)
	}
	byName := map[string]option{}
	for _, o := range opts {
		byName[o.name] = o
	}
	keys := make([]string, 0, len(raw))
	for k := range raw {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	for _, k := range keys {
		n := raw[k]
		o, ok := byName[k]
		if !ok {
			return fmt.Errorf("%s: line %d: unknown key %q", path, n.Line, k)
		}
		var v string
		switch n.Kind {
		case yaml.ScalarNode:
			v = n.Value
		case yaml.SequenceNode:
			parts := make([]string, len(n.Content))
			for i, e := range n.Content {
				parts[i] = e.Value
			}
			v = strings.Join(parts, ",")
		default:
			return fmt.Errorf("%s: line %d: %s: want a value or a list", path, n.Line, k)
		}
		if err := o.set(c, v); err != nil {
			return fmt.Errorf("%s: line %d: %s: %v", path, n.Line, k, err)
		}
	}
	return nil
}

// marshal renders the resolved configuration as YAML.
func (c Config) marshal() []byte {
	var buf bytes.Buffer
	buf.WriteString("# heedmap resolved configuration: defaults < --config file < flags\n")
	enc := yaml.NewEncoder(&buf)
	enc.SetIndent(2)
	enc.Encode(c)
	enc.Close()
	return buf.Bytes()
}

// fingerprint identifies what changes results: the model bytes, the labels
// file bytes and every setting except paths and execution options. It
// enters every record key, so changing any of these redoes the work.
func fingerprint(c Config, model []byte) string {
	k := c
	k.Model, k.Images, k.Masks, k.MaskSuffix, k.Out, k.Criteria, k.Artefacts = "", "", "", "", "", "", ""
	k.Workers, k.Shard, k.ShardCount, k.Strict = 0, "", 0, false
	k.Title, k.Primary, k.FlagInside, k.FlagArtefact = "", "", 0, ""
	h := sha256.New()
	ms := sha256.Sum256(model)
	fmt.Fprintf(h, "model %x\n", ms)
	if c.Labels != "" {
		if data, err := os.ReadFile(c.Labels); err == nil {
			ls := sha256.Sum256(data)
			fmt.Fprintf(h, "labels %x\n", ls)
		}
	}
	k.Labels = ""
	h.Write(k.marshal())
	return hex.EncodeToString(h.Sum(nil))
}

// printOptions writes grouped flag help.
func printOptions(w io.Writer, opts []option, c Config) {
	group := ""
	for _, o := range opts {
		if o.group != group {
			group = o.group
			fmt.Fprintf(w, "\n%s:\n", group)
		}
		name := "--" + o.name
		if o.arg != "" {
			name += " " + o.arg
		}
		def := ""
		if d := o.get(&c); d != "" && d != "0" && d != "false" {
			def = " (default " + d + ")"
		}
		fmt.Fprintf(w, "  %-28s %s%s\n", name, o.usage, def)
	}
}

// registerOptions adds every option to fs as a recorder.
func registerOptions(fs *flag.FlagSet, opts []option, got *[]kv) {
	for _, o := range opts {
		fs.Var(recorder{name: o.name, val: got, boolean: o.boolean}, o.name, o.usage)
	}
}
