package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"path/filepath"
	"strings"
	"syscall"
	"time"

	"holomix/internal/testenv"
)

func main() {
	full := flag.Bool("full", false, "full mode (deploy/faults.sh): minute-long outages; default: the reduced mode of the go test run")
	only := flag.String("only", "", "comma-separated scenario names or numbers (default: all)")
	out := flag.String("out", "", "directory for raw outputs (default bench-out/faults-DATE-TIME under the repository)")
	flag.Parse()
	mode := Reduced
	if *full {
		mode = Full
	}
	dir := *out
	if dir == "" {
		root, err := testenv.RepoRoot()
		if err != nil {
			fmt.Fprintln(os.Stderr, err)
			os.Exit(1)
		}
		dir = filepath.Join(root, "bench-out", "faults-"+time.Now().UTC().Format("20060102-150405"))
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	os.Exit(run(ctx, mode, dir, *only, os.Stdout))
}

func run(ctx context.Context, mode Mode, dir, only string, stdout io.Writer) int {
	if err := os.MkdirAll(dir, 0o755); err != nil {
		fmt.Fprintln(os.Stderr, err)
		return 1
	}
	logf, err := os.Create(filepath.Join(dir, "faults.log"))
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		return 1
	}
	defer logf.Close()
	s := &Suite{Mode: mode, Out: dir, Log: io.MultiWriter(os.Stderr, logf)}
	if err := s.Start(ctx); err != nil {
		fmt.Fprintf(os.Stderr, "faults: %v\n", err)
		return 1
	}
	defer s.Stop()
	var names []string
	if only != "" {
		names = strings.Split(only, ",")
	}
	start := time.Now()
	rs := s.Run(ctx, names)
	table := Table(mode, rs)
	fmt.Fprintf(stdout, "\n## holomix fault suite (%s mode, %v)\n\n%s\nraw outputs: %s\n", mode.Name, time.Since(start).Round(time.Second), table, dir)
	_ = os.WriteFile(filepath.Join(dir, "results.md"), []byte(table), 0o644)
	if Failed(rs) || len(rs) == 0 {
		return 1
	}
	return 0
}
