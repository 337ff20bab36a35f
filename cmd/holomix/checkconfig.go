package main

import (
	"context"
	"errors"
	"flag"
	"fmt"

	"holomix/config"
)

func runCheckConfig(_ context.Context, e *env, args []string) int {
	fs := flag.NewFlagSet("check-config", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	fs.Usage = func() {
		fmt.Fprintln(e.stderr, "usage: holomix check-config FILE\n\nValidate a configuration file: prints a summary (secrets masked) and exits 0,\nor lists every problem with its line and exits 2.")
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		return 2
	}
	if fs.NArg() != 1 {
		fs.Usage()
		return 2
	}
	path := fs.Arg(0)
	cfg, err := config.LoadWith(path, config.Options{Getenv: e.getenv})
	var probs config.Problems
	if errors.As(err, &probs) {
		fmt.Fprintf(e.stderr, "%s: %d problem(s)\n", path, len(probs))
		for _, p := range probs {
			fmt.Fprintf(e.stderr, "  %s\n", p)
		}
		return 2
	}
	if err != nil {
		fmt.Fprintf(e.stderr, "%s: %v\n", path, err)
		return 2
	}
	for _, w := range cfg.Warnings() {
		fmt.Fprintf(e.stderr, "warning: %s\n", w)
	}
	fmt.Fprintf(e.stdout, "%s: ok\n", path)
	cfg.WriteSummary(e.stdout)
	return 0
}
