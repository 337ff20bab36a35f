package engine

import (
	"context"
	"encoding/json"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/influxdata/influxdb-client-go/v2/api/write"

	"holomix/config"
	"holomix/detect"
	"holomix/detect/water"
	"holomix/ingest"
)

// recSink records what the engine derives.
type recSink struct {
	events   []detect.Event
	columns  int
	rejected []string
	states   map[string]int
}

func (s *recSink) Column(c detect.Column, p detect.Profile) {
	s.columns++
	if s.states == nil {
		s.states = map[string]int{}
	}
	s.states[c.Site+"/"+string(c.State)]++
	if c.Rejected {
		s.rejected = append(s.rejected, c.Reason)
	}
	if c.Site != p.Site || !c.Time.Equal(p.Time) {
		panic("column and profile disagree")
	}
}

func (s *recSink) Event(e detect.Event) { s.events = append(s.events, e) }

var t0 = time.Date(2022, 6, 1, 0, 0, 0, 0, time.UTC)

// summer gives a stratified profile (warm over cold) at minute m.
func summer(site string, m int, depths []float64) []ingest.Reading {
	var rs []ingest.Reading
	for _, d := range depths {
		rs = append(rs, ingest.Reading{Site: site, Depth: d, Time: t0.Add(time.Duration(m) * time.Minute), TempC: 22 - 1.5*d})
	}
	return rs
}

func TestEngine_SitesFromData(t *testing.T) {
	var sink recSink
	e, err := New(nil, &sink)
	if err != nil {
		t.Fatal(err)
	}
	for m := 0; m < 24*60; m += 10 {
		for _, r := range summer("Pond A", m, []float64{0.5, 2, 4, 6}) {
			e.Add(r)
		}
		for _, r := range summer("pond-b", m, []float64{1, 3, 5}) {
			e.Add(r)
		}
	}
	e.Flush()
	ids := e.SiteIDs()
	if strings.Join(ids, ",") != "Pond A,pond-b" {
		t.Fatalf("sites %v", ids)
	}
	if d := e.sites["Pond A"].cfg.MaxDepth; d != 6 {
		t.Errorf("Pond A max depth %g, want the deepest sensor 6 m", d)
	}
	if d := e.sites["pond-b"].cfg.MaxDepth; d != 5 {
		t.Errorf("pond-b max depth %g, want 5 m", d)
	}
	if sink.columns != 2*144 || len(sink.rejected) != 0 {
		t.Fatalf("%d columns (%d rejected: %v), want 288", sink.columns, len(sink.rejected), sink.rejected)
	}
	// 22 °C over 13 °C: stratified by the density criterion (SCIENCE.md §5).
	if sink.states["Pond A/"+string(water.StateStratified)] != 144 {
		t.Errorf("states %v", sink.states)
	}
	sums := e.Summaries()
	if len(sums) != 2 || sums[0].Site != "Pond A" || sums[0].Profiles != 144 {
		t.Fatalf("summaries %+v", sums)
	}
	st := e.Stats()
	if st.Readings != 144*7 || st.Profiles != 288 || st.Late != 0 {
		t.Errorf("stats %+v", st)
	}
}

func TestEngine_DeeperSensorRebuildsDataSite(t *testing.T) {
	var sink recSink
	e, _ := New(nil, &sink)
	for m := 0; m < 120; m += 10 {
		for _, r := range summer("p", m, []float64{0.5, 2, 4}) {
			e.Add(r)
		}
	}
	for m := 120; m < 240; m += 10 {
		for _, r := range summer("p", m, []float64{0.5, 2, 4, 8}) {
			e.Add(r)
		}
	}
	e.Flush()
	if len(sink.rejected) != 0 {
		t.Fatalf("rejected: %v", sink.rejected)
	}
	if d := e.sites["p"].cfg.MaxDepth; d != 8 {
		t.Fatalf("max depth %g, want 8 after the deeper sensor", d)
	}
	if e.Stats().Rebuilt != 1 || e.Summaries()[0].Profiles != 24 {
		t.Fatalf("stats %+v, summary %+v", e.Stats(), e.Summaries()[0])
	}
}

func TestEngine_ConfiguredSitesResolveAndAir(t *testing.T) {
	cfg := &config.Config{Sites: []config.Site{
		{ID: "tessary", Name: "Lake Tessary", MaxDepth: 10, Depths: []float64{1, 5, 9}},
		{ID: "orrin", Name: "orrin pond", MaxDepth: 3},
	}}
	var sink recSink
	e, err := New(cfg, &sink)
	if err != nil {
		t.Fatal(err)
	}
	for raw, want := range map[string]string{"tessary": "tessary", "Lake Tessary": "tessary", "LAKE TESSARY": "tessary", "ORRIN": "orrin", "elsewhere": "elsewhere"} {
		if got := e.Resolve(raw); got != want {
			t.Errorf("Resolve(%q) = %q, want %q", raw, got, want)
		}
	}
	e.AddAir("Lake Tessary", t0, -8)
	e.AddAir("nowhere", t0, -8)
	if st := e.Stats(); st.Air != 1 || st.AirDropped != 1 {
		t.Errorf("air stats %+v", st)
	}
	for m := 0; m < 60; m += 10 {
		for _, r := range summer("Lake Tessary", m, []float64{1, 5, 9}) {
			e.Add(r)
		}
	}
	e.Flush()
	if sink.columns != 6 || e.SiteName("tessary") != "Lake Tessary" {
		t.Fatalf("%d columns, name %q", sink.columns, e.SiteName("tessary"))
	}
	if _, err := New(&config.Config{Sites: []config.Site{{ID: "x", Salinity: -1}}}, &sink); err == nil {
		t.Error("a bad site configuration was accepted")
	}
	if _, err := New(&config.Config{Detect: config.Detect{ProjectionWindow: config.Duration(time.Hour)}}, &sink); err == nil {
		t.Error("a projection window of 1 h (allowed 3-7 days) was accepted")
	}
	if _, err := New(nil, nil); err == nil {
		t.Error("nil sink accepted")
	}
}

func TestEngine_LateReadings(t *testing.T) {
	var sink recSink
	e, _ := New(&config.Config{Detect: config.Detect{Watermark: config.Duration(10 * time.Minute)}}, &sink)
	for m := 0; m < 60; m += 10 {
		for _, r := range summer("p", m, []float64{0.5, 2, 4}) {
			e.Add(r)
		}
	}
	late := ingest.Reading{Site: "p", Depth: 2, Time: t0.Add(5 * time.Minute), TempC: 10}
	if !e.Add(late) {
		t.Fatal("a reading for an emitted profile was not reported late")
	}
	bad := late
	bad.Time = t0.Add(2 * time.Hour)
	bad.QC = ingest.QCRange
	if e.Add(bad) {
		t.Fatal("an unusable reading was reported late")
	}
	if st := e.Stats(); st.Late != 1 || st.Unusable != 1 {
		t.Fatalf("stats %+v", st)
	}
}

// ntlReadings reads Trout Bog from the NTL-LTER bogs file (Lottig 2022, EDI
// knb-lter-ntl.390.3, CC-BY 4.0) and applies quality control once, so that
// every engine in a test sees the same flags.
func ntlReadings(t *testing.T) []ingest.Reading {
	t.Helper()
	dir, _ := os.Getwd()
	var path string
	for {
		p := filepath.Join(dir, "shared", "data", "ntl", "bogs_underice_2016-2019_hourly.csv.gz")
		if _, err := os.Stat(p); err == nil {
			path = p
			break
		}
		if filepath.Dir(dir) == dir {
			t.Fatal("shared/data/ntl/bogs_underice_2016-2019_hourly.csv.gz not found above the working directory")
		}
		dir = filepath.Dir(dir)
	}
	qc := ingest.NewQualityControl(ingest.QCConfig{})
	var rs []ingest.Reading
	_, err := ingest.ReadFile(context.Background(), path, ingest.FileOptions{}, func(r ingest.Reading) error {
		if r.Site == "Trout Bog" {
			qc.Check(&r, r.Time)
			rs = append(rs, r)
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return rs
}

func eventsJSON(t *testing.T, evs []detect.Event) []string {
	out := make([]string, len(evs))
	for i, ev := range evs {
		b, err := json.Marshal(ev)
		if err != nil {
			t.Fatal(err)
		}
		out[i] = string(b)
	}
	return out
}

func TestEngine_SnapshotRestoreSameEvents(t *testing.T) {
	rs := ntlReadings(t)
	var whole recSink
	e, _ := New(nil, &whole)
	for _, r := range rs {
		e.Add(r)
	}
	e.Flush()
	want := eventsJSON(t, whole.events)
	wantSum, _ := json.Marshal(e.Summaries())
	if len(want) == 0 {
		t.Fatal("no events from Trout Bog")
	}
	// Interrupt at a few points, including mid-profile and during the first winter.
	for _, cut := range []int{len(rs) / 7, len(rs)/3 + 5, len(rs) * 2 / 3} {
		var parts recSink
		e1, _ := New(nil, &parts)
		for _, r := range rs[:cut] {
			e1.Add(r)
		}
		snap, err := e1.Snapshot()
		if err != nil {
			t.Fatal(err)
		}
		e2, _ := New(nil, &parts)
		if err := e2.Restore(snap); err != nil {
			t.Fatalf("restore at %d: %v", cut, err)
		}
		for _, r := range rs[cut:] {
			e2.Add(r)
		}
		e2.Flush()
		got := eventsJSON(t, parts.events)
		if strings.Join(got, "\n") != strings.Join(want, "\n") {
			t.Errorf("cut at %d: %d events after restore, %d uninterrupted", cut, len(got), len(want))
		}
		if parts.columns != whole.columns {
			t.Errorf("cut at %d: %d columns, uninterrupted %d", cut, parts.columns, whole.columns)
		}
		gotSum, _ := json.Marshal(e2.Summaries())
		if string(gotSum) != string(wantSum) {
			t.Errorf("cut at %d: summaries differ\n%s\n%s", cut, gotSum, wantSum)
		}
	}
	var sink recSink
	e3, _ := New(nil, &sink)
	if err := e3.Restore([]byte(`{"version":99}`)); err == nil {
		t.Error("snapshot of another version accepted")
	}
	if err := e3.Restore([]byte(`not json`)); err == nil {
		t.Error("garbage accepted")
	}
}

func TestColumnPoint(t *testing.T) {
	m := water.Metrics{SurfaceTempC: 20, BottomTempC: 8, MeanTempC: 12.5, DensityDiff: 1.5, TmdC: []float64{3.98, 3.96},
		SchmidtJM2: 250, ThermoclineM: math.NaN(), MaxN2: 0.002, HeatToTmdJM2: 1e8, SensorsUsed: 2}
	c := detect.Column{Site: "Lake Tessary", Time: t0, State: water.StateStratified, Seasonal: "stratified", Metrics: m,
		Projections: []detect.Projection{{Name: "days_to_tmd", LowDays: 20, HighDays: 35}}, SensorsUsed: 2, SensorsExpected: 3}
	line := write.PointToLineProtocol(ColumnPoint(c), time.Nanosecond)
	for _, want := range []string{
		`water_column,site=Lake\ Tessary `, `state="stratified"`, `seasonal="stratified"`, "surface_temp_c=20", "bottom_temp_c=8",
		"mean_temp_c=12.5", "density_diff_kg_m3=1.5", "tmd_c=3.98", "schmidt_j_m2=250", "max_n2_s2=0.002",
		"heat_to_tmd_j_m2=1e+08", "days_to_tmd_low=20", "days_to_tmd_high=35", "sensors_used=2i", "sensors_expected=3i",
		"ice_inferred=false", " 1654041600000000000",
	} {
		if !strings.Contains(line, want) {
			t.Errorf("line %q lacks %q", line, want)
		}
	}
	if strings.Contains(line, "thermocline_m") || strings.Contains(line, "NaN") {
		t.Errorf("NaN thermocline written: %q", line)
	}
}

func TestEventPoint(t *testing.T) {
	ev := detect.Event{Time: t0, Site: "orrin", Kind: detect.KindOverturn, Status: detect.StatusFiring, Severity: "warning",
		From: "stratified", To: "mixed", Season: "fall", Summary: "fall overturn", Confidence: "all sensors",
		Metrics: []detect.Metric{{Name: "density_diff", Value: 0.02, Unit: "kg/m3"}, {Name: "bad", Value: math.Inf(1)}}}
	line := write.PointToLineProtocol(EventPoint(ev), time.Nanosecond)
	for _, want := range []string{
		"lake_event,kind=overturn,site=orrin ", `status="firing"`, `summary="fall overturn"`, `season="fall"`,
		`from="stratified"`, `to="mixed"`, `confidence="all sensors"`, `severity="warning"`, "density_diff=0.02",
	} {
		if !strings.Contains(line, want) {
			t.Errorf("line %q lacks %q", line, want)
		}
	}
	if strings.Contains(line, "bad=") || strings.Contains(line, "subject") {
		t.Errorf("unexpected field in %q", line)
	}
}

func BenchmarkEngineAdd(b *testing.B) {
	depths := make([]float64, 24)
	for i := range depths {
		depths[i] = 0.5 + float64(i)
	}
	var sink recSink
	e, _ := New(nil, &sink)
	b.ReportAllocs()
	for i := 0; b.Loop(); i++ {
		d := depths[i%24]
		e.Add(ingest.Reading{Site: "p", Depth: d, Time: t0.Add(time.Duration(i/24) * time.Minute), TempC: 22 - 0.5*d})
	}
}

// TestAppendColumnLineMatchesLibrary: the daemon's direct encoding of a
// column point is byte for byte what the InfluxDB client library makes of
// ColumnPoint (the library is the reference for line protocol here).
func TestAppendColumnLineMatchesLibrary(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 11))
	vals := []float64{0, -0.0, 1, -1, 3.98, 1e-7, 1.5e-5, 123456789, 1e20, 1e21, 1e22, -2.5e-300, math.MaxFloat64, math.SmallestNonzeroFloat64,
		math.NaN(), math.Inf(1), math.Inf(-1)}
	pick := func() float64 {
		if rng.IntN(3) == 0 {
			return vals[rng.IntN(len(vals))]
		}
		return (rng.Float64() - 0.3) * math.Pow(10, float64(rng.IntN(12)-6))
	}
	sites := []string{"larchmere", "Lake Tessary", "north basin, pier=2", `odd"name\x`, "tab\there"}
	reasons := []string{"", `top 1.20 °C is "colder"`, `back\slash`, "plain reason, with comma = and spaces"}
	for i := 0; i < 2000; i++ {
		m := water.Metrics{SurfaceTempC: pick(), BottomTempC: pick(), MeanTempC: pick(), DensityDiff: pick(), SchmidtJM2: pick(),
			ThermoclineM: pick(), MaxN2: pick(), HeatToTmdJM2: pick(), SensorsUsed: rng.IntN(3)}
		if rng.IntN(2) == 0 {
			m.TmdC = []float64{pick()}
		}
		c := detect.Column{Site: sites[rng.IntN(len(sites))], Time: t0.Add(time.Duration(rng.Int64N(1e15))), State: water.StateMixed,
			Seasonal: "fall", Reason: reasons[rng.IntN(len(reasons))], Metrics: m, SensorsUsed: rng.IntN(40), SensorsExpected: 40,
			IceInferred: rng.IntN(2) == 0}
		for k := rng.IntN(3); k > 0; k-- {
			c.Projections = append(c.Projections, detect.Projection{Name: []string{"days_to_tmd", "Days to ice"}[k%2], LowDays: pick(), HighDays: pick()})
		}
		want := strings.TrimSuffix(write.PointToLineProtocol(ColumnPoint(c), time.Nanosecond), "\n")
		if got := string(AppendColumnLine(nil, c)); got != want {
			t.Fatalf("column %d:\n got %s\nwant %s", i, got, want)
		}
	}
}

func BenchmarkColumnLine(b *testing.B) {
	m := water.Metrics{SurfaceTempC: 20, BottomTempC: 8, MeanTempC: 12.5, DensityDiff: 1.5, TmdC: []float64{3.98},
		SchmidtJM2: 250, ThermoclineM: 6.5, MaxN2: 0.002, HeatToTmdJM2: 1e8, SensorsUsed: 24}
	c := detect.Column{Site: "larchmere", Time: t0, State: water.StateStratified, Seasonal: "stratified", Metrics: m,
		Reason: "bottom water is 1.500 kg/m³ denser than the surface", Projections: []detect.Projection{{Name: "days_to_tmd", LowDays: 20, HighDays: 35}},
		SensorsUsed: 24, SensorsExpected: 24}
	b.Run("library", func(b *testing.B) {
		for b.Loop() {
			_ = write.PointToLineProtocol(ColumnPoint(c), time.Nanosecond)
		}
	})
	b.Run("direct", func(b *testing.B) {
		var buf []byte
		for b.Loop() {
			buf = AppendColumnLine(buf[:0], c)
		}
	})
}
