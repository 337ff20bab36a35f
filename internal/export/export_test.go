package export

import (
	"bytes"
	"context"
	"fmt"
	"strings"
	"testing"
	"time"

	influxdb2 "github.com/influxdata/influxdb-client-go/v2"
	"github.com/influxdata/influxdb-client-go/v2/api/write"

	"holomix/config"
	"holomix/detect"
	"holomix/ingest"
	"holomix/internal/engine"
	"holomix/internal/testenv"
)

var t0 = time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)

func at(min int) time.Time { return t0.Add(time.Duration(min) * time.Minute) }

// fixture starts InfluxDB (with authentication, as deployed) and stores
// readings, column records and events of two sites, written the way the
// daemon writes them (ingest.AppendLineProtocol, engine.EventPoint).
type fixture struct {
	in *testenv.Influx
	q  Querier
}

func startFixture(t *testing.T) *fixture {
	t.Helper()
	in := testenv.StartInflux(t, testenv.InfluxOptions{Auth: true, Username: "admin", Password: "fx-admin-pw"})
	var cfg config.Influx
	cfg.URL, cfg.Bucket = in.URL, in.Bucket
	cfg.Token.Set(in.Token)
	q, closeFn, err := NewQuerier(cfg)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(closeFn)
	client := influxdb2.NewClient(in.URL, in.Token)
	defer client.Close()
	ctx := context.Background()
	wr := client.WriteAPIBlocking("", in.Bucket)

	readings := []ingest.Reading{
		{Site: "fenwater", Depth: 0.5, Time: at(-10), TempC: 4.6},                              // before --from
		{Site: "fenwater", Depth: 0.5, Time: at(0), TempC: 4.51},                               //
		{Site: "fenwater", Depth: 2, Time: at(0), TempC: 4.2},                                  //
		{Site: "fenwater", Depth: 10, Time: at(0), TempC: 3.98},                                //
		{Site: "fenwater", Depth: 0.5, Time: at(10), TempC: 4.49},                              //
		{Site: "fenwater", Depth: 2, Time: at(10), TempC: 49.5, QC: ingest.QCRange},            // flagged: excluded by --usable-only
		{Site: "fenwater", Depth: 10, Time: at(10), TempC: 3.97},                               //
		{Site: "fenwater", Depth: 0.5, Time: at(70), TempC: 4.47},                              // second hour: another chunk
		{Site: "fenwater", Depth: 2, Sensor: "s2", Time: at(70), TempC: 4.18},                  // a sensor tag
		{Site: "fenwater", Depth: 10, Time: at(70), TempC: 3.97, QC: ingest.QCNoTime},          // informational flag: kept
		{Site: "fenwater", Depth: 10, Time: at(80), TempC: 3.96},                               // one depth only
		{Site: "fenwater", Depth: 0.5, Time: at(180), TempC: 4.4},                              // at --to: excluded
		{Site: "gorsemoor", Depth: 0.5, Time: at(0), TempC: 9.9},                               // another site
		{Site: "fenwater", Depth: 1.25, Time: at(0).Add(500 * time.Millisecond), TempC: 4.333}, // sub-second time
	}
	var lp []byte
	for i := range readings {
		lp = ingest.AppendLineProtocol(lp, &readings[i])
	}
	if err := wr.WriteRecord(ctx, strings.TrimSpace(string(lp))); err != nil {
		t.Fatalf("write readings: %v", err)
	}

	cols := []*write.Point{
		influxdb2.NewPoint(engine.MeasurementColumn, map[string]string{"site": "fenwater"}, map[string]any{
			"state": "stratified", "seasonal": "stratified", "surface_temp_c": 18.2, "bottom_temp_c": 6.1,
			"schmidt_j_m2": 120.5, "thermocline_m": 6.5, "sensors_used": int64(3), "sensors_expected": int64(3), "ice_inferred": false,
		}, at(0)),
		influxdb2.NewPoint(engine.MeasurementColumn, map[string]string{"site": "fenwater"}, map[string]any{
			"state": "mixed", "seasonal": "stratified", "reason": "density difference 0.02 kg/m3, below 0.05",
			"surface_temp_c": 8.2, "bottom_temp_c": 8.1, "schmidt_j_m2": 0.4, "sensors_used": int64(3), "sensors_expected": int64(3),
			"ice_inferred": false, "days_to_tmd_low": 12.5, "days_to_tmd_high": 20.0,
		}, at(10)),
		influxdb2.NewPoint(engine.MeasurementColumn, map[string]string{"site": "gorsemoor"}, map[string]any{"state": "mixed"}, at(0)),
	}
	events := []detect.Event{
		{Time: at(10), Site: "fenwater", Kind: detect.KindIceOn, Status: detect.StatusFiring, Severity: "info", Confidence: "medium",
			Summary: "Ice likely at Fenwater, inferred from water temperatures only", Metrics: []detect.Metric{{Name: "surface_temp_c", Value: 0.05, Unit: "°C"}}},
		{Time: at(0), Site: "fenwater", Kind: detect.KindOverturn, Status: detect.StatusFiring, Severity: "warning", Season: "fall",
			From: "stratified", To: "mixed", Confidence: "high", Summary: `Fall overturn: column mixed, "4.1 °C" top to bottom`,
			Metrics: []detect.Metric{{Name: "density_diff_kg_m3", Value: 0.01, Unit: "kg/m3"}, {Name: "schmidt_j_m2", Value: 0.8, Unit: "J/m2"}}},
		{Time: at(0), Site: "gorsemoor", Kind: detect.KindOverturn, Status: detect.StatusFiring, Severity: "warning", Summary: "other site"},
	}
	for _, e := range events {
		cols = append(cols, engine.EventPoint(e))
	}
	if err := wr.WritePoint(ctx, cols...); err != nil {
		t.Fatalf("write derived points: %v", err)
	}
	return &fixture{in: in, q: q}
}

// TestMeasurementNames: the export reads the measurements the engine writes.
func TestMeasurementNames(t *testing.T) {
	if measurementColumn != engine.MeasurementColumn || measurementEvent != engine.MeasurementEvent {
		t.Fatalf("export reads %s/%s, the engine writes %s/%s", measurementColumn, measurementEvent, engine.MeasurementColumn, engine.MeasurementEvent)
	}
}

// TestExport runs every export case against one database holding the fixture.
func TestExport(t *testing.T) {
	f := startFixture(t)
	t.Run("readings", func(t *testing.T) { testReadings(t, f) })
	t.Run("reads back in replay", func(t *testing.T) { testReadsBackInReplay(t, f) })
	t.Run("columns", func(t *testing.T) { testColumns(t, f) })
	t.Run("events", func(t *testing.T) { testEvents(t, f) })
	t.Run("empty range", func(t *testing.T) { testEmptyRange(t, f) })
	t.Run("wrong credentials", func(t *testing.T) { testWrongCredentials(t, f) })
}

func (f *fixture) export(t *testing.T, o Options) (string, Stats) {
	t.Helper()
	o.Bucket, o.Site = f.in.Bucket, "fenwater"
	o.From, o.To = at(0), at(180)
	var buf bytes.Buffer
	st, err := Export(context.Background(), f.q, o, &buf)
	if err != nil {
		t.Fatalf("export %+v: %v\n%s", o, err, f.in.Log())
	}
	return buf.String(), st
}

func lines(s ...string) string { return strings.Join(s, "\n") + "\n" }

func testReadings(t *testing.T, f *fixture) {

	long := lines(
		"time,site,depth_m,temp_c,qc",
		"2026-03-01T00:00:00Z,fenwater,0.5,4.51,0",
		"2026-03-01T00:00:00Z,fenwater,2,4.2,0",
		"2026-03-01T00:00:00Z,fenwater,10,3.98,0",
		"2026-03-01T00:00:00.5Z,fenwater,1.25,4.333,0",
		"2026-03-01T00:10:00Z,fenwater,0.5,4.49,0",
		"2026-03-01T00:10:00Z,fenwater,2,49.5,1",
		"2026-03-01T00:10:00Z,fenwater,10,3.97,0",
		"2026-03-01T01:10:00Z,fenwater,0.5,4.47,0",
		"2026-03-01T01:10:00Z,fenwater,2,4.18,0",
		"2026-03-01T01:10:00Z,fenwater,10,3.97,64",
		"2026-03-01T01:20:00Z,fenwater,10,3.96,0",
	)
	// One query for the whole range and one per hour give the same file.
	for _, chunk := range []time.Duration{0, time.Hour} {
		got, st := f.export(t, Options{Chunk: chunk})
		if got != long {
			t.Errorf("long CSV (chunk %v):\n%s\nwant:\n%s", chunk, got, long)
		}
		if st.Rows != 11 {
			t.Errorf("rows %d", st.Rows)
		}
		if chunk == time.Hour && st.Queries != 3 {
			t.Errorf("hourly chunks over 3 h ran %d queries", st.Queries)
		}
	}

	got, _ := f.export(t, Options{UsableOnly: true})
	if want := strings.Replace(long, "2026-03-01T00:10:00Z,fenwater,2,49.5,1\n", "", 1); got != want {
		t.Errorf("long CSV, usable only:\n%s\nwant:\n%s", got, want)
	}

	wide := lines(
		"time,site,temp_c_0.5m,temp_c_1.25m,temp_c_2m,temp_c_10m",
		"2026-03-01T00:00:00Z,fenwater,4.51,,4.2,3.98",
		"2026-03-01T00:00:00.5Z,fenwater,,4.333,,",
		"2026-03-01T00:10:00Z,fenwater,4.49,,49.5,3.97",
		"2026-03-01T01:10:00Z,fenwater,4.47,,4.18,3.97",
		"2026-03-01T01:20:00Z,fenwater,,,,3.96",
	)
	for _, chunk := range []time.Duration{0, time.Hour} {
		got, st := f.export(t, Options{Layout: LayoutWide, Chunk: chunk})
		if got != wide {
			t.Errorf("wide CSV (chunk %v):\n%s\nwant:\n%s", chunk, got, wide)
		}
		if st.Rows != 5 {
			t.Errorf("wide rows %d", st.Rows)
		}
	}
	got, _ = f.export(t, Options{Layout: LayoutWide, UsableOnly: true})
	if want := strings.Replace(wide, "4.49,,49.5,3.97", "4.49,,,3.97", 1); got != want {
		t.Errorf("wide CSV, usable only:\n%s\nwant:\n%s", got, want)
	}

	got, _ = f.export(t, Options{Format: FormatJSON})
	wantJSON := `{"time":"2026-03-01T00:00:00Z","site":"fenwater","depth_m":0.5,"temp_c":4.51,"qc":0}`
	if first := strings.SplitN(got, "\n", 2)[0]; first != wantJSON || strings.Count(got, "\n") != 11 {
		t.Errorf("long JSON first line %s (want %s), %d lines", first, wantJSON, strings.Count(got, "\n"))
	}
	got, _ = f.export(t, Options{Format: FormatJSON, Layout: LayoutWide})
	if want := `{"time":"2026-03-01T01:20:00Z","site":"fenwater","temp_c_10m":3.96}`; !strings.HasSuffix(got, want+"\n") {
		t.Errorf("wide JSON:\n%s\nlast line should be %s", got, want)
	}
}

// testReadsBackInReplay: both reading layouts are files the replay
// command's reader (ingest.ReadStream) takes, with the same readings.
func testReadsBackInReplay(t *testing.T, f *fixture) {
	type key struct {
		t time.Time
		d float64
	}
	for _, layout := range []string{LayoutLong, LayoutWide} {
		out, _ := f.export(t, Options{Layout: layout})
		got := map[key]float64{}
		st, err := ingest.ReadStream(context.Background(), strings.NewReader(out), "export.csv", ingest.FileOptions{}, func(r ingest.Reading) error {
			if r.Site != "fenwater" {
				return fmt.Errorf("site %q", r.Site)
			}
			got[key{r.Time, r.Depth}] = r.TempC
			return nil
		})
		if err != nil || st.Bad != 0 {
			t.Fatalf("%s: replay reader: %v, stats %+v", layout, err, st)
		}
		wantFormat := map[string]string{LayoutLong: ingest.FileCSVLong, LayoutWide: ingest.FileCSVWide}[layout]
		if st.Format != wantFormat || st.Readings != 11 || len(got) != 11 {
			t.Fatalf("%s: read back %d readings (%d distinct) as %s, want 11 as %s", layout, st.Readings, len(got), st.Format, wantFormat)
		}
		if got[key{at(10), 2}] != 49.5 || got[key{at(0).Add(500 * time.Millisecond), 1.25}] != 4.333 || got[key{at(80), 10}] != 3.96 {
			t.Fatalf("%s: values %v", layout, got)
		}
	}
}

func testColumns(t *testing.T, f *fixture) {
	header := "time,site,state,seasonal,reason,surface_temp_c,bottom_temp_c,mean_temp_c,density_diff_kg_m3,tmd_c,schmidt_j_m2," +
		"thermocline_m,max_n2_s2,heat_to_tmd_j_m2,sensors_used,sensors_expected,ice_inferred,days_to_tmd_high,days_to_tmd_low"
	wide := lines(header,
		"2026-03-01T00:00:00Z,fenwater,stratified,stratified,,18.2,6.1,,,,120.5,6.5,,,3,3,false,,",
		`2026-03-01T00:10:00Z,fenwater,mixed,stratified,"density difference 0.02 kg/m3, below 0.05",8.2,8.1,,,,0.4,,,,3,3,false,20,12.5`,
	)
	if got, _ := f.export(t, Options{What: WhatColumns, Layout: LayoutWide}); got != wide {
		t.Errorf("columns wide:\n%s\nwant:\n%s", got, wide)
	}
	long := lines("time,site,field,value",
		"2026-03-01T00:00:00Z,fenwater,state,stratified",
		"2026-03-01T00:00:00Z,fenwater,seasonal,stratified",
		"2026-03-01T00:00:00Z,fenwater,surface_temp_c,18.2",
		"2026-03-01T00:00:00Z,fenwater,bottom_temp_c,6.1",
		"2026-03-01T00:00:00Z,fenwater,schmidt_j_m2,120.5",
		"2026-03-01T00:00:00Z,fenwater,thermocline_m,6.5",
		"2026-03-01T00:00:00Z,fenwater,sensors_used,3",
		"2026-03-01T00:00:00Z,fenwater,sensors_expected,3",
		"2026-03-01T00:00:00Z,fenwater,ice_inferred,false",
		"2026-03-01T00:10:00Z,fenwater,state,mixed",
		"2026-03-01T00:10:00Z,fenwater,seasonal,stratified",
		`2026-03-01T00:10:00Z,fenwater,reason,"density difference 0.02 kg/m3, below 0.05"`,
		"2026-03-01T00:10:00Z,fenwater,surface_temp_c,8.2",
		"2026-03-01T00:10:00Z,fenwater,bottom_temp_c,8.1",
		"2026-03-01T00:10:00Z,fenwater,schmidt_j_m2,0.4",
		"2026-03-01T00:10:00Z,fenwater,sensors_used,3",
		"2026-03-01T00:10:00Z,fenwater,sensors_expected,3",
		"2026-03-01T00:10:00Z,fenwater,ice_inferred,false",
		"2026-03-01T00:10:00Z,fenwater,days_to_tmd_high,20",
		"2026-03-01T00:10:00Z,fenwater,days_to_tmd_low,12.5",
	)
	if got, _ := f.export(t, Options{What: WhatColumns, Chunk: 5 * time.Minute}); got != long {
		t.Errorf("columns long:\n%s\nwant:\n%s", got, long)
	}
	got, _ := f.export(t, Options{What: WhatColumns, Layout: LayoutWide, Format: FormatJSON})
	want := `{"time":"2026-03-01T00:00:00Z","site":"fenwater","state":"stratified","seasonal":"stratified","surface_temp_c":18.2,"bottom_temp_c":6.1,` +
		`"schmidt_j_m2":120.5,"thermocline_m":6.5,"sensors_used":3,"sensors_expected":3,"ice_inferred":false}`
	if first := strings.SplitN(got, "\n", 2)[0]; first != want {
		t.Errorf("columns JSON:\n%s\nwant:\n%s", first, want)
	}
}

func testEvents(t *testing.T, f *fixture) {
	want := lines(
		"time,site,kind,status,severity,subject,season,from,to,confidence,summary,density_diff_kg_m3,schmidt_j_m2,surface_temp_c",
		`2026-03-01T00:00:00Z,fenwater,overturn,firing,warning,,fall,stratified,mixed,high,"Fall overturn: column mixed, ""4.1 °C"" top to bottom",0.01,0.8,`,
		"2026-03-01T00:10:00Z,fenwater,ice_on,firing,info,,,,,medium,\"Ice likely at Fenwater, inferred from water temperatures only\",,,0.05",
	)
	if got, _ := f.export(t, Options{What: WhatEvents}); got != want {
		t.Errorf("events:\n%s\nwant:\n%s", got, want)
	}
	got, _ := f.export(t, Options{What: WhatEvents, Format: FormatJSON})
	wantJSON := `{"time":"2026-03-01T00:00:00Z","site":"fenwater","kind":"overturn","status":"firing","severity":"warning","season":"fall",` +
		`"from":"stratified","to":"mixed","confidence":"high","summary":"Fall overturn: column mixed, \"4.1 °C\" top to bottom","density_diff_kg_m3":0.01,"schmidt_j_m2":0.8}`
	if first := strings.SplitN(got, "\n", 2)[0]; first != wantJSON {
		t.Errorf("events JSON:\n%s\nwant:\n%s", first, wantJSON)
	}
}

// testEmptyRange: a range without data gives the header only.
func testEmptyRange(t *testing.T, f *fixture) {
	var buf bytes.Buffer
	st, err := Export(context.Background(), f.q, Options{Bucket: f.in.Bucket, Site: "fenwater", From: at(-1000), To: at(-500)}, &buf)
	if err != nil || buf.String() != "time,site,depth_m,temp_c,qc\n" || st.Rows != 0 {
		t.Fatalf("empty range: %q %+v %v", buf.String(), st, err)
	}
}

// testWrongCredentials: a refused query is an error naming the cause, not an empty file.
func testWrongCredentials(t *testing.T, f *fixture) {
	var cfg config.Influx
	cfg.URL = f.in.URL
	cfg.Token.Set("admin:wrong")
	q, closeFn, err := NewQuerier(cfg)
	if err != nil {
		t.Fatal(err)
	}
	defer closeFn()
	_, err = Export(context.Background(), q, Options{Bucket: f.in.Bucket, Site: "fenwater", From: at(0), To: at(60)}, &bytes.Buffer{})
	if err == nil || !strings.Contains(err.Error(), "refused the credentials (HTTP 401)") {
		t.Fatalf("want an authorization error, got %v", err)
	}
}
