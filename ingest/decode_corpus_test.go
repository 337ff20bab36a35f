package ingest

import (
	"bufio"
	"bytes"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"holomix/config"
)

// corpusDir holds the payload corpus and its MANIFEST.tsv (module-level testdata).
const corpusDir = "../testdata/payloads"

// corpusRecv is the receive time used for every corpus message.
var corpusRecv = time.Date(2024, 6, 1, 12, 0, 0, 0, time.UTC)

// corpusSenMLDepths maps the SenML record names of the corpus to depths.
func corpusSenMLDepths() map[string]float64 {
	return map[string]float64{"t0.5": 0.5, "t2": 2, "t5": 5, "t10": 10, "t20": 20}
}

// corpusSubs are the test subscription profiles named in MANIFEST.tsv
// (documented in testdata/payloads/README.md).
func corpusSubs() map[string]config.Subscription {
	return map[string]config.Subscription{
		"json":       {Topic: "payloads/#", Format: FormatJSON},
		"json-topic": {Topic: "lakes/+/sensor/+", Format: FormatJSON, Template: "lakes/{site}/sensor/{depth}"},
		"json-fields": {Topic: "payloads/#", Format: FormatJSON,
			Fields: config.Fields{Time: "ts", Depth: "z", Temp: "wt", Site: "lake", Sensor: "id"}},
		"json-profile": {Topic: "payloads/#", Format: FormatProfile},
		"value":        {Topic: "buoys/+/temp/+", Format: FormatValue, Template: "buoys/{site}/temp/{depth}"},
		"value-f":      {Topic: "buoys/+/temp/+", Format: FormatValue, Template: "buoys/{site}/temp/{depth}", Unit: "F"},
		"senml":        {Topic: "payloads/#", Format: FormatSenML, SenMLDepths: corpusSenMLDepths()},
		"senml-topic":  {Topic: "senml/+", Format: FormatSenML, Template: "senml/{site}", SenMLDepths: corpusSenMLDepths()},
	}
}

// corpusQC is the quality-control configuration of the corpus: calder-mere
// has five configured sensor depths, other sites accept any depth.
func corpusQC() QCConfig {
	return QCConfig{KnownDepths: map[string][]float64{"calder-mere": {0.5, 2, 5, 10, 20}}}
}

var qcNames = []struct {
	flag QC
	name string
}{
	{QCRange, "range"}, {QCSpike, "spike"}, {QCStuck, "stuck"}, {QCFuture, "future"},
	{QCDuplicate, "duplicate"}, {QCUnknownDepth, "unknown_depth"}, {QCNoTime, "no_time"}, {QCLate, "late"},
}

func qcFlagByName(name string) (QC, bool) {
	for _, n := range qcNames {
		if n.name == name {
			return n.flag, true
		}
	}
	return 0, false
}

func qcString(q QC) string {
	var parts []string
	for _, n := range qcNames {
		if q&n.flag != 0 {
			parts = append(parts, n.name)
		}
	}
	return strings.Join(parts, "+")
}

type manifestRow struct {
	file, sub, topic, expect, checks string
	line                             int
}

func readManifest(t testing.TB) []manifestRow {
	t.Helper()
	f, err := os.Open(filepath.Join(corpusDir, "MANIFEST.tsv"))
	if err != nil {
		t.Fatalf("open manifest: %v", err)
	}
	defer f.Close()
	var rows []manifestRow
	sc := bufio.NewScanner(f)
	line := 0
	for sc.Scan() {
		line++
		s := sc.Text()
		if s == "" || strings.HasPrefix(s, "#") {
			continue
		}
		cols := strings.Split(s, "\t")
		if len(cols) != 5 {
			t.Fatalf("MANIFEST.tsv:%d: %d columns, want 5", line, len(cols))
		}
		rows = append(rows, manifestRow{cols[0], cols[1], cols[2], cols[3], cols[4], line})
	}
	if err := sc.Err(); err != nil {
		t.Fatalf("read manifest: %v", err)
	}
	return rows
}

func (r manifestRow) topicOr() string {
	if r.topic == "-" {
		return "payloads/test"
	}
	return r.topic
}

// TestCorpus runs every file of testdata/payloads through its decoder and
// quality control and checks the outcome written in MANIFEST.tsv. Expected
// values were worked out by hand: °F and K conversions from the SI
// definitions (t/°C = T/K − 273.15; t/°F = 1.8·t/°C + 32), epoch seconds with
// `date -u -d @1717242600` (2024-06-01T11:50:00Z), SenML resolution by RFC 8428 §4.6.
func TestCorpus(t *testing.T) {
	rows := readManifest(t)
	if len(rows) < 30 {
		t.Fatalf("manifest lists %d files, want at least 30", len(rows))
	}
	subs := corpusSubs()
	listed := map[string]bool{}
	reasons := map[string]bool{}
	for _, r := range Reasons() {
		reasons[r] = true
	}
	for _, row := range rows {
		listed[row.file] = true
		t.Run(row.file, func(t *testing.T) {
			sub, ok := subs[row.sub]
			if !ok {
				t.Fatalf("MANIFEST.tsv:%d: unknown subscription profile %q", row.line, row.sub)
			}
			payload, err := os.ReadFile(filepath.Join(corpusDir, row.file))
			if err != nil {
				t.Fatal(err)
			}
			dec, err := NewDecoder(sub, 0)
			if err != nil {
				t.Fatalf("NewDecoder: %v", err)
			}
			got, err := dec.Decode(row.topicOr(), payload, corpusRecv, nil)
			kind, want, _ := strings.Cut(row.expect, ":")
			if kind == "error" {
				if !reasons[want] {
					t.Fatalf("MANIFEST.tsv:%d: %q is not a reason label", row.line, want)
				}
				if Reason(err) != want {
					t.Fatalf("reason %q (err %v), want %q", Reason(err), err, want)
				}
				if len(got) != 0 {
					t.Fatalf("error with %d readings returned", len(got))
				}
				return
			}
			if err != nil {
				t.Fatalf("decode: %v", err)
			}
			qc := NewQualityControl(corpusQC())
			for i := range got {
				qc.Check(&got[i], corpusRecv)
			}
			switch kind {
			case "ok":
				n, _ := strconv.Atoi(want)
				if len(got) != n {
					t.Fatalf("%d readings, want %d", len(got), n)
				}
				for i, r := range got {
					if !r.Usable() {
						t.Errorf("reading %d flagged %s, want usable", i, qcString(r.QC))
					}
				}
			case "qc":
				flag, ok := qcFlagByName(want)
				if !ok {
					t.Fatalf("MANIFEST.tsv:%d: unknown flag %q", row.line, want)
				}
				found := false
				for _, r := range got {
					found = found || r.QC&flag != 0
				}
				if !found {
					t.Fatalf("no reading flagged %s; flags: %v", want, flagsOf(got))
				}
			default:
				t.Fatalf("MANIFEST.tsv:%d: bad expectation %q", row.line, row.expect)
			}
			checkFields(t, got, row.checks)
		})
	}
	entries, err := os.ReadDir(corpusDir)
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range entries {
		switch e.Name() {
		case "MANIFEST.tsv", "README.md":
			continue
		}
		if !listed[e.Name()] {
			t.Errorf("%s is in the corpus but not in MANIFEST.tsv", e.Name())
		}
	}
}

func flagsOf(rs []Reading) []string {
	out := make([]string, len(rs))
	for i, r := range rs {
		out[i] = qcString(r.QC)
	}
	return out
}

// checkFields applies "KEY=VALUE;I.KEY=VALUE" checks to the readings.
func checkFields(t *testing.T, rs []Reading, checks string) {
	t.Helper()
	if checks == "" {
		return
	}
	for _, c := range strings.Split(checks, ";") {
		key, want, ok := strings.Cut(c, "=")
		if !ok {
			t.Fatalf("bad check %q", c)
		}
		idx := 0
		if i, k, ok := strings.Cut(key, "."); ok {
			if n, err := strconv.Atoi(i); err == nil {
				idx, key = n, k
			}
		}
		if idx >= len(rs) {
			t.Errorf("check %q: only %d readings", c, len(rs))
			continue
		}
		r := rs[idx]
		var got string
		switch key {
		case "temp", "depth":
			v := r.TempC
			if key == "depth" {
				v = r.Depth
			}
			w, err := strconv.ParseFloat(want, 64)
			if err != nil {
				t.Fatalf("check %q: %v", c, err)
			}
			if math.Abs(v-w) > 1e-9 {
				t.Errorf("reading %d %s = %.12g, want %s", idx, key, v, want)
			}
			continue
		case "site":
			got = r.Site
		case "sensor":
			got = r.Sensor
		case "time":
			got = r.Time.Format(time.RFC3339Nano)
			if r.Time.Location() != time.UTC {
				t.Errorf("reading %d time not in UTC: %v", idx, r.Time)
			}
		case "qc":
			got = qcString(r.QC)
		default:
			t.Fatalf("check %q: unknown key", c)
		}
		if got != want {
			t.Errorf("reading %d %s = %q, want %q", idx, key, got, want)
		}
	}
}

// TestCorpusGenerated covers hostile inputs too big to commit: they are built here.
func TestCorpusGenerated(t *testing.T) {
	subs := corpusSubs()
	big := bytes.Repeat([]byte(" "), 1<<20)
	copy(big, `{"site":"calder-mere","depth_m":5,"temp_c":14.25}`)
	manyNums := func(n int, v string) string {
		return strings.TrimSuffix(strings.Repeat(v+",", n), ",")
	}
	manyList := strings.TrimSuffix(strings.Repeat(`{"depth_m":1,"temp_c":4},`, MaxReadingsPerMessage+1), ",")
	manySenML := `[{"bn":"tamsin-res/","bt":1717242600,"bu":"Cel"},` +
		strings.TrimSuffix(strings.Repeat(`{"n":"t2","v":4},`, MaxReadingsPerMessage+1), ",") + "]"
	justEnough := `{"site":"calder-mere","time":1717242600,"depths_m":[` + manyNums(MaxReadingsPerMessage, "1") +
		`],"temps_c":[` + manyNums(MaxReadingsPerMessage, "4") + `]}`
	cases := []struct {
		name, sub, topic string
		payload          []byte
		want             string // reason, or "" for success
		n                int
	}{
		{"1MB json", "json", "p", big, ReasonTooLarge, 0},
		{"1MB profile", "json-profile", "p", big, ReasonTooLarge, 0},
		{"1MB senml", "senml", "p", big, ReasonTooLarge, 0},
		{"1MB value", "value", "buoys/calder-mere/temp/5", big, ReasonTooLarge, 0},
		{"arrays 10001", "json-profile", "p", []byte(`{"site":"calder-mere","depths_m":[` + manyNums(MaxReadingsPerMessage+1, "1") +
			`],"temps_c":[` + manyNums(MaxReadingsPerMessage+1, "4") + `]}`), ReasonTooMany, 0},
		{"arrays 10000", "json-profile", "p", []byte(justEnough), "", MaxReadingsPerMessage},
		{"list 10001", "json-profile", "p", []byte(`{"site":"calder-mere","readings":[` + manyList + `]}`), ReasonTooMany, 0},
		{"senml 10001", "senml", "p", []byte(manySenML), ReasonTooMany, 0},
		{"nesting 100000", "json", "p", []byte(strings.Repeat("[", 100000) + strings.Repeat("]", 100000)), ReasonTooDeep, 0},
		{"nesting 33", "json-profile", "p", []byte(strings.Repeat("[", 33) + strings.Repeat("]", 33)), ReasonTooDeep, 0},
		{"nesting 32 inside string", "json", "p", []byte(`{"site":"` + strings.Repeat("[", 40) + `","depth_m":1,"temp_c":4}`), "", 1},
		{"400-digit temperature", "json", "p", []byte(`{"site":"calder-mere","depth_m":5,"temp_c":1` + strings.Repeat("0", 400) + `}`), ReasonNonFinite, 0},
		{"long sensor id", "json", "p", []byte(`{"site":"calder-mere","depth_m":5,"temp_c":4,"sensor":"` + strings.Repeat("s", 200) + `"}`), ReasonBadSensor, 0},
		{"long site", "json", "p", []byte(`{"site":"` + strings.Repeat("s", 200) + `","depth_m":5,"temp_c":4}`), ReasonBadSite, 0},
		{"long topic depth", "value", "buoys/calder-mere/temp/" + strings.Repeat("5", 100), []byte("4"), ReasonBadTopic, 0},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			dec, err := NewDecoder(subs[c.sub], 0)
			if err != nil {
				t.Fatal(err)
			}
			got, err := dec.Decode(c.topic, c.payload, corpusRecv, nil)
			if Reason(err) != c.want {
				t.Fatalf("reason %q (%v), want %q", Reason(err), err, c.want)
			}
			if len(got) != c.n {
				t.Fatalf("%d readings, want %d", len(got), c.n)
			}
		})
	}
}
