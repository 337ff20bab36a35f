package ingest

import (
	"bytes"
	"math"
	"math/rand/v2"
	"strings"
	"testing"
	"time"

	"holomix/config"
)

// The QC rules (median spike test, stuck-value test, range and duplicate
// checks) follow common practice for buoy thermistor chains (common
// practice, no source); the expected flags below are worked out by hand from
// the rules written in the QualityControl doc comment.

var qcT0 = time.Date(2024, 6, 1, 0, 0, 0, 0, time.UTC)

func rd(depth float64, at time.Duration, v float64) Reading {
	return Reading{Site: "calder-mere", Depth: depth, Time: qcT0.Add(at), TempC: v}
}

// feed checks readings in order (recv = reading time + 1 min) and returns the
// flags Check returned.
func feed(q *QualityControl, rs []Reading) []QC {
	out := make([]QC, len(rs))
	for i := range rs {
		out[i] = q.Check(&rs[i], rs[i].Time.Add(time.Minute))
	}
	return out
}

// series builds readings of one sensor at 10-minute steps.
func series(depth float64, start time.Duration, vals ...float64) []Reading {
	rs := make([]Reading, len(vals))
	for i, v := range vals {
		rs[i] = rd(depth, start+time.Duration(i)*10*time.Minute, v)
	}
	return rs
}

func wantFlags(t *testing.T, got []QC, want ...QC) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("%d results, want %d", len(got), len(want))
	}
	for i := range want {
		if got[i] != want[i] {
			t.Errorf("reading %d: flags %q, want %q", i, qcString(got[i]), qcString(want[i]))
		}
	}
}

func TestQCRange(t *testing.T) {
	q := NewQualityControl(QCConfig{})
	cases := []struct {
		v    float64
		want QC
	}{
		{-3, 0}, {-3.01, QCRange}, {45, 0}, {45.01, QCRange}, {math.NaN(), QCRange}, {math.Inf(1), QCRange}, {1e308, QCRange}, {4, 0},
	}
	for i, c := range cases {
		r := rd(float64(i), 0, c.v)
		if got := q.Check(&r, qcT0); got != c.want || r.QC != c.want {
			t.Errorf("%g °C: flags %q (r.QC %q), want %q", c.v, qcString(got), qcString(r.QC), qcString(c.want))
		}
	}
	if _, err := q.State(); err != nil {
		t.Errorf("state after non-finite readings: %v", err)
	}
	q = NewQualityControl(QCConfig{RangeMin: 0.5, RangeMax: 30})
	r := rd(1, 0, 0.4)
	if q.Check(&r, qcT0) != QCRange {
		t.Error("custom range not applied")
	}
}

func TestQCFuture(t *testing.T) {
	q := NewQualityControl(QCConfig{})
	recv := qcT0.Add(time.Hour)
	ok := rd(5, time.Hour+5*time.Minute, 10)
	if f := q.Check(&ok, recv); f != 0 {
		t.Errorf("at the tolerance: %q", qcString(f))
	}
	fut := rd(2, time.Hour+5*time.Minute+time.Second, 10)
	if f := q.Check(&fut, recv); f != QCFuture {
		t.Errorf("past the tolerance: %q", qcString(f))
	}
	// a redelivered copy is a duplicate too
	again := rd(2, time.Hour+5*time.Minute+time.Second, 10)
	if f := q.Check(&again, recv); f != QCFuture|QCDuplicate {
		t.Errorf("redelivered future reading: %q", qcString(f))
	}
	// a future reading touches no spike or stuck state: three normal values
	// after a wild future one are still a reference for the spike test
	q = NewQualityControl(QCConfig{})
	wild := rd(5, 10*time.Hour, 40)
	q.Check(&wild, qcT0)
	wantFlags(t, feed(q, series(5, 0, 12, 12, 12, 30)), 0, 0, 0, QCSpike)
}

func TestQCUnknownDepth(t *testing.T) {
	q := NewQualityControl(QCConfig{KnownDepths: map[string][]float64{"calder-mere": {5, 0.5, 2}}})
	for _, c := range []struct {
		site  string
		depth float64
		want  QC
	}{
		{"calder-mere", 5, 0}, {"calder-mere", 2.009, 0}, {"calder-mere", 2.02, QCUnknownDepth},
		{"calder-mere", 7, QCUnknownDepth}, {"calder-mere", 0, QCUnknownDepth}, {"orrin-lake", 7.3, 0},
	} {
		r := Reading{Site: c.site, Depth: c.depth, Time: qcT0, TempC: 8}
		if f := q.Check(&r, qcT0); f != c.want {
			t.Errorf("%s %g m: %q, want %q", c.site, c.depth, qcString(f), qcString(c.want))
		}
	}
	// within tolerance a reading shares the configured sensor's state
	r := Reading{Site: "calder-mere", Depth: 4.995, Time: qcT0, TempC: 8}
	if f := q.Check(&r, qcT0); f != QCDuplicate {
		t.Errorf("4.995 m at the time of the 5 m reading: %q, want duplicate", qcString(f))
	}
	if q.Sensors() != 3 {
		t.Errorf("%d sensors with state, want 3 (unknown depths keep none)", q.Sensors())
	}
}

func TestQCDuplicate(t *testing.T) {
	q := NewQualityControl(QCConfig{DuplicateWindow: 4})
	rs := []Reading{rd(5, 0, 10), rd(5, 0, 10.5), rd(2, 0, 10), rd(5, time.Minute, 10)}
	wantFlags(t, feed(q, rs), 0, QCDuplicate, 0, 0)
	// the window is bounded: after 4 newer timestamps the first is forgotten
	for i := 2; i <= 4; i++ {
		r := rd(5, time.Duration(i)*time.Minute, 10)
		q.Check(&r, r.Time)
	}
	r := rd(5, 0, 10)
	if f := q.Check(&r, qcT0.Add(time.Hour)); f&QCDuplicate != 0 {
		t.Errorf("timestamp beyond the window still remembered")
	}
	r = rd(5, 4*time.Minute, 10)
	if f := q.Check(&r, qcT0.Add(time.Hour)); f != QCDuplicate {
		t.Errorf("recent timestamp: %q", qcString(f))
	}
}

func TestQCSpike(t *testing.T) {
	q := NewQualityControl(QCConfig{})
	rs := series(5, 0, 12.4, 12.5, 12.3, 12.4, 31.7, 12.5, 12.6, 4.0, 12.4)
	wantFlags(t, feed(q, rs), 0, 0, 0, 0, QCSpike, 0, 0, QCSpike, 0)

	// 5.0 °C away is not a spike, 5.01 is (median of 10, 10, 10 = 10)
	q = NewQualityControl(QCConfig{})
	wantFlags(t, feed(q, series(5, 0, 10, 10, 10, 15)), 0, 0, 0, 0)
	q = NewQualityControl(QCConfig{})
	wantFlags(t, feed(q, series(5, 0, 10, 10, 10, 15.01)), 0, 0, 0, QCSpike)

	// fewer than 3 reference values: no test
	q = NewQualityControl(QCConfig{})
	wantFlags(t, feed(q, series(5, 0, 10, 10, 30)), 0, 0, 0)

	// reference older than 6 h: no test (a sensor back after a gap)
	q = NewQualityControl(QCConfig{})
	rs = append(series(5, 0, 10, 10, 10, 10), rd(5, 7*time.Hour, 20))
	wantFlags(t, feed(q, rs), 0, 0, 0, 0, 0)

	// SpikeC from the configuration
	q = NewQualityControl(QCConfig{SpikeC: 1})
	wantFlags(t, feed(q, series(5, 0, 10, 10, 10, 11.5)), 0, 0, 0, QCSpike)
}

// TestQCStep: a level shift that persists is flagged twice, then accepted
// on the third reading, and the new level is the reference from then on.
func TestQCStep(t *testing.T) {
	q := NewQualityControl(QCConfig{})
	rs := series(10, 0, 12, 12.1, 11.9, 12, 20, 20.1, 19.9, 20.0, 20.2, 12.0)
	wantFlags(t, feed(q, rs), 0, 0, 0, 0, QCSpike, QCSpike, 0, 0, 0, QCSpike)

	// two isolated outliers at different levels do not confirm each other
	q = NewQualityControl(QCConfig{})
	rs = series(10, 0, 12, 12, 12, 20, 30, 40, 12)
	wantFlags(t, feed(q, rs), 0, 0, 0, QCSpike, QCSpike, QCSpike, 0)

	// an outlier between normal readings resets the candidates
	q = NewQualityControl(QCConfig{})
	rs = series(10, 0, 12, 12, 12, 20, 12, 20, 12, 20)
	wantFlags(t, feed(q, rs), 0, 0, 0, QCSpike, 0, QCSpike, 0, QCSpike)
}

func TestQCStuck(t *testing.T) {
	q := NewQualityControl(QCConfig{})
	var rs []Reading
	for h := 0; h <= 26; h++ {
		rs = append(rs, rd(20, time.Duration(h)*time.Hour, 4.0+float64(h%2)*0.0005)) // wobbles within 0.001
	}
	got := feed(q, rs)
	for h, f := range got {
		want := QC(0)
		if h >= 24 { // reached StuckAfter (24 h) since the run began at hour 0
			want = QCStuck
		}
		if f != want {
			t.Errorf("hour %d: %q, want %q", h, qcString(f), qcString(want))
		}
	}
	// a change of 0.002 °C starts a new run
	r := rd(20, 27*time.Hour, 4.002)
	if f := q.Check(&r, r.Time); f != 0 {
		t.Errorf("after a change: %q", qcString(f))
	}
	r = rd(20, 28*time.Hour, 4.002)
	if f := q.Check(&r, r.Time); f != 0 {
		t.Errorf("one hour into the new run: %q", qcString(f))
	}
	// StuckAfter from the configuration
	q = NewQualityControl(QCConfig{StuckAfter: 2 * time.Hour})
	rs = []Reading{rd(20, 0, 4), rd(20, time.Hour, 4), rd(20, 2*time.Hour, 4)}
	wantFlags(t, feed(q, rs), 0, 0, QCStuck)
}

// TestQCLateData: a late reading is spike-tested but changes no state, so
// the flags of the in-order stream are the same with or without it.
func TestQCLateData(t *testing.T) {
	base := series(5, 0, 12, 12.1, 11.9, 12, 20, 20.1, 19.9, 20.0, 12.1)
	ref := feed(NewQualityControl(QCConfig{}), append([]Reading(nil), base...))

	q := NewQualityControl(QCConfig{})
	var got []QC
	for i := range base {
		r := base[i]
		got = append(got, q.Check(&r, r.Time))
		if i == 5 {
			// late wild value between the two first readings
			late := rd(5, 5*time.Minute, 30)
			if f := q.Check(&late, r.Time); f != QCSpike {
				t.Errorf("late outlier: %q, want spike", qcString(f))
			}
			// late normal value
			late = rd(5, 15*time.Minute, 12.05)
			if f := q.Check(&late, r.Time); f != 0 {
				t.Errorf("late normal value: %q", qcString(f))
			}
		}
	}
	wantFlags(t, got, ref...)

	// a late reading does not break a stuck run
	q = NewQualityControl(QCConfig{StuckAfter: 3 * time.Hour})
	rs := []Reading{rd(1, 0, 4), rd(1, time.Hour, 4), rd(1, 30*time.Minute, 9), rd(1, 2*time.Hour, 4), rd(1, 3*time.Hour, 4)}
	wantFlags(t, feed(q, rs), 0, 0, 0, 0, QCStuck)
}

// TestQCNoFalseAlarms: a month of plausible water temperatures at 10-minute
// steps (diurnal cycle of ±1.5 °C, seasonal warming, 0.05 °C noise, a
// thermocline sensor cooling by 8 °C over 48 h during a mixing event) gets
// no flag at all.
func TestQCNoFalseAlarms(t *testing.T) {
	q := NewQualityControl(QCConfig{KnownDepths: map[string][]float64{"calder-mere": {0.5, 8}}})
	rng := rand.New(rand.NewPCG(1, 2))
	steps := 30 * 24 * 6
	for i := 0; i < steps; i++ {
		at := time.Duration(i) * 10 * time.Minute
		days := at.Hours() / 24
		surface := 14 + 0.2*days + 1.5*math.Sin(2*math.Pi*days) + rng.NormFloat64()*0.05
		thermo := 16.0
		if days > 10 && days < 12 {
			thermo -= 8 * (days - 10) / 2
		} else if days >= 12 {
			thermo = 8
		}
		thermo += rng.NormFloat64() * 0.05
		for _, r := range []Reading{rd(0.5, at, surface), rd(8, at, thermo)} {
			if f := q.Check(&r, r.Time); f != 0 {
				t.Fatalf("step %d depth %g: %.3f °C flagged %q", i, r.Depth, r.TempC, qcString(f))
			}
		}
	}
}

func TestQCReturnsOnlyItsFlags(t *testing.T) {
	q := NewQualityControl(QCConfig{})
	r := rd(5, 0, 99)
	r.QC = QCNoTime
	if f := q.Check(&r, qcT0); f != QCRange {
		t.Errorf("returned %q, want range only", qcString(f))
	}
	if r.QC != QCNoTime|QCRange {
		t.Errorf("r.QC = %q", qcString(r.QC))
	}
}

// TestQCStateRestore: stopping after any reading, saving and restoring gives
// the same flags as one uninterrupted run.
func TestQCStateRestore(t *testing.T) {
	var rs []Reading
	rs = append(rs, series(5, 0, 12, 12.1, 11.9, 12, 20, 20.1, 19.9, 20.0, 12.1, 20, 20)...)
	for h := 0; h < 30; h++ {
		rs = append(rs, rd(20, time.Duration(h)*time.Hour, 4))
	}
	rs = append(rs, rd(5, 0, 12)) // duplicate of the first reading
	cfg := QCConfig{StuckAfter: 12 * time.Hour}
	ref := feed(NewQualityControl(cfg), append([]Reading(nil), rs...))
	for cut := 1; cut < len(rs); cut += 3 {
		q := NewQualityControl(cfg)
		got := feed(q, append([]Reading(nil), rs[:cut]...))
		state, err := q.State()
		if err != nil {
			t.Fatal(err)
		}
		q2 := NewQualityControl(cfg)
		if err := q2.Restore(state); err != nil {
			t.Fatalf("cut %d: restore: %v", cut, err)
		}
		again, _ := q2.State()
		if !bytes.Equal(state, again) {
			t.Fatalf("cut %d: state changed by a round trip", cut)
		}
		got = append(got, feed(q2, append([]Reading(nil), rs[cut:]...))...)
		for i := range ref {
			if got[i] != ref[i] {
				t.Errorf("cut %d, reading %d: %q, want %q", cut, i, qcString(got[i]), qcString(ref[i]))
			}
		}
	}
}

func TestQCRestoreErrors(t *testing.T) {
	q := NewQualityControl(QCConfig{})
	r := rd(5, 0, 10)
	q.Check(&r, qcT0)
	before, _ := q.State()
	for _, bad := range []string{
		``, `{`, `[]`, `{"version":2,"sensors":[]}`,
		`{"version":1,"sensors":[{"site":"","depth_mm":1}]}`,
		`{"version":1,"sensors":[{"site":"a","depth_mm":1,"hist_t":[1,2],"hist_v":[1]}]}`,
		`{"version":1,"sensors":[{"site":"a","depth_mm":1},{"site":"a","depth_mm":1}]}`,
		`{"version":1,"sensors":[{"site":"a","depth_mm":1,"hist_t":[1],"hist_v":[1e999]}]}`,
	} {
		if err := q.Restore([]byte(bad)); err == nil {
			t.Errorf("%q restored", bad)
		}
	}
	after, _ := q.State()
	if !bytes.Equal(before, after) {
		t.Error("a failed Restore changed the state")
	}
	// longer lists than this QualityControl keeps are cut to their newest entries
	small := NewQualityControl(QCConfig{DuplicateWindow: 2})
	if err := small.Restore([]byte(`{"version":1,"sensors":[{"site":"calder-mere","depth_mm":5000,
		"hist_t":[1,2,3,4,5,6,7],"hist_v":[1,2,3,4,5,6,7],"times":[10,20,30]}]}`)); err != nil {
		t.Fatal(err)
	}
	st, _ := small.State()
	if !strings.Contains(string(st), `"hist_t":[3,4,5,6,7]`) || !strings.Contains(string(st), `"times":[20,30]`) {
		t.Errorf("state after cut: %s", st)
	}
}

func TestQCSensorLimit(t *testing.T) {
	q := NewQualityControl(QCConfig{})
	q.limit = 3
	for i := 0; i < 5; i++ {
		r := Reading{Site: "orrin-lake", Depth: float64(i), Time: qcT0, TempC: 99}
		if f := q.Check(&r, qcT0); f != QCRange {
			t.Errorf("sensor %d: %q (stateless checks must still run)", i, qcString(f))
		}
	}
	if q.Sensors() != 3 || q.Untracked() != 2 {
		t.Errorf("sensors %d, untracked %d", q.Sensors(), q.Untracked())
	}
}

func TestQCConfigFrom(t *testing.T) {
	cfg := &config.Config{Sites: []config.Site{
		{ID: "calder-mere", Depths: []float64{0.5, 2, 5}}, {ID: "orrin-lake"},
	}}
	c := QCConfigFrom(cfg)
	if c.RangeMin != -3 || c.RangeMax != 45 || c.SpikeC != 5 || c.StuckAfter != 24*time.Hour ||
		c.FutureTolerance != 5*time.Minute || c.DuplicateWindow != 64 || c.DepthTolerance != 0.01 {
		t.Errorf("defaults: %+v", c)
	}
	if len(c.KnownDepths) != 1 || len(c.KnownDepths["calder-mere"]) != 3 {
		t.Errorf("known depths: %v", c.KnownDepths)
	}
	cfg.Ingest = config.Ingest{RangeMinC: -1, RangeMaxC: 35, SpikeC: 3, StuckAfter: config.Duration(6 * time.Hour),
		FutureTolerance: config.Duration(time.Minute)}
	c = QCConfigFrom(cfg)
	if c.RangeMin != -1 || c.RangeMax != 35 || c.SpikeC != 3 || c.StuckAfter != 6*time.Hour || c.FutureTolerance != time.Minute {
		t.Errorf("configured: %+v", c)
	}
	// the orrin-lake site (no sensor depths) accepts any depth
	q := NewQualityControl(c)
	r := Reading{Site: "orrin-lake", Depth: 17.25, Time: qcT0, TempC: 8}
	if f := q.Check(&r, qcT0); f != 0 {
		t.Errorf("orrin-lake: %q", qcString(f))
	}
}
