package main

import (
	"context"
	"fmt"
	"io"

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
  1    merged, but shards are missing or images unfinished (listed)
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
	rep, err := batch.Merge(*out, fs.Args(), batch.MergeOptions{Extra: []string{"config.yaml"}})
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
	return exitOK
}
