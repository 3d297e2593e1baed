package main

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"runtime"
	"runtime/debug"
	"strconv"
	"strings"
	"time"

	"heedmap/batch"
	"heedmap/render/report"
)

const runHelpHead = `Usage: heedmap run --model M.onnx --images DIR|manifest.csv [--masks DIR] --out DIR [flags]

Computes attribution maps for every image (occlusion, gradient,
gradient-x-input, integrated-gradients, smoothgrad, grad-cam, rise), measures
how much attribution falls inside the lesion mask and on annotated artefacts,
and writes per-image records, overlays and OUT/metrics.csv. All input is
validated before heavy work; a bad image gets an error record and the batch
goes on. Each finished image is saved at once, so an interrupted or killed
run resumes where it stopped when the same command is run again.

Settings come from defaults, then --config FILE (YAML, keys are the flag
names below, e.g. "size: 224" or "methods: [occlusion, grad-cam]"), then
flags, which win. The resolved configuration is written to OUT/config.yaml.

Examples:
  heedmap run --model model.onnx --images imgs/ --masks masks/ --mask-suffix _segmentation --out results/
  heedmap run --config run.yaml --images manifest.csv --out results/ --methods occlusion,grad-cam --workers 2
  heedmap run --config run.yaml --out results/shard-3 --shard 3/16     # one of 16 cluster jobs
  heedmap run --config run.yaml --out results/ --dry-run               # check inputs, show the plan
`

const runOutputHelp = `Output (in --out DIR):
  report.html                        the report: verdicts, per-method summary with
                                     95 % intervals, plots, worst-first gallery,
                                     sortable table of every image, definitions
  report.json                        the same, machine-readable (schema heedmap-report/1)
  metrics.csv                        one row per image and method
  overlays/<image-id>.<method>.png   the map over the image, lesion outline, artefacts
  panels/<image-id>.png              1920x1080 slide: the image and every method
  maps/<image-id>.<method>.npy       raw map on the model-input grid (--save-maps only)
  images.csv                         one row per image: status, prediction, all measures
  config.yaml                        the resolved configuration
  records/ index.json summary.json   per-image records, used to resume and merge
<image-id> is the image's id made safe as a file name: characters other
than A-Z a-z 0-9 . _ - become _, leading dots are dropped and long ids cut
to 80 characters; when anything changed, 8 hex digits of the id's SHA-256
are appended, so distinct ids keep distinct names and nothing is written
outside DIR.

`

// runFlags are the flags of `run` that are not configuration.
type runFlags struct {
	config     string
	dryRun     bool
	testWorker string // hidden: see testworker.go
}

func cmdRun(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	cfg, rf, code, done := parseRun(args, stdout, stderr)
	if done {
		return code
	}
	code, _ = execute(ctx, cfg, rf, stdout, stderr)
	return code
}

// parseRun resolves the configuration: defaults < YAML < flags.
func parseRun(args []string, stdout, stderr io.Writer) (Config, runFlags, int, bool) {
	fs := newFlagSet("run", stderr)
	opts := runOptions()
	var got []kv
	var rf runFlags
	registerOptions(fs, opts, &got)
	fs.StringVar(&rf.config, "config", "", "YAML configuration file")
	fs.BoolVar(&rf.dryRun, "dry-run", false, "validate inputs, print the plan and problems, and stop")
	fs.StringVar(&rf.testWorker, "x-test-worker", "", "")
	help := func(w io.Writer) {
		fmt.Fprint(w, runHelpHead)
		printOptions(w, opts, defaultConfig())
		fmt.Fprintf(w, "\nOther:\n  %-28s %s\n  %-28s %s\n\n", "--config FILE", "YAML configuration; flags override it", "--dry-run", "validate everything, print the plan and problems, stop")
		fmt.Fprint(w, runOutputHelp)
		fmt.Fprint(w, "Sharding: with --shard I/N, inside a Slurm job array (SLURM_ARRAY_TASK_ID/COUNT),\nor in a Kubernetes Indexed Job (JOB_COMPLETION_INDEX with --shard-count N or\nHEEDMAP_SHARD_COUNT), each process takes the images whose id hashes to its\nshard; write each shard to its own --out and combine them with 'heedmap merge'.\nExamples: docs/slurm.sbatch, docs/kubernetes.yaml.\n\n")
		fmt.Fprint(w, exitCodesHelp)
	}
	if code, stop := parse(fs, args, help, stdout, stderr); stop {
		return Config{}, rf, code, true
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(stderr, "heedmap run: unexpected argument %q (flags go before it?)\n", fs.Arg(0))
		return Config{}, rf, exitUsage, true
	}
	cfg := defaultConfig()
	if rf.config != "" {
		if err := loadYAML(rf.config, &cfg, opts); err != nil {
			fmt.Fprintf(stderr, "heedmap run: config: %v\n", err)
			return cfg, rf, exitUsage, true
		}
	}
	byName := map[string]option{}
	for _, o := range opts {
		byName[o.name] = o
	}
	for _, f := range got {
		if err := byName[f.name].set(&cfg, f.value); err != nil {
			fmt.Fprintf(stderr, "heedmap run: --%s: %v\n", f.name, err)
			return cfg, rf, exitUsage, true
		}
	}
	var missing []string
	if cfg.Model == "" && rf.testWorker == "" {
		missing = append(missing, "--model")
	}
	if cfg.Images == "" {
		missing = append(missing, "--images")
	}
	if cfg.Out == "" {
		missing = append(missing, "--out")
	}
	if len(missing) > 0 {
		fmt.Fprintf(stderr, "heedmap run: missing %s (in flags or --config); see 'heedmap run --help'\n", strings.Join(missing, ", "))
		return cfg, rf, exitUsage, true
	}
	if (len(cfg.Mean) > 0) != (len(cfg.Std) > 0) {
		fmt.Fprintln(stderr, "heedmap run: --mean and --std go together")
		return cfg, rf, exitUsage, true
	}
	return cfg, rf, 0, false
}

// hashFile streams a file through SHA-256.
func hashFile(path string) (string, error) {
	f, err := os.Open(path)
	if err != nil {
		return "", err
	}
	defer f.Close()
	h := sha256.New()
	if _, err := io.Copy(h, f); err != nil {
		return "", fmt.Errorf("%s: %w", path, err)
	}
	return hex.EncodeToString(h.Sum(nil)), nil
}

// outcome is what a run left behind: the batch counts and, after a
// complete run with the real pipeline, the report and whether every
// acceptance criterion passed.
type outcome struct {
	Summary batch.Summary
	Report  *report.Report
	Pass    bool
}

// execute runs the batch described by cfg and returns the exit code.
func execute(ctx context.Context, cfg Config, rf runFlags, stdout, stderr io.Writer) (int, outcome) {
	var oc outcome
	getenv := os.Getenv
	if cfg.ShardCount > 0 {
		getenv = func(k string) string {
			if k == "HEEDMAP_SHARD_COUNT" {
				return strconv.Itoa(cfg.ShardCount)
			}
			return os.Getenv(k)
		}
	}
	shard, source, err := batch.ResolveShard(cfg.Shard, getenv)
	if err != nil {
		fmt.Fprintf(stderr, "heedmap run: %v\n", err)
		return exitUsage, oc
	}
	cfg.Shard, cfg.ShardCount = "", 0
	if shard.Count > 1 {
		cfg.Shard = shard.String()
	}
	modelSum := "test-worker:" + rf.testWorker
	if rf.testWorker == "" {
		if modelSum, err = hashFile(cfg.Model); err != nil {
			fmt.Fprintf(stderr, "heedmap run: model: %v\n", err)
			return exitUsage, oc
		}
	}
	fp := fingerprint(cfg, []byte(modelSum))
	workers := cfg.Workers
	if workers <= 0 {
		workers = runtime.NumCPU()
	}

	var worker batch.Worker
	var finish func(context.Context) (*report.Report, bool, error)
	table := ""
	if rf.testWorker != "" {
		d, err := time.ParseDuration(rf.testWorker)
		if err != nil {
			fmt.Fprintf(stderr, "heedmap run: --x-test-worker: %v\n", err)
			return exitUsage, oc
		}
		worker = testWorker{delay: d}
	} else {
		// The model and every setting are checked before the images, so a
		// bad model or option fails in seconds, dry run included.
		p, err := newPipeline(cfg, stderr)
		if err != nil {
			fmt.Fprintf(stderr, "heedmap run: %v\n", err)
			return exitUsage, oc
		}
		worker, finish, table = p.worker, p.finish, p.table
	}

	items, probs, err := batch.Discover(batch.Input{Images: cfg.Images, Masks: cfg.Masks, MaskSuffix: cfg.MaskSuffix, Artefacts: cfg.Artefacts})
	if err != nil {
		fmt.Fprintf(stderr, "heedmap run: %v\n", err)
		return exitUsage, oc
	}
	if len(items) == 0 {
		fmt.Fprintf(stderr, "heedmap run: no images found in %s (PNG or JPEG)\n", cfg.Images)
		batch.WriteProblems(stderr, probs, 20)
		return exitUsage, oc
	}
	plan, err := batch.Validate(ctx, items, probs, shard, fp, batch.Checks{Workers: workers, ResizeMasks: cfg.MaskResize})
	if err != nil {
		fmt.Fprintf(stderr, "heedmap run: %v\n", err)
		return exitInterrupted, oc
	}
	batch.WriteProblems(stderr, plan.Problems, 20)
	if len(plan.Problems) == 0 {
		fmt.Fprintln(stderr, "input check: no problems found")
	}
	doneAlready := plan.Done(cfg.Out)
	shardText := "all images"
	if shard.Count > 1 {
		shardText = fmt.Sprintf("shard %s (from %s)", shard, source)
	}
	fmt.Fprintf(stderr, "plan: %d images found, %s: %d valid, %d invalid; %d already done, %d to process with %d worker(s); methods %s\n",
		plan.Discovered, shardText, len(plan.Items), len(plan.Invalid), doneAlready, len(plan.Items)-doneAlready, workers, strings.Join(cfg.Methods, ","))
	if rf.dryRun {
		fmt.Fprintf(stdout, "dry run: nothing written. Resolved configuration:\n%s", cfg.marshal())
		if cfg.Strict && len(plan.Invalid) > 0 {
			return exitFailed, oc
		}
		return exitOK, oc
	}

	if err := os.MkdirAll(cfg.Out, 0o755); err != nil {
		fmt.Fprintf(stderr, "heedmap run: %v\n", err)
		return exitUsage, oc
	}
	if err := batch.WriteFileAtomic(filepath.Join(cfg.Out, "config.yaml"), cfg.marshal()); err != nil {
		fmt.Fprintf(stderr, "heedmap run: %v\n", err)
		return exitUsage, oc
	}
	term := false
	if f, ok := stderr.(*os.File); ok {
		term = batch.IsTerminal(f)
	}
	r := &batch.Runner{Out: cfg.Out, Worker: worker, Workers: workers, Progress: stderr, Terminal: term, Table: table}
	sum, err := r.Run(ctx, plan)
	oc.Summary = sum
	fmt.Fprintf(stderr, "done: %d ok, %d failed (%d invalid), %d skipped as already done, %d pending; %s, %s\n",
		sum.OK, sum.Failed, sum.Invalid, sum.Skipped, sum.Pending, sum.Elapsed, sum.Rate)
	if err != nil {
		if errors.Is(err, context.Canceled) || ctx.Err() != nil {
			fmt.Fprintln(stderr, "interrupted: finished images are saved; run the same command again to resume")
			return exitInterrupted, oc
		}
		fmt.Fprintf(stderr, "heedmap run: %v\n", err)
		return exitFailed, oc
	}
	pass := true
	if finish != nil && sum.Complete {
		if oc.Report, pass, err = finish(ctx); err != nil {
			fmt.Fprintf(stderr, "heedmap run: report: %v\n", err)
			return exitFailed, oc
		}
		fmt.Fprintf(stdout, "report: %s\n", filepath.Join(cfg.Out, "report.html"))
	}
	oc.Pass = pass
	fmt.Fprintf(stdout, "results in %s (see 'heedmap run --help', Output)\n", cfg.Out)
	switch {
	case sum.OK == 0:
		return exitFailed, oc
	case cfg.Strict && sum.Failed > 0:
		return exitFailed, oc
	case !pass:
		fmt.Fprintln(stderr, "acceptance criteria: at least one FAILED (see report.html)")
		return exitFailed, oc
	}
	return exitOK, oc
}

func goInfo() string {
	s := runtime.Version() + ", " + runtime.GOOS + "/" + runtime.GOARCH
	if bi, ok := debug.ReadBuildInfo(); ok {
		for _, kv := range bi.Settings {
			if kv.Key == "vcs.revision" && len(kv.Value) >= 12 {
				s += ", commit " + kv.Value[:12]
			}
		}
	}
	return s
}
