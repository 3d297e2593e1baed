// Command synthgen writes a synthetic dermoscopy-like dataset (see package
// synth): images, lesion masks, artefact masks and a manifest.csv.
//
// Example: a 64×64 set where a ruler co-occurs with class 1:
//
//	go run ./synth/cmd/synthgen -out /tmp/syn -n 500 -size 64 -seed 7 \
//	    -rates ruler=0.05:0.95,ink=0.2,hair=0.3,bubbles=0.2,dark_corners=0.3
package main

import (
	"flag"
	"fmt"
	"os"
	"strconv"
	"strings"

	"heedmap/synth"
)

func main() {
	fs := flag.NewFlagSet("synthgen", flag.ContinueOnError)
	out := fs.String("out", "", "output folder (required)")
	n := fs.Int("n", 100, "number of scenes")
	seed := fs.Uint64("seed", 1, "dataset seed")
	size := fs.Int("size", 224, "image width and height in pixels")
	label := fs.Int("label", -1, "fix every scene's class to 0 or 1; -1 draws it at random")
	rates := fs.String("rates", "", "artefact probabilities NAME=P or NAME=P0:P1 (class 0 : class 1), comma-separated; \"none\" for no artefacts; empty for 0.3 each")
	fs.Usage = func() {
		fmt.Fprintf(fs.Output(), "usage: synthgen -out DIR [-n N] [-seed S] [-size PX] [-label 0|1] [-rates LIST]\n\nexample:\n  synthgen -out /tmp/syn -n 200 -size 64 -rates ruler=0.05:0.95,hair=0.3\n\nartefacts: %s\n\n", strings.Join(synth.Names(), ", "))
		fs.PrintDefaults()
	}
	if err := fs.Parse(os.Args[1:]); err != nil {
		if err == flag.ErrHelp {
			os.Exit(0)
		}
		os.Exit(2)
	}
	if *out == "" {
		fmt.Fprintln(os.Stderr, "synthgen: -out is required")
		os.Exit(2)
	}
	opts := synth.Options{Size: *size, Seed: *seed}
	if *label >= 0 {
		opts.FixedLabel, opts.Label = true, *label
	}
	r, err := ParseRates(*rates)
	if err != nil {
		fmt.Fprintln(os.Stderr, "synthgen:", err)
		os.Exit(2)
	}
	opts.Rates = r
	if err := synth.WriteDataset(*out, *n, opts); err != nil {
		fmt.Fprintln(os.Stderr, "synthgen:", err)
		os.Exit(1)
	}
}

// ParseRates parses "ruler=0.05:0.95,hair=0.3"; "" gives nil (defaults),
// "none" an empty map.
func ParseRates(s string) (map[string][2]float64, error) {
	if s == "" {
		return nil, nil
	}
	m := map[string][2]float64{}
	if s == "none" {
		return m, nil
	}
	for _, part := range strings.Split(s, ",") {
		name, val, ok := strings.Cut(strings.TrimSpace(part), "=")
		if !ok {
			return nil, fmt.Errorf("rate %q: want NAME=P or NAME=P0:P1", part)
		}
		a, b, two := strings.Cut(val, ":")
		p0, err := strconv.ParseFloat(a, 64)
		if err != nil {
			return nil, fmt.Errorf("rate %q: %v", part, err)
		}
		p1 := p0
		if two {
			if p1, err = strconv.ParseFloat(b, 64); err != nil {
				return nil, fmt.Errorf("rate %q: %v", part, err)
			}
		}
		m[name] = [2]float64{p0, p1}
	}
	return m, nil
}
