package ingest

import (
	"context"
	"encoding/json"
	"fmt"
	"strings"
	"testing"
	"time"

	"github.com/influxdata/influxdb-client-go/v2/api/write"

	"holomix/internal/testenv"
)

// wrQuery runs an InfluxQL statement and returns the rows of the first series.
func wrQuery(t testing.TB, in *testenv.Influx, q string) [][]any {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	raw, err := in.InfluxQL(ctx, in.Token, q)
	if err != nil {
		t.Fatalf("query %q: %v", q, err)
	}
	var res struct {
		Results []struct {
			Series []struct {
				Values [][]any `json:"values"`
			} `json:"series"`
			Error string `json:"error"`
		} `json:"results"`
	}
	if err := json.Unmarshal(raw, &res); err != nil {
		t.Fatalf("query %q: %v: %s", q, err, raw)
	}
	if len(res.Results) == 0 || len(res.Results[0].Series) == 0 {
		return nil
	}
	return res.Results[0].Series[0].Values
}

// wrCount returns SELECT count(temp_c) over the whole measurement.
func wrCount(t testing.TB, in *testenv.Influx, where string) int {
	t.Helper()
	rows := wrQuery(t, in, "SELECT count(temp_c) FROM water_temperature"+where)
	if len(rows) == 0 {
		return 0
	}
	return int(rows[0][1].(float64))
}

func wrStart(t *testing.T, o WriterOptions) (*Writer, func()) {
	t.Helper()
	w, err := NewWriter(o)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- w.Run(ctx) }()
	return w, func() {
		cancel()
		if err := <-done; err != nil {
			t.Errorf("writer: %v", err)
		}
		w.Close()
	}
}

// TestWriterInflux18Compat writes through the v2 compatibility API of
// InfluxDB 1.8 with authentication on (bucket "db/rp", token "user:password").
func TestWriterInflux18Compat(t *testing.T) {
	in := testenv.StartInflux(t, testenv.InfluxOptions{Auth: true, Username: "holo", Password: "s3cret-pass"}) // 1.8 splits the Token header on spaces: no space in the password
	s := spOpen(t, SpoolOptions{})
	es := spEntries(12000)
	for i := range es {
		es[i].Time = spT0.Add(time.Duration(i) * time.Second)
		es[i].TempC = 4 + float64(i%100)/100
	}
	es[5].Site, es[5].Sensor, es[5].Depth = "north basin, pier=2", "t 5", 12.25 // characters line protocol escapes
	if _, err := s.Commit(es, nil); err != nil {
		t.Fatal(err)
	}
	if err := s.AppendPoints([]*write.Point{write.NewPoint("water_column", map[string]string{"site": "tarn-1"},
		map[string]any{"schmidt_j_m2": 42.5}, spT0)}); err != nil {
		t.Fatal(err)
	}
	// A re-flagged copy of the last reading (third batch) must reach the
	// database after the original, not with the first batch's derived points.
	late := es[11999].Reading
	late.QC |= QCLate
	if err := s.AppendLinesAfter(es[11999].Seq, [][]byte{[]byte(strings.TrimSuffix(string(AppendLineProtocol(nil, &late)), "\n"))}); err != nil {
		t.Fatal(err)
	}
	m := NewMetrics(nil)
	logs := &spLogBuf{}
	w, stop := wrStart(t, WriterOptions{Spool: s, URL: in.URL, Bucket: in.Bucket, Token: in.Token, Metrics: m, Logger: spLogger(logs)})
	defer func() {
		if t.Failed() {
			t.Logf("writer log:\n%s", logs.String())
		}
	}()
	spWaitFor(t, "all readings written", 60*time.Second, func() bool {
		st, _ := s.Stats()
		return st.Pending == 0 && st.Derived == 0
	})
	stop()
	if n := wrCount(t, in, ""); n != 12000 {
		t.Fatalf("count(temp_c) = %d, want 12000", n)
	}
	if v := spValue(m.ReadingsStored); v != 12000 {
		t.Fatalf("holomix_readings_stored_total = %v", v)
	}
	rows := wrQuery(t, in, `SELECT temp_c, qc FROM water_temperature WHERE site = 'north basin, pier=2' AND depth_m = '12.25' AND sensor = 't 5'`)
	if len(rows) != 1 || rows[0][1].(float64) != es[5].TempC || rows[0][2].(float64) != float64(es[5].QC) {
		t.Fatalf("escaped point: %v (want temp %v qc %v)", rows, es[5].TempC, es[5].QC)
	}
	rows = wrQuery(t, in, fmt.Sprintf(`SELECT qc FROM water_temperature WHERE time = '%s'`, late.Time.Format(time.RFC3339Nano)))
	if len(rows) != 1 || rows[0][1].(float64) != float64(late.QC) {
		t.Fatalf("re-flagged point: %v, want qc %d (the original overwrote the re-flagged copy?)", rows, late.QC)
	}
	// Depth tags are canonical: 0.5 m is "0.5", 11 m is "11".
	if n := wrCount(t, in, ` WHERE depth_m = '0.5'`); n == 0 {
		t.Fatal("no point with depth_m = '0.5'")
	}
	if n := wrCount(t, in, ` WHERE depth_m = '11'`); n == 0 {
		t.Fatal("no point with depth_m = '11'")
	}
	if rows := wrQuery(t, in, `SELECT schmidt_j_m2 FROM water_column`); len(rows) != 1 || rows[0][1].(float64) != 42.5 {
		t.Fatalf("derived point: %v", rows)
	}
	if ok, known, _, _ := w.Reachable(); !ok || !known {
		t.Fatal("database reported unreachable after successful writes")
	}
	// The writer's cursor alone frees nothing: detection must checkpoint too.
	if st, _ := s.Stats(); st.Stored != 12000 {
		t.Fatalf("readings deleted before the detection checkpoint: %d kept", st.Stored)
	}
	s.SetCheckpoint(12000)
	if st, _ := s.Stats(); st.Stored != 0 || st.Bytes != 0 {
		t.Fatalf("after checkpoint: %+v", st)
	}
}

// TestWriterDeadLettersRefusedPoints provokes HTTP 400 (field type conflict)
// for some points of a batch: they go to the dead-letter bucket, the rest is
// stored, and the queue moves on.
func TestWriterDeadLettersRefusedPoints(t *testing.T) {
	in := testenv.StartInflux(t, testenv.InfluxOptions{})
	// In the shard of week A, field qc becomes a float: our integer qc conflicts there.
	weekA := time.Date(2026, 1, 5, 0, 0, 0, 0, time.UTC)
	weekB := weekA.Add(14 * 24 * time.Hour)
	seed, err := NewWriter(WriterOptions{Spool: spOpen(t, SpoolOptions{}), URL: in.URL, Bucket: in.Bucket, Token: in.Token})
	if err != nil {
		t.Fatal(err)
	}
	if err := seed.api.WriteRecord(context.Background(), fmt.Sprintf("water_temperature,depth_m=1,site=seed qc=1.5,temp_c=4 %d", weekA.UnixNano())); err != nil {
		t.Fatalf("seed point: %v", err)
	}
	seed.Close()

	s := spOpen(t, SpoolOptions{})
	var es []Entry
	for i := 0; i < 40; i++ {
		ts := weekB.Add(time.Duration(i) * time.Minute)
		if i%10 == 3 {
			ts = weekA.Add(time.Duration(i) * time.Minute) // 4 bad points
		}
		es = append(es, Entry{Recv: ts, Reading: Reading{Site: "fen", Depth: 2, Time: ts, TempC: 5 + float64(i)/100}})
	}
	if _, err := s.Commit(es, nil); err != nil {
		t.Fatal(err)
	}
	m := NewMetrics(nil)
	_, stop := wrStart(t, WriterOptions{Spool: s, URL: in.URL, Bucket: in.Bucket, Token: in.Token, Metrics: m, BackoffMin: 10 * time.Millisecond})
	spWaitFor(t, "batch handled", 30*time.Second, func() bool { st, _ := s.Stats(); return st.Pending == 0 })
	stop()
	if n := wrCount(t, in, ` WHERE site = 'fen'`); n != 36 {
		t.Fatalf("stored %d points of site fen, want 36 (40 minus 4 refused)", n)
	}
	dl, _ := s.DeadLetters(0, 100)
	if len(dl) != 4 {
		t.Fatalf("%d dead letters, want 4: %+v", len(dl), dl)
	}
	for _, d := range dl {
		if d.Kind != DeadPoint || d.Reason != "influx_400" || d.Topic != MeasurementReadings ||
			!strings.HasPrefix(string(d.Payload), "water_temperature,depth_m=2,site=fen qc=0i") || !strings.Contains(d.Detail, "conflict") {
			t.Fatalf("dead letter %+v", d)
		}
	}
	if v := spValue(m.PointsRejected); v != 4 {
		t.Fatalf("holomix_points_rejected_total = %v", v)
	}
	if v := spValue(m.MessagesRejected.WithLabelValues(ReasonInfluxReject)); v != 4 {
		t.Fatalf("rejected{influx_rejected} = %v", v)
	}
}

// TestWriterRetriesUntilDatabaseReturns: with the database down nothing is
// lost or skipped; the writer backs off and resumes.
func TestWriterRetriesUntilDatabaseReturns(t *testing.T) {
	in := testenv.StartInflux(t, testenv.InfluxOptions{})
	in.Stop()
	s := spOpen(t, SpoolOptions{})
	es := spEntries(7000)
	for i := range es {
		es[i].Time = spT0.Add(time.Duration(i) * time.Second)
	}
	if _, err := s.Commit(es, nil); err != nil {
		t.Fatal(err)
	}
	m := NewMetrics(nil)
	w, stop := wrStart(t, WriterOptions{Spool: s, URL: in.URL, Bucket: in.Bucket, Token: in.Token, Metrics: m,
		BackoffMin: 20 * time.Millisecond, BackoffMax: 200 * time.Millisecond})
	defer stop()
	spWaitFor(t, "a failed attempt", 10*time.Second, func() bool {
		ok, known, _, _ := w.Reachable()
		return known && !ok
	})
	time.Sleep(300 * time.Millisecond)
	if st, _ := s.Stats(); st.Pending != 7000 {
		t.Fatalf("pending %d while the database is down, want 7000", st.Pending)
	}
	in.Start(t)
	spWaitFor(t, "the backlog written", 60*time.Second, func() bool { st, _ := s.Stats(); return st.Pending == 0 })
	if n := wrCount(t, in, ""); n != 7000 {
		t.Fatalf("count = %d, want 7000", n)
	}
	if v := spValue(m.WriteErrors.WithLabelValues("network")); v < 1 {
		t.Fatalf("network errors counted: %v", v)
	}
}

func TestAppendLineProtocol(t *testing.T) {
	a, b := 0.1, 0.2
	r := Reading{Site: "a b,c=d", Sensor: "s1", Depth: a + b, Time: time.Unix(1, 5).UTC(), TempC: -0.5, QC: QCSpike | QCNoTime}
	got := string(AppendLineProtocol(nil, &r))
	want := `water_temperature,depth_m=0.30000000000000004,sensor=s1,site=a\ b\,c\=d qc=66i,temp_c=-0.5 1000000005` + "\n"
	if got != want {
		t.Fatalf("line protocol\n got %q\nwant %q", got, want)
	}
	if measurementOf(`water\ temperature,site=x a=1`) != `water\ temperature` || measurementOf("m a=1") != "m" {
		t.Fatal("measurementOf")
	}
}

// TestWriterInFlightLaterValueWins: with several batches in flight at once,
// a reading that replaces a point of an earlier batch (same series and time,
// another value: a buoy's correction, flagged duplicate) must still land
// after the point it replaces, since InfluxDB keeps the last write of a
// series and time. Every batch here rewrites points of the batch before it.
func TestWriterInFlightLaterValueWins(t *testing.T) {
	in := testenv.StartInflux(t, testenv.InfluxOptions{})
	s := spOpen(t, SpoolOptions{})
	const batch, batches = 500, 12
	var es []Entry
	want := map[int64]float64{} // time → last value written
	for b := 0; b < batches; b++ {
		for i := 0; i < batch; i++ {
			k := b*batch + i
			ts := spT0.Add(time.Duration(k) * time.Second)
			r := Reading{Site: "weir", Depth: 3, Time: ts, TempC: 6 + float64(k%97)/100}
			if b > 0 && i%10 == 0 { // rewrite a point of the previous batch
				r.Time = spT0.Add(time.Duration((b-1)*batch+i) * time.Second)
				r.TempC = 20 + float64(b)
				r.QC = QCDuplicate
			}
			want[r.Time.UnixNano()] = r.TempC
			es = append(es, Entry{Recv: ts, Reading: r})
		}
	}
	if _, err := s.Commit(es, nil); err != nil {
		t.Fatal(err)
	}
	w, err := NewWriter(WriterOptions{Spool: s, URL: in.URL, Bucket: in.Bucket, Token: in.Token, BatchSize: batch, InFlight: 4})
	if err != nil {
		t.Fatal(err)
	}
	defer w.Close()
	// The clash check itself: batch 2 rewrites batch 1, batch 3 does not touch batch 1.
	f1, _ := w.prepare(0)
	f2, _ := w.prepare(f1.last)
	f3, _ := w.prepare(f2.last + batch)
	if f1 == nil || f2 == nil || f3 == nil {
		t.Fatal("prepare returned no batch")
	}
	if !w.clashes(f2, []*flight{f1}) {
		t.Fatal("a batch rewriting points of a batch in flight was not held back")
	}
	if w.clashes(f3, []*flight{f1}) {
		t.Fatal("batches 1 and 4 share no point but were reported to clash")
	}
	for _, f := range []*flight{f1, f2, f3} {
		w.release(f)
	}
	if err := w.Flush(context.Background()); err != nil {
		t.Fatal(err)
	}
	rows := wrQuery(t, in, `SELECT temp_c FROM water_temperature WHERE site = 'weir'`)
	if len(rows) != len(want) {
		t.Fatalf("%d points stored, want %d", len(rows), len(want))
	}
	for _, r := range rows {
		ts, err := time.Parse(time.RFC3339Nano, r[0].(string))
		if err != nil {
			t.Fatal(err)
		}
		if got := r[1].(float64); got != want[ts.UnixNano()] {
			t.Fatalf("point at %s: %v, want the later value %v", ts.Format(time.RFC3339), got, want[ts.UnixNano()])
		}
	}
}
