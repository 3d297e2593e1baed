package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"time"

	"heedmap/batch"
)

func cmdMerge(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := newFlagSet("merge", stderr)
	out := fs.String("out", "", "output folder for the merged results (required)")
	help := func(w io.Writer) {
		fmt.Fprint(w, `Usage: heedmap merge --out DIR SHARD_DIR...

Combines the output folders of sharded 'heedmap run' jobs: checks they used
the same model and configuration, copies their records and per-image files
into DIR and rebuilds DIR/metrics.csv and DIR/summary.json exactly as a
single run over all images would have written them. Missing shards and
unfinished images are reported.

Example:
  heedmap merge --out results/all results/shard-*

Flags:
  --out DIR   merged output folder (required)

Exit codes:
  0    merged, and every shard and image is present
  1    merged, but shards are missing or images unfinished (listed), or an
       acceptance criterion failed
  2    usage error, or shards from different models or configurations
`)
	}
	if code, done := parse(fs, args, help, stdout, stderr); done {
		return code
	}
	if *out == "" || fs.NArg() == 0 {
		fmt.Fprintln(stderr, "heedmap merge: need --out DIR and at least one shard folder; see 'heedmap merge --help'")
		return exitUsage
	}
	// Shards of a real run keep the per-image table in images.csv and the
	// report owns metrics.csv; test-worker shards have only metrics.csv.
	opt := batch.MergeOptions{Extra: []string{"config.yaml"}}
	withReport := false
	if _, err := os.Stat(filepath.Join(fs.Arg(0), recordsTable)); err == nil {
		opt.Table, withReport = recordsTable, true
	}
	rep, err := batch.Merge(*out, fs.Args(), opt)
	if err != nil {
		fmt.Fprintf(stderr, "heedmap merge: %v\n", err)
		return exitUsage
	}
	s := rep.Summary
	fmt.Fprintf(stdout, "merged %d shard folder(s) into %s: %d images, %d ok, %d failed, %d pending\n", rep.Shards, *out, s.Planned, s.OK, s.Failed, s.Pending)
	if len(rep.Missing) > 0 || s.Pending > 0 {
		fmt.Fprintf(stderr, "incomplete: missing shards %v, %d unfinished images; rerun those shards and merge again\n", rep.Missing, s.Pending)
		return exitFailed
	}
	if withReport {
		cfg := defaultConfig()
		if err := loadYAML(filepath.Join(*out, "config.yaml"), &cfg, runOptions()); err != nil {
			fmt.Fprintf(stderr, "heedmap merge: %v\n", err)
			return exitUsage
		}
		// The first shard's configuration, made the merged result's own: it
		// names this folder and no shard, as a single run's would.
		cfg.Out, cfg.Shard, cfg.ShardCount = *out, "", 0
		if err := batch.WriteFileAtomic(filepath.Join(*out, "config.yaml"), cfg.marshal()); err != nil {
			fmt.Fprintf(stderr, "heedmap merge: %v\n", err)
			return exitFailed
		}
		_, pass, err := writeReport(ctx, cfg, *out, time.Now())
		if err != nil {
			fmt.Fprintf(stderr, "heedmap merge: report: %v\n", err)
			return exitFailed
		}
		fmt.Fprintf(stdout, "report: %s\n", filepath.Join(*out, "report.html"))
		if !pass {
			fmt.Fprintln(stderr, "acceptance criteria: at least one FAILED (see report.html)")
			return exitFailed
		}
	}
	return exitOK
}
