package main

import (
	"context"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"strings"
	"testing"

	"holomix/internal/testenv"
)

// BenchmarkReplayYear replays a synthetic year of 1-minute data at 24 depths
// for one site (12 614 400 readings, deploy/gen-year) through the whole
// command: gzip, CSV parsing, quality control, assembly, detection. Run it
// with GOMAXPROCS=1 for the one-core figure:
//
//	GOMAXPROCS=1 go test -run '^$' -bench ReplayYear -benchtime 1x ./cmd/holomix/
//
// HOLOMIX_YEAR_FILE names an already generated file; otherwise one is
// generated into a temporary directory first (not timed).
func BenchmarkReplayYear(b *testing.B) {
	path := os.Getenv("HOLOMIX_YEAR_FILE")
	if path == "" {
		root, err := testenv.RepoRoot()
		if err != nil {
			b.Fatal(err)
		}
		path = filepath.Join(b.TempDir(), "year.csv.gz")
		cmd := exec.Command(filepath.Join(runtime.GOROOT(), "bin", "go"), "run", "./deploy/gen-year", "-o", path)
		cmd.Dir = root
		if out, err := cmd.CombinedOutput(); err != nil {
			b.Fatalf("generate the year: %v\n%s", err, out)
		}
	}
	const readings = 365 * 24 * 60 * 24
	b.ResetTimer()
	for b.Loop() {
		var errb strings.Builder
		e := &env{stdin: strings.NewReader(""), stdout: io.Discard, stderr: &errb, getenv: func(string) string { return "" }}
		if code := runReplay(context.Background(), e, []string{path}); code != 0 {
			b.Fatalf("exit %d: %s", code, errb.String())
		}
		if !strings.Contains(errb.String(), "replayed 12614400 readings") {
			b.Fatalf("unexpected statistics: %s", errb.String())
		}
	}
	b.ReportMetric(float64(readings)*float64(b.N)/b.Elapsed().Seconds(), "readings/s")
}
