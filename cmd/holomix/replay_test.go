package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"holomix/internal/testenv"
)

func runReplayArgs(t *testing.T, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	return runReplayStdin(t, "", args...)
}

func runReplayStdin(t *testing.T, stdin string, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	var out, errb bytes.Buffer
	e := &env{stdin: strings.NewReader(stdin), stdout: &out, stderr: &errb, getenv: func(string) string { return "" }}
	code = runReplay(context.Background(), e, args)
	return code, out.String(), errb.String()
}

// bogsFile finds the NTL-LTER under-ice file (Lottig 2022, EDI
// knb-lter-ntl.390.3, CC-BY 4.0; shared/data/ntl/SOURCES.md) by walking up
// from the working directory.
func bogsFile(t testing.TB) string {
	t.Helper()
	dir, err := os.Getwd()
	if err != nil {
		t.Fatal(err)
	}
	for {
		p := filepath.Join(dir, "shared", "data", "ntl", "bogs_underice_2016-2019_hourly.csv.gz")
		if _, err := os.Stat(p); err == nil {
			return p
		}
		if filepath.Dir(dir) == dir {
			t.Fatal("shared/data/ntl/bogs_underice_2016-2019_hourly.csv.gz not found above the working directory")
		}
		dir = filepath.Dir(dir)
	}
}

// Trout Bog through the whole command path. The chains cover two winters
// (2017-11-03..2018-02-02 and 2018-11-03..2019-02-02); observers recorded ice
// on 2017-11-10 and 2018-11-09 (NTL-LTER knb-lter-ntl.33, SOURCES.md). Here
// only the path is checked: an ice_on event in each winter and a summary.
// The detectors' accuracy is tested in package detect.
func TestReplay_TroutBogTable(t *testing.T) {
	code, out, errOut := runReplayArgs(t, "--site", "Trout Bog", bogsFile(t))
	if code != 0 {
		t.Fatalf("exit %d\n%s", code, errOut)
	}
	var iceOn []string
	for _, ln := range strings.Split(out, "\n") {
		if strings.Contains(ln, " ice_on") && strings.Contains(ln, "firing") {
			iceOn = append(iceOn, ln)
		}
		if strings.Contains(ln, "Crystal Bog") {
			t.Fatalf("--site Trout Bog printed another lake: %q", ln)
		}
	}
	has := func(prefix string) bool {
		for _, ln := range iceOn {
			if strings.HasPrefix(ln, prefix) {
				return true
			}
		}
		return false
	}
	if !has("2017-11") || !has("2018-11") {
		summary := out
		if i := strings.Index(out, "Season summary"); i >= 0 {
			summary = out[i:]
		}
		t.Errorf("ice_on events %q, want one in November 2017 and one in November 2018\n%s", iceOn, summary)
	}
	for _, want := range []string{"Event timeline (data time, UTC)", "Season summary: Trout Bog", "ice cover", "ice duration", "sensor faults", "Caution: ice is inferred"} {
		if !strings.Contains(out, want) {
			t.Errorf("output lacks %q", want)
		}
	}
	if !strings.Contains(errOut, "140947 readings") || !strings.Contains(errOut, "0 unreadable") {
		t.Errorf("statistics: %s", errOut)
	}
}

func TestReplay_JSONAndCSV(t *testing.T) {
	code, out, errOut := runReplayArgs(t, bogsFile(t), "--format", "json", "--site", "TROUT BOG")
	if code != 0 {
		t.Fatalf("exit %d\n%s", code, errOut)
	}
	var events, sums int
	sc := bufio.NewScanner(strings.NewReader(out))
	sc.Buffer(nil, 1<<20)
	for sc.Scan() {
		var rec map[string]any
		if err := json.Unmarshal(sc.Bytes(), &rec); err != nil {
			t.Fatalf("line %q: %v", sc.Text(), err)
		}
		switch rec["record"] {
		case "event":
			if sums > 0 {
				t.Fatal("event after a summary")
			}
			events++
			for _, k := range []string{"time", "site", "kind", "status", "summary"} {
				if _, ok := rec[k]; !ok {
					t.Fatalf("event without %q: %s", k, sc.Text())
				}
			}
		case "summary":
			sums++
			if rec["site"] != "Trout Bog" || rec["profiles"].(float64) < 4000 {
				t.Errorf("summary %s", sc.Text())
			}
			for _, k := range []string{"first", "last", "stratified", "overturns", "tmd_reached", "ice_on", "ice_off", "ice_days", "ice_open", "sensor_faults"} {
				if _, ok := rec[k]; !ok {
					t.Errorf("summary without %q", k)
				}
			}
		default:
			t.Fatalf("unknown record %s", sc.Text())
		}
	}
	if events == 0 || sums != 1 {
		t.Fatalf("%d events, %d summaries", events, sums)
	}

	code, out, errOut = runReplayArgs(t, "--format", "csv", "--site", "Trout Bog", bogsFile(t))
	if code != 0 {
		t.Fatalf("csv: exit %d\n%s", code, errOut)
	}
	rows, err := csv.NewReader(strings.NewReader(out)).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if strings.Join(rows[0], ",") != "record,site,time,end,kind,status,severity,subject,season,from,to,confidence,value,summary" {
		t.Fatalf("header %v", rows[0])
	}
	kinds := map[string]int{}
	for _, r := range rows[1:] {
		kinds[r[0]+"/"+r[4]]++
	}
	if kinds["event/ice_on"] == 0 || kinds["summary/profiles"] != 1 || kinds["summary/ice_on"] == 0 || kinds["summary/sensor_faults"] != 1 {
		t.Errorf("csv rows by kind: %v", kinds)
	}
	if n := len(rows) - 1 - countPrefix(rows[1:], "summary"); n != events {
		t.Errorf("csv has %d event rows, json %d events", n, events)
	}
}

func countPrefix(rows [][]string, record string) int {
	n := 0
	for _, r := range rows {
		if r[0] == record {
			n++
		}
	}
	return n
}

func TestReplay_ConfigAndOverrides(t *testing.T) {
	dir := t.TempDir()
	cfg := filepath.Join(dir, "c.yaml")
	os.WriteFile(cfg, []byte(`mqtt:
  broker: tcp://127.0.0.1:1883
  subscriptions:
    - {topic: "buoys/+/chain", format: json, template: "buoys/{site}/chain"}
storage: {dir: `+filepath.Join(dir, "state")+`}
sites:
  - {id: orrin, name: Orrin Pond, max_depth_m: 4, sensor_depths_m: [0.5, 1.5, 3]}
`), 0o644)
	// An invented pond in summer, semicolon-separated, column names given by
	// option, site from the option (the file has no site column).
	var b strings.Builder
	b.WriteString("when;z;water\n")
	t0 := time.Date(2021, 7, 1, 0, 0, 0, 0, time.UTC)
	for h := 0; h < 24*3; h++ {
		ts := t0.Add(time.Duration(h) * time.Hour).Format("2006-01-02 15:04:05")
		// A diel cycle, so that quality control does not take the sensors
		// for stuck ones.
		diel := 0.5 * math.Sin(float64(h)*2*math.Pi/24)
		for _, d := range []struct{ z, c float64 }{{0.5, 24}, {1.5, 20}, {3, 12}, {3.7, 11}} {
			fmt.Fprintf(&b, "%s;%g;%.3f\n", ts, d.z, d.c+diel/(1+d.z))
		}
	}
	data := filepath.Join(dir, "pond.csv")
	os.WriteFile(data, []byte(b.String()), 0o644)
	code, out, errOut := runReplayArgs(t, "-c", cfg, data, "--site", "Orrin Pond", "--time-col", "when", "--depth-col", "z", "--temp-col", "water", "--format", "json")
	if code != 0 {
		t.Fatalf("exit %d\n%s", code, errOut)
	}
	// 3.7 m is not a configured depth: quality control flags it.
	if !strings.Contains(errOut, "unknown_depth 72") {
		t.Errorf("stderr lacks the unknown-depth count: %s", errOut)
	}
	var sum struct {
		Site, Name string
		Profiles   int
	}
	lines := strings.Split(strings.TrimSpace(out), "\n")
	if err := json.Unmarshal([]byte(lines[len(lines)-1]), &sum); err != nil {
		t.Fatal(err)
	}
	// Hourly data in 10-minute intervals: one profile per hour.
	if sum.Site != "orrin" || sum.Name != "Orrin Pond" || sum.Profiles != 72 {
		t.Errorf("summary %+v", sum)
	}
}

func TestReplay_UsageAndBadInput(t *testing.T) {
	dir := t.TempDir()
	good := filepath.Join(dir, "g.csv")
	os.WriteFile(good, []byte("time,depth,temp\n2020-01-01T00:00:00Z,1,4\n"), 0o644)
	noHeader := filepath.Join(dir, "n.csv")
	os.WriteFile(noHeader, []byte("a,b\n1,2\n"), 0o644)
	for name, args := range map[string][]string{
		"no files":         {},
		"bad format":       {"--format", "xml", good},
		"unknown flag":     {"--speed", "9", good},
		"missing file":     {filepath.Join(dir, "absent.csv")},
		"no header":        {noHeader},
		"write without -c": {"--write", good},
		"site not in data": {"--site", "Elsewhere", bogsFile(t)},
		"missing config":   {"-c", filepath.Join(dir, "absent.yaml"), good},
	} {
		code, _, errOut := runReplayArgs(t, args...)
		if code != 2 {
			t.Errorf("%s: exit %d, want 2\n%s", name, code, errOut)
		}
	}
	code, _, errOut := runReplayArgs(t, "--site", "Elsewhere", bogsFile(t))
	if code != 2 || !strings.Contains(errOut, "Crystal Bog, Trout Bog") {
		t.Errorf("unmatched --site should list the sites in the files: %s", errOut)
	}
	code, out, errOut := runReplayStdin(t, "time,depth,temp,site\n2020-01-01T00:00:00Z,1,4,from-stdin\n", good, "--", "-")
	if code != 0 || !strings.Contains(out, "Season summary: g") || !strings.Contains(out, "Season summary: from-stdin") {
		t.Errorf("a file, '--', then stdin: exit %d\n%s\n%s", code, out, errOut)
	}
	if code, _, _ := runReplayArgs(t, "-h"); code != 0 {
		t.Errorf("-h exit %d", code)
	}
}

// replay --write backfills InfluxDB through the daemon's spool and writer: a
// real InfluxDB 1.8 on loopback (internal/testenv), then count what arrived.
func TestReplay_WriteToInfluxDB(t *testing.T) {
	in := testenv.StartInflux(t, testenv.InfluxOptions{})
	dir := t.TempDir()
	cfg := filepath.Join(dir, "c.yaml")
	os.WriteFile(cfg, []byte(`mqtt:
  broker: tcp://127.0.0.1:1883
  subscriptions:
    - {topic: "buoys/+/chain", format: json, template: "buoys/{site}/chain"}
storage: {dir: `+filepath.Join(dir, "state")+`}
influx: {url: "`+in.URL+`", bucket: "`+in.Bucket+`", batch_size: 500}
sites:
  - {id: orrin, name: Orrin Pond, max_depth_m: 4, sensor_depths_m: [0.5, 1.5, 3]}
`), 0o644)
	// Three days of an invented pond at 10-minute steps, wide format.
	var b strings.Builder
	b.WriteString("time,temp_0.5,temp_1.5,temp_3\n")
	t0 := time.Date(2021, 7, 1, 0, 0, 0, 0, time.UTC)
	n := 0
	for m := 0; m < 3*24*60; m += 10 {
		diel := 0.5 * math.Sin(float64(m)*2*math.Pi/1440)
		fmt.Fprintf(&b, "%d,%.3f,%.3f,%.3f\n", t0.Add(time.Duration(m)*time.Minute).Unix(), 24+diel, 20+diel/2, 12+diel/4)
		n += 3
	}
	data := filepath.Join(dir, "orrin.csv")
	os.WriteFile(data, []byte(b.String()), 0o644)
	code, _, errOut := runReplayArgs(t, "-c", cfg, "--write", data)
	if code != 0 {
		t.Fatalf("exit %d\n%s\n%s", code, errOut, in.Log())
	}
	count := func(q string) int {
		t.Helper()
		raw, err := in.InfluxQL(context.Background(), in.Token, q)
		if err != nil {
			t.Fatal(err)
		}
		var res struct {
			Results []struct {
				Series []struct {
					Values [][]any `json:"values"`
				} `json:"series"`
			} `json:"results"`
		}
		if err := json.Unmarshal(raw, &res); err != nil {
			t.Fatalf("%s: %v", raw, err)
		}
		if len(res.Results) == 0 || len(res.Results[0].Series) == 0 {
			return 0
		}
		return int(res.Results[0].Series[0].Values[0][1].(float64))
	}
	if got := count(`SELECT count(temp_c) FROM water_temperature WHERE site = 'orrin'`); got != n {
		t.Errorf("%d readings stored, want %d", got, n)
	}
	// One water_column point per 10-minute profile.
	if got := count(`SELECT count(state) FROM water_column WHERE site = 'orrin'`); got != n/3 {
		t.Errorf("%d water_column points, want %d", got, n/3)
	}
	if !strings.Contains(errOut, fmt.Sprintf("written to InfluxDB: %d readings", n)) {
		t.Errorf("stderr: %s", errOut)
	}
}

func TestReplay_PeriodsPairing(t *testing.T) {
	d := func(day int) time.Time { return time.Date(2019, 1, day, 0, 0, 0, 0, time.UTC) }
	show := func(ps []period) string {
		var parts []string
		for _, p := range ps {
			f, to := "…", "…"
			if p.from != nil {
				f = strconv.Itoa(p.from.Day())
			}
			if p.to != nil {
				to = strconv.Itoa(p.to.Day())
			}
			parts = append(parts, f+"-"+to)
		}
		return strings.Join(parts, " ")
	}
	for _, c := range []struct {
		starts, ends []time.Time
		want         string
	}{
		{nil, nil, ""},
		{[]time.Time{d(2)}, []time.Time{d(5)}, "2-5"},
		// Stratified at the start of the record: its end comes first.
		{[]time.Time{d(6), d(20)}, []time.Time{d(3), d(9)}, "…-3 6-9 20-…"},
		{[]time.Time{d(1), d(10)}, []time.Time{d(4)}, "1-4 10-…"},
	} {
		if got := show(periods(c.starts, c.ends)); got != c.want {
			t.Errorf("periods(%v, %v) = %q, want %q", c.starts, c.ends, got, c.want)
		}
	}
}
