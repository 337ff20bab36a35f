package main

import (
	"context"
	"errors"
	"flag"
	"fmt"

	"holomix/config"
)

const checkConfigUsage = `usage: holomix check-config FILE
       holomix check-config --partition FILE FILE...

Validate a configuration file: prints a summary (secrets masked) and exits 0,
or lists every problem with its line and exits 2.

With --partition, load several instances' files (secrets are not read: run
check-config FILE on each instance's machine for that) and warn when two of them
claim the same site, subscribe to overlapping topic filters, use the same
mqtt.client_id or the same storage.dir. Exits 0 with the warnings printed, 2 when
a file does not load.`

func runCheckConfig(_ context.Context, e *env, args []string) int {
	fs := flag.NewFlagSet("check-config", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	partition := fs.Bool("partition", false, "check several instances' files for clashes (sites, topic filters, client ids, storage dirs)")
	fs.Usage = func() {
		fmt.Fprintln(e.stderr, checkConfigUsage)
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return 0
		}
		return 2
	}
	if *partition {
		if fs.NArg() < 2 {
			fmt.Fprintln(e.stderr, "check-config --partition: give at least two files")
			fs.Usage()
			return 2
		}
		return checkPartition(e, fs.Args())
	}
	if fs.NArg() != 1 {
		fs.Usage()
		return 2
	}
	path := fs.Arg(0)
	cfg, ok := loadForCheck(e, path, config.Options{Getenv: e.getenv})
	if !ok {
		return 2
	}
	for _, w := range cfg.Warnings() {
		fmt.Fprintf(e.stderr, "warning: %s\n", w)
	}
	fmt.Fprintf(e.stdout, "%s: ok\n", path)
	cfg.WriteSummary(e.stdout)
	return 0
}

// loadForCheck loads one file and prints its problems; ok is false when it did not load.
func loadForCheck(e *env, path string, o config.Options) (*config.Config, bool) {
	cfg, err := config.LoadWith(path, o)
	var probs config.Problems
	if errors.As(err, &probs) {
		fmt.Fprintf(e.stderr, "%s: %d problem(s)\n", path, len(probs))
		for _, p := range probs {
			fmt.Fprintf(e.stderr, "  %s\n", p)
		}
		return nil, false
	}
	if err != nil {
		fmt.Fprintf(e.stderr, "%s: %v\n", path, err)
		return nil, false
	}
	return cfg, true
}

// checkPartition loads every file (reporting all that fail) and prints the clashes between them.
func checkPartition(e *env, paths []string) int {
	var insts []config.Instance
	failed := false
	for _, p := range paths {
		cfg, ok := loadForCheck(e, p, config.Options{Getenv: e.getenv, SkipSecrets: true})
		if !ok {
			failed = true
			continue
		}
		for _, w := range cfg.Warnings() {
			fmt.Fprintf(e.stderr, "warning: %s: %s\n", p, w)
		}
		insts = append(insts, config.Instance{Name: p, Config: cfg})
	}
	if failed {
		return 2
	}
	sites, subs := 0, 0
	for _, in := range insts {
		fmt.Fprintf(e.stdout, "%s: ok: %d site(s), %d subscription(s), client_id %s, storage %s\n",
			in.Name, len(in.Config.Sites), len(in.Config.MQTT.Subscriptions), in.Config.MQTT.ClientID, in.Config.Storage.Dir)
		sites += len(in.Config.Sites)
		subs += len(in.Config.MQTT.Subscriptions)
	}
	warns := config.PartitionWarnings(insts)
	for _, w := range warns {
		fmt.Fprintf(e.stderr, "warning: %s\n", w)
	}
	verdict := "clean"
	if len(warns) > 0 {
		verdict = fmt.Sprintf("%d warning(s)", len(warns))
	}
	fmt.Fprintf(e.stdout, "partition: %d instances, %d sites, %d subscriptions: %s\n", len(insts), sites, subs, verdict)
	return 0
}
