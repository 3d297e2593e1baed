// Command heedmap computes attribution maps for an ONNX image classifier
// over a set of images with lesion masks, measures how much attribution
// falls on the lesion and on annotated artefacts, and writes overlays,
// per-image records, metrics.csv and a report. It is a research and
// quality-assurance tool, not a diagnostic device.
//
// Usage:
//
//	heedmap run --model M.onnx --images DIR|manifest.csv [--masks DIR] --out DIR [flags]
//	heedmap demo [--out DIR]
//	heedmap inspect M.onnx
//	heedmap merge --out DIR SHARD_DIR...
//	heedmap version
//
// Every command takes --help.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"runtime/debug"
	"syscall"
)

// Exit codes.
const (
	exitOK          = 0   // success (some per-image errors may be recorded)
	exitFailed      = 1   // nothing succeeded, or --strict and something failed
	exitUsage       = 2   // bad flags, configuration, model or input listing; nothing run
	exitInterrupted = 130 // Ctrl-C / SIGTERM: finished work kept, rerun resumes
)

const exitCodesHelp = `Exit codes:
  0    success; images that failed have error records, rows in images.csv
       and entries in the report
  1    no image succeeded, an acceptance criterion (--criteria) failed, or
       --strict and some image was invalid or failed
  2    usage error: bad flag or config, unreadable model, images not found
  130  interrupted (Ctrl-C or SIGTERM); finished images are kept and the
       same command resumes
`

const version = "0.1.0-dev"

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	finished := make(chan struct{})
	go func() {
		// After the first signal, restore the default handling so a second
		// Ctrl-C ends the process at once (finished records are safe: each
		// was renamed into place complete).
		<-ctx.Done()
		select {
		case <-finished: // cancelled by the stop() below, not by a signal
			return
		default:
		}
		stop()
		fmt.Fprintln(os.Stderr, "\nstopping: finished images are kept, those in progress are redone on the next run (Ctrl-C again to quit at once)")
	}()
	setMemoryLimit()
	code := dispatch(ctx, os.Args[1:], os.Stdout, os.Stderr)
	close(finished)
	stop()
	os.Exit(code)
}

type command struct {
	name, summary string
	run           func(ctx context.Context, args []string, stdout, stderr io.Writer) int
}

func commands() []command {
	return []command{
		{"run", "compute attributions and measures for a folder or manifest of images", cmdRun},
		{"demo", "generate synthetic lesion images and run the bundled shortcut demo model", cmdDemo},
		{"inspect", "describe an ONNX model: inputs, outputs, operators, support", cmdInspect},
		{"merge", "combine the output folders of sharded runs", cmdMerge},
		{"version", "print the version", cmdVersion},
	}
}

func usage(w io.Writer) {
	fmt.Fprintf(w, "heedmap %s: attribution maps and mask measures for ONNX image classifiers\n\nUsage:\n  heedmap COMMAND [flags]\n\nCommands:\n", version)
	for _, c := range commands() {
		fmt.Fprintf(w, "  %-8s %s\n", c.name, c.summary)
	}
	fmt.Fprintf(w, "\nExample:\n  heedmap run --model model.onnx --images imgs/ --masks masks/ --out results/\n\nRun 'heedmap COMMAND --help' for a command's flags.\n\n%s", exitCodesHelp)
}

func dispatch(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	if len(args) == 0 {
		usage(stderr)
		return exitUsage
	}
	switch args[0] {
	case "-h", "-help", "--help", "help":
		usage(stdout)
		return exitOK
	}
	for _, c := range commands() {
		if c.name == args[0] {
			return c.run(ctx, args[1:], stdout, stderr)
		}
	}
	fmt.Fprintf(stderr, "heedmap: unknown command %q\n\n", args[0])
	usage(stderr)
	return exitUsage
}

// newFlagSet returns a FlagSet whose -h/--help prints help to stdout and
// exits 0, and whose errors print to stderr.
func newFlagSet(name string, stderr io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	return fs
}

// parse parses args; it returns (code, true) when the caller should return.
func parse(fs *flag.FlagSet, args []string, help func(io.Writer), stdout, stderr io.Writer) (int, bool) {
	fs.Usage = func() {}
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			help(stdout)
			return exitOK, true
		}
		fmt.Fprintf(stderr, "run '%s --help' for usage\n", "heedmap "+fs.Name())
		return exitUsage, true
	}
	return 0, false
}

func cmdVersion(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := newFlagSet("version", stderr)
	help := func(w io.Writer) {
		fmt.Fprint(w, "Usage: heedmap version\n\nPrints the version, Go version and platform.\n\nExample:\n  heedmap version\n\n"+exitCodesHelp)
	}
	if code, done := parse(fs, args, help, stdout, stderr); done {
		return code
	}
	fmt.Fprintf(stdout, "heedmap %s (%s)\n", version, goInfo())
	return exitOK
}

// defaultMemoryLimit is the Go runtime's soft memory limit when the
// environment sets none (GOMEMLIMIT). The report of a large batch holds
// every image's measures at once (about 60 KB live per image); without a
// limit the collector lets the heap grow to twice that, and a 10,000-image
// run peaked at 1.24 GB RSS (live heap 300–660 MB). The limit makes the
// collector run before the heap reaches it, so the 1 GB budget holds; a
// live heap above it still works, with the collector running more often.
const defaultMemoryLimit = 900 << 20

// setMemoryLimit applies defaultMemoryLimit unless GOMEMLIMIT is set.
func setMemoryLimit() {
	if os.Getenv("GOMEMLIMIT") == "" {
		debug.SetMemoryLimit(defaultMemoryLimit)
	}
}
