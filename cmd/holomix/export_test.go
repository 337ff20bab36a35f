package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"testing"
	"time"

	"holomix/internal/testenv"
)

func runMain(t *testing.T, vars map[string]string, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	var out, errb bytes.Buffer
	e := &env{stdin: strings.NewReader(""), stdout: &out, stderr: &errb, getenv: func(k string) string { return vars[k] }}
	code = dispatch(context.Background(), e, args)
	return code, out.String(), errb.String()
}

// TestReplayWriteExportRoundTrip: a recorded file stored with
// `holomix replay --write` comes back out of `holomix export` unchanged (long
// and wide layouts), and the exported events are the events replay reported.
func TestReplayWriteExportRoundTrip(t *testing.T) {
	db := testenv.StartInflux(t, testenv.InfluxOptions{Auth: true, Username: "researcher", Password: "rt-pw-3371"})
	dir := t.TempDir()
	vars := map[string]string{"HOLOMIX_TEST_TOKEN": db.Token}
	cfg := fmt.Sprintf(`mqtt:
  subscriptions:
    - topic: buoys/+/chain
      template: buoys/{site}/chain
influx:
  url: %s
  bucket: %s
  token: {env: HOLOMIX_TEST_TOKEN}
storage:
  dir: %s
sites:
  - id: fenwater
    max_depth_m: 10
    sensor_depths_m: [0.5, 2, 4, 6, 8]
detect:
  hold_time: 1h
  watermark: 20m
`, db.URL, db.Bucket, filepath.Join(dir, "state"))
	cfgPath := filepath.Join(dir, "holomix.yaml")
	if err := os.WriteFile(cfgPath, []byte(cfg), 0o600); err != nil {
		t.Fatal(err)
	}

	// The recorded file: the two-instance scenario at one site, long and wide.
	start := time.Date(2026, 10, 20, 0, 0, 0, 0, time.UTC)
	var long, wide strings.Builder
	long.WriteString("time,site,depth_m,temp_c\n")
	wide.WriteString("time,site")
	for _, d := range partitionDepths {
		fmt.Fprintf(&wide, ",temp_c_%gm", d)
	}
	wide.WriteString("\n")
	for step := 0; step < partitionSteps; step++ {
		ts := start.Add(time.Duration(step) * 10 * time.Minute).Format(time.RFC3339)
		fmt.Fprintf(&wide, "%s,fenwater", ts)
		for di, d := range partitionDepths {
			v := fmt.Sprintf("%.3f", partitionTemp(2, step, di))
			v = strings.TrimRight(strings.TrimRight(v, "0"), ".")
			fmt.Fprintf(&long, "%s,fenwater,%g,%s\n", ts, d, v)
			fmt.Fprintf(&wide, ",%s", v)
		}
		wide.WriteString("\n")
	}
	recorded := filepath.Join(dir, "fenwater.csv")
	if err := os.WriteFile(recorded, []byte(long.String()), 0o644); err != nil {
		t.Fatal(err)
	}

	code, out, errs := runMain(t, vars, "replay", "-c", cfgPath, "--format", "json", "--write", recorded)
	if code != 0 {
		t.Fatalf("replay --write: exit %d\n%s\n%s", code, out, errs)
	}
	var replayed []string
	for _, ln := range strings.Split(out, "\n") {
		if !strings.HasPrefix(ln, `{"record":"event"`) {
			continue
		}
		var ev struct {
			Time         time.Time
			Kind, Status string
		}
		if err := json.Unmarshal([]byte(ln), &ev); err != nil {
			t.Fatal(err)
		}
		replayed = append(replayed, fmt.Sprintf("%s,%s,%s", ev.Time.UTC().Format(time.RFC3339), ev.Kind, ev.Status))
	}
	if len(replayed) == 0 {
		t.Fatalf("the scenario raised no event in replay:\n%s", out)
	}

	from, to := start.Format(time.RFC3339), start.Add(partitionSteps*10*time.Minute).Format(time.RFC3339)
	export := func(args ...string) string {
		t.Helper()
		outFile := filepath.Join(t.TempDir(), "out.csv")
		base := []string{"export", "-c", cfgPath, "--site", "fenwater", "--from", from, "--to", to, "-o", outFile}
		code, stdout, errs := runMain(t, vars, append(base, args...)...)
		if code != 0 {
			t.Fatalf("export %v: exit %d\n%s\n%s", args, code, stdout, errs)
		}
		b, err := os.ReadFile(outFile)
		if err != nil {
			t.Fatal(err)
		}
		return string(b)
	}

	gotLong := export()
	var stripped strings.Builder
	for i, ln := range strings.Split(strings.TrimSuffix(gotLong, "\n"), "\n") {
		if i == 0 {
			if ln != "time,site,depth_m,temp_c,qc" {
				t.Fatalf("long header %q", ln)
			}
			stripped.WriteString("time,site,depth_m,temp_c\n")
			continue
		}
		cut := strings.LastIndexByte(ln, ',')
		if cut < 0 {
			t.Fatalf("row %q", ln)
		}
		if qc := ln[cut+1:]; qc != "0" {
			t.Errorf("reading %q stored with QC flags", ln)
		}
		stripped.WriteString(ln[:cut] + "\n")
	}
	if stripped.String() != long.String() {
		t.Fatalf("long export differs from the recorded file:\n%s", firstDiff(stripped.String(), long.String()))
	}
	if gotWide := export("--layout", "wide"); gotWide != wide.String() {
		t.Fatalf("wide export differs:\n%s", firstDiff(gotWide, wide.String()))
	}

	gotEvents := export("--what", "events")
	var exported []string
	for i, ln := range strings.Split(strings.TrimSuffix(gotEvents, "\n"), "\n") {
		f := strings.Split(ln, ",")
		if i == 0 {
			if strings.Join(f[:4], ",") != "time,site,kind,status" {
				t.Fatalf("events header %q", ln)
			}
			continue
		}
		exported = append(exported, f[0]+","+f[2]+","+f[3])
	}
	sort.Strings(exported) // same instant: export orders by kind
	sort.Strings(replayed)
	if strings.Join(exported, "\n") != strings.Join(replayed, "\n") {
		t.Fatalf("exported events:\n%s\nreplay reported:\n%s", strings.Join(exported, "\n"), strings.Join(replayed, "\n"))
	}
	t.Logf("round trip: %d readings, %d events", partitionSteps*len(partitionDepths), len(replayed))

	// The exported long file replays to the same events.
	back := filepath.Join(dir, "exported.csv")
	if err := os.WriteFile(back, []byte(gotLong), 0o644); err != nil {
		t.Fatal(err)
	}
	code, out2, errs := runMain(t, vars, "replay", "-c", cfgPath, "--format", "json", back)
	if code != 0 || eventLines(out2) != eventLines(out) {
		t.Fatalf("replay of the export: exit %d, events differ\n%s\nwant:\n%s\n%s", code, eventLines(out2), eventLines(out), errs)
	}
}

func eventLines(out string) string {
	var b strings.Builder
	for _, ln := range strings.Split(out, "\n") {
		if strings.HasPrefix(ln, `{"record":"event"`) {
			b.WriteString(ln + "\n")
		}
	}
	return b.String()
}

// firstDiff shows the first differing line of two texts.
func firstDiff(got, want string) string {
	g, w := strings.Split(got, "\n"), strings.Split(want, "\n")
	for i := 0; i < len(g) || i < len(w); i++ {
		var a, b string
		if i < len(g) {
			a = g[i]
		}
		if i < len(w) {
			b = w[i]
		}
		if a != b {
			return fmt.Sprintf("line %d:\n got  %q\n want %q", i+1, a, b)
		}
	}
	return "(equal)"
}

// TestExportUsage: bad options are usage errors (exit 2) naming the problem.
func TestExportUsage(t *testing.T) {
	dir := t.TempDir()
	cfg := filepath.Join(dir, "c.yaml")
	if err := os.WriteFile(cfg, []byte("mqtt:\n  subscriptions:\n    - topic: a/b\ninflux:\n  url: http://127.0.0.1:1\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	cases := []struct {
		args []string
		want string
	}{
		{[]string{"export", "--site", "x", "--from", "2026-01-01", "--to", "2026-02-01"}, "-c FILE is needed"},
		{[]string{"export", "-c", cfg, "--site", "x", "--from", "yesterday", "--to", "2026-02-01"}, `invalid time "yesterday"`},
		{[]string{"export", "-c", cfg, "--site", "x", "--from", "2026-02-01", "--to", "2026-01-01"}, "is not before --to"},
		{[]string{"export", "-c", cfg, "--from", "2026-01-01", "--to", "2026-02-01"}, "no site"},
		{[]string{"export", "-c", cfg, "--site", "x", "--from", "2026-01-01", "--to", "2026-02-01", "--what", "events", "--layout", "wide"}, "events have one layout"},
		{[]string{"export", "-c", cfg, "--site", "x", "--from", "2026-01-01", "--to", "2026-02-01", "--format", "xml"}, `unknown --format "xml"`},
	}
	for _, c := range cases {
		code, _, errs := runMain(t, nil, c.args...)
		if code != 2 || !strings.Contains(errs, c.want) {
			t.Errorf("%v: exit %d, stderr %q; want 2 and %q", c.args[1:], code, errs, c.want)
		}
	}
}
