package detect

import (
	"encoding/json"
	"fmt"
	"math"
	"reflect"
	"testing"
	"time"

	"holomix/detect/water"
)

// Synthetic seasons: an invented lake generated in code (synth_test.go), 10-min
// profiles with seeded uniform noise of ±0.02 °C. The true times come from the
// generator: the model's ice dates, and the noise-free profiles for the
// column-state criteria of SCIENCE.md §5.

func synthSite(l *synthLake) *Site {
	cfg := DefaultSiteConfig("synth")
	cfg.Name = "Invented Lake"
	cfg.MaxDepth = l.H
	cfg.Expected = l.Depths
	cfg.Intakes = []IntakeConfig{{Name: "hatchery", Depth: 0.75 * l.H,
		DD: &DegreeDayConfig{Start: l.Start, BaseC: 0, Thresholds: []float64{500, 1500}}}}
	return NewSite(cfg)
}

// truthHeld returns the first 10-min step t in [from, to) from which pred holds
// on every noise-free profile for hold.
func truthHeld(t *testing.T, l *synthLake, from, to float64, hold time.Duration, pred func(p Profile, m *water.Metrics) bool) time.Time {
	t.Helper()
	cfg := DefaultSiteConfig("synth")
	cfg.MaxDepth = l.H
	col := water.Column{MaxDepth: l.H}
	var m water.Metrics
	var start time.Time
	for tm := l.at(from); tm.Before(l.at(to)); tm = tm.Add(10 * time.Minute) {
		p := l.cleanProfile("synth", tm)
		col.Depths, col.Temps = p.Depths, p.Temps
		if err := water.Compute(col, &m); err != nil {
			t.Fatalf("compute: %v", err)
		}
		if !pred(p, &m) {
			start = time.Time{}
			continue
		}
		if start.IsZero() {
			start = tm
		}
		if tm.Sub(start) >= hold {
			return start
		}
	}
	t.Fatalf("truth: criterion never held between day %.1f and %.1f", from, to)
	return time.Time{}
}

// Noise margins of the truth brackets: twice the ±0.02 °C noise, and the
// density change of 0.04 °C near 8-10 °C (about 0.003 kg/m³ [C]) rounded up.
const (
	marginT   = 0.04  // °C
	marginRho = 0.005 // kg/m³
)

// bracket checks that got lies between early and late, give or take 3 hours.
func bracket(t *testing.T, what string, got, early, late time.Time) {
	t.Helper()
	if early.After(late) {
		early, late = late, early
	}
	if got.Before(early.Add(-3*time.Hour)) || got.After(late.Add(3*time.Hour)) {
		t.Errorf("%s at %s, want between %s and %s (± 3 h)", what, got.Format(time.RFC3339), early.Format(time.RFC3339), late.Format(time.RFC3339))
	}
}

func within(t *testing.T, what string, got, want time.Time, tol time.Duration) {
	t.Helper()
	if d := got.Sub(want); d < -tol || d > tol {
		t.Errorf("%s at %s, want %s ± %s (off by %s)", what, got.Format(time.RFC3339), want.Format(time.RFC3339), tol, d)
	}
}

func onsetOf(t *testing.T, e Event) time.Time {
	t.Helper()
	on, err := time.Parse(time.RFC3339, e.Details["onset"])
	if err != nil {
		t.Fatalf("%s: onset %q: %v", e.Kind, e.Details["onset"], err)
	}
	return on
}

func TestSyntheticSeason(t *testing.T) {
	for _, h := range []float64{10, 20} {
		for _, seed := range []uint64{1, 2} {
			h, seed := h, seed
			t.Run(fmt.Sprintf("%gm-seed%d", h, seed), func(t *testing.T) {
				t.Parallel()
				checkSyntheticSeason(t, h, seed)
			})
		}
	}
}

func checkSyntheticSeason(t *testing.T, h float64, seed uint64) {
	l := newSynthLake(h, seed)
	s := synthSite(l)
	th, hy := s.cfg.Thresholds, s.cfg.Hysteresis
	hold, iceHold := s.cfg.Hold, s.cfg.IceHold
	ps := l.profiles("synth", 10*time.Minute, 0, l.DEnd, seed+100)

	byKind := map[Kind][]Event{}
	var cols []Column
	var iceCols []Column
	for _, p := range ps {
		c, evs := s.Process(p)
		for _, e := range evs {
			byKind[e.Kind] = append(byKind[e.Kind], e)
			checkEventShape(t, e)
		}
		if c.IceInferred {
			iceCols = append(iceCols, c)
		}
		cols = append(cols, c)
	}
	count := func(k Kind, status Status) int {
		n := 0
		for _, e := range byKind[k] {
			if e.Status == status {
				n++
			}
		}
		return n
	}
	// Exactly the season's events, none repeated, none spurious under noise.
	want := map[Kind]int{KindOverturn: 1, KindMaxDensityReached: 2, KindInverseStratification: 1, KindIceOn: 1, KindIceOff: 1,
		KindStratificationOnset: 1, KindDegreeDays: 2, KindIntakeOverturnRisk: 2}
	for k, n := range want {
		if got := count(k, StatusFiring); got != n {
			t.Errorf("%s firing %d times, want %d", k, got, n)
		}
	}
	for _, k := range []Kind{KindSensorFault, KindFrazilRisk, KindIntakeChange} {
		if len(byKind[k]) != 0 {
			t.Errorf("spurious %s events: %v", k, byKind[k])
		}
	}
	if t.Failed() {
		for _, evs := range byKind {
			for _, e := range evs {
				t.Logf("%s", eventLine(e))
			}
		}
		return
	}

	// The noise (±0.02 °C) can move a threshold crossing by the time the column
	// takes to change by twice the noise, so each truth is a bracket: the
	// criterion with the margin given to it (early) and taken from it (late).
	// Fall overturn: end of stratification by the hysteresis criterion, held.
	overAt := func(mg float64) time.Time {
		return truthHeld(t, l, l.DOver-12, l.DOver+5, hold, func(p Profile, m *water.Metrics) bool {
			return !(m.DensityDiff > th.StratDensityDiff*(1-hy)-mg && m.SurfaceTempC > m.BottomTempC)
		})
	}
	ov := byKind[KindOverturn][0]
	bracket(t, "overturn onset", onsetOf(t, ov), overAt(marginRho), overAt(-marginRho))
	bracket(t, "overturn event", ov.Time, overAt(marginRho).Add(hold), overAt(-marginRho).Add(hold))
	if ov.Season != "fall" || ov.From != SeasonStratified {
		t.Errorf("overturn season %q from %q, want fall from stratified", ov.Season, ov.From)
	}

	// Column at maximum density: every sensor within ±δ of its own Tmd.
	mdAt := func(mg float64) time.Time {
		return truthHeld(t, l, l.D4-4, l.DIce, hold, func(p Profile, m *water.Metrics) bool {
			return worstTmdDeparture(p.Temps, m.TmdC) <= th.TmdDelta+mg
		})
	}
	md := byKind[KindMaxDensityReached][0]
	bracket(t, "max density onset", onsetOf(t, md), mdAt(marginT), mdAt(-marginT))

	// Lasting inverse stratification (held for the ice hold).
	invAt := func(mg float64) time.Time {
		return truthHeld(t, l, l.D4, l.DOff, iceHold, func(p Profile, m *water.Metrics) bool {
			// after the column was at Tmd: inverse once some sensor left the relaxed ±δ band
			n := len(m.TmdC)
			return worstTmdDeparture(p.Temps, m.TmdC) > th.TmdDelta*(1+hy)-mg &&
				m.BottomTempC-m.SurfaceTempC >= th.InverseDeltaT-mg && m.SurfaceDensity < m.BottomDensity && m.BottomTempC <= m.TmdC[n-1]+th.TmdDelta*hy+mg
		})
	}
	inv := byKind[KindInverseStratification][0]
	bracket(t, "inverse stratification onset", onsetOf(t, inv), invAt(marginT), invAt(-marginT))

	// Ice on and off at the model's dates. The onset estimate is the start of
	// the first sheltered 24-hour window; the event follows after the ice hold.
	ion := byKind[KindIceOn][0]
	within(t, "ice_on onset", onsetOf(t, ion), l.at(l.DIce), 3*time.Hour)
	within(t, "ice_on event", ion.Time, l.at(l.DIce).Add(iceWindow+iceHold), 3*time.Hour)
	ioff := byKind[KindIceOff][0]
	within(t, "ice_off onset", onsetOf(t, ioff), l.at(l.DOff), 12*time.Hour)
	if d := ioff.Time.Sub(l.at(l.DOff)); d < iceHold || d > iceHold+iceWindow+3*time.Hour {
		t.Errorf("ice_off event %s after ice-off, want between the ice hold and the ice hold + 27 h", d)
	}
	for _, e := range []Event{ion, ioff} {
		if e.Details["caution"] != CautionIce || !containsAll(e.Summary, "inferred from water temperatures", "thickness unknown") {
			t.Errorf("%s lacks the ice wording: %q / %q", e.Kind, e.Summary, e.Details["caution"])
		}
	}

	// Spring stratification onset.
	stratAt := func(mg float64) time.Time {
		return truthHeld(t, l, l.DStrat, l.DEnd, hold, func(p Profile, m *water.Metrics) bool {
			return m.DensityDiff > th.StratDensityDiff-mg && m.SurfaceTempC > m.BottomTempC
		})
	}
	bracket(t, "stratification onset", onsetOf(t, byKind[KindStratificationOnset][0]), stratAt(marginRho), stratAt(-marginRho))

	// Order of the season.
	order := []time.Time{ov.Time, md.Time, inv.Time, ion.Time, ioff.Time, byKind[KindMaxDensityReached][1].Time, byKind[KindStratificationOnset][0].Time}
	for i := 1; i < len(order); i++ {
		if !order[i].After(order[i-1]) {
			t.Errorf("season out of order at step %d: %v", i, order)
		}
	}

	// Facts of the trade (common practice, no source): in a fresh column without
	// a salinity gradient the surface freezes only after the whole column has
	// cooled to about Tmd; under ice a deep column's bottom stays near Tmd.
	if !md.Time.Before(ion.Time) {
		t.Errorf("ice inferred (%s) before the column reached Tmd (%s)", ion.Time, md.Time)
	}
	for _, c := range iceCols {
		n := len(c.Metrics.TmdC)
		if h >= 20 && math.Abs(c.Metrics.BottomTempC-c.Metrics.TmdC[n-1]) > th.TmdDelta {
			t.Fatalf("%s: bottom %.2f °C under ice is not near its Tmd %.2f °C", c.Time, c.Metrics.BottomTempC, c.Metrics.TmdC[n-1])
		}
		if c.Metrics.MeanTempC > c.Metrics.TmdC[0]+th.TmdDelta {
			t.Fatalf("%s: column mean %.2f °C under ice is above Tmd + δ", c.Time, c.Metrics.MeanTempC)
		}
	}

	// Intake risk: opens at (or before) the fall overturn and after ice-off,
	// with the water-quality caution; each episode resolves.
	risks := byKind[KindIntakeOverturnRisk]
	if count(KindIntakeOverturnRisk, StatusResolved) != 2 {
		t.Errorf("intake risk resolved %d times, want 2", count(KindIntakeOverturnRisk, StatusResolved))
	}
	for _, e := range risks {
		if e.Details["caution"] != CautionWaterQuality || e.Subject != "hatchery" {
			t.Errorf("intake risk without caution or subject: %+v", e)
		}
	}
	if first := risks[0]; first.Status != StatusFiring || first.Time.After(ov.Time) {
		t.Errorf("first intake risk %s at %s, want firing at or before the overturn %s", first.Status, first.Time, ov.Time)
	}

	// Projections: days_to_tmd while the mixed column cools steadily must bracket
	// the true date the column mean reaches Tmd (within 10 %). The model's
	// column-mean cooling rate jumps when its mixed layer reaches the bottom
	// (its summer layers do not conserve heat), so the check starts one
	// projection window later.
	tmdMean := 0.0
	for _, z := range l.Depths {
		tmdMean += water.Tmd(0, water.PressureDbar(z))
	}
	tmdMean /= float64(len(l.Depths))
	trendAt := func(temp float64) time.Time { return l.at(synthPeakDay + (23-temp)/l.K) } // the model's fall trend
	tTmd := trendAt(tmdMean)
	nProj, nFreeze := 0, 0
	for _, c := range cols {
		for _, pr := range c.Projections {
			if pr.LowDays <= 0 || pr.HighDays < pr.LowDays || pr.Method == "" {
				t.Fatalf("bad projection %+v", pr)
			}
			switch pr.Name {
			case "days_to_tmd":
				if c.Time.After(l.at(l.DOver).Add(s.cfg.ProjectionWindow)) && c.Time.Before(tTmd.Add(-72*time.Hour)) {
					nProj++
					truth := tTmd.Sub(c.Time).Hours() / 24
					if truth < 0.9*pr.LowDays || truth > 1.1*pr.HighDays {
						t.Fatalf("%s: days_to_tmd %.1f-%.1f, truth %.1f", c.Time, pr.LowDays, pr.HighDays, truth)
					}
				}
			case "days_to_surface_freezing":
				nFreeze++
				if c.Time.Before(trendAt(tmdMean + th.TmdDelta + 0.1)) {
					t.Fatalf("%s: days_to_surface_freezing before the column reached Tmd", c.Time)
				}
			}
		}
	}
	if nProj < 144*10 || nFreeze == 0 {
		t.Errorf("projections: %d days_to_tmd after the overturn, %d days_to_surface_freezing", nProj, nFreeze)
	}

	sum := s.Summary()
	if len(sum.IceOn) != 1 || len(sum.IceOff) != 1 || len(sum.Overturns) != 1 || len(sum.TmdReached) != 2 {
		t.Errorf("summary %+v", sum)
	}
	if want := l.DOff - l.DIce; math.Abs(sum.IceDays-want) > 1 {
		t.Errorf("ice days %.1f, want %.1f ± 1", sum.IceDays, want)
	}
	if sum.Profiles != len(ps) {
		t.Errorf("summary counts %d profiles, want %d", sum.Profiles, len(ps))
	}
}

func containsAll(s string, subs ...string) bool {
	for _, x := range subs {
		if !contains(s, x) {
			return false
		}
	}
	return true
}

func contains(s, sub string) bool {
	for i := 0; i+len(sub) <= len(s); i++ {
		if s[i:i+len(sub)] == sub {
			return true
		}
	}
	return false
}

// checkEventShape checks the fields every event must carry.
func checkEventShape(t *testing.T, e Event) {
	t.Helper()
	if e.Time.IsZero() || e.Site == "" || e.Kind == "" || e.Summary == "" || e.Confidence == "" || e.Subject == "" {
		t.Errorf("incomplete event %+v", e)
	}
	switch e.Status {
	case StatusFiring, StatusResolved, StatusUpdate:
	default:
		t.Errorf("%s: status %q", e.Kind, e.Status)
	}
	switch e.Severity {
	case "info", "warning", "critical":
	default:
		t.Errorf("%s: severity %q", e.Kind, e.Severity)
	}
	if _, err := time.Parse(time.RFC3339, e.Details["onset"]); err != nil {
		t.Errorf("%s: no onset in details: %v", e.Kind, err)
	}
	if len(e.Metrics) == 0 {
		t.Errorf("%s: no metrics", e.Kind)
	}
	for _, m := range e.Metrics {
		if m.Unit == "" || m.Name == "" || math.IsNaN(m.Value) {
			t.Errorf("%s: metric %+v", e.Kind, m)
		}
		for _, r := range m.Name {
			if !(r >= 'a' && r <= 'z' || r >= '0' && r <= '9' || r == '_') {
				t.Errorf("%s: metric name %q is not snake_case", e.Kind, m.Name)
				break
			}
		}
	}
	if contains(e.Summary, "\n") {
		t.Errorf("%s: summary is not one line", e.Kind)
	}
	if _, err := json.Marshal(e); err != nil {
		t.Errorf("%s: %v", e.Kind, err)
	}
}

// A restart in the middle of the season (state saved, new Site restored) gives
// exactly the events of an uninterrupted run: none repeated, none missed.
func TestRestartGivesSameEvents(t *testing.T) {
	l := newSynthLake(10, 5)
	ps := l.profiles("synth", 10*time.Minute, l.DOver-10, l.DOff+4, 55)
	ref := synthSite(l)
	var want []Event
	var wantCols []Column
	for _, p := range ps {
		c, ev := ref.Process(p)
		want = append(want, ev...)
		wantCols = append(wantCols, c)
	}
	// Cut in the middle of the holds of the overturn, ice-on and ice-off, and
	// in the middle of the intake-risk episode: the restarted site must finish
	// each hold, neither repeating nor missing the event.
	var cuts []float64
	for _, e := range want {
		on := onsetOf(t, e)
		if (e.Kind == KindOverturn || e.Kind == KindIceOn || e.Kind == KindIceOff) && on.Before(e.Time) {
			cuts = append(cuts, l.day(on.Add(e.Time.Sub(on)/2)))
		}
	}
	if len(cuts) != 3 {
		t.Fatalf("reference run: %d overturn/ice events, want 3", len(cuts))
	}
	for _, cut := range cuts {
		a := synthSite(l)
		var got []Event
		i := 0
		for ; i < len(ps) && l.day(ps[i].Time) < cut; i++ {
			_, ev := a.Process(ps[i])
			got = append(got, ev...)
		}
		a.ObserveAir(ps[i].Time, 5)
		blob, err := a.MarshalState()
		if err != nil {
			t.Fatal(err)
		}
		b := synthSite(l)
		if err := b.RestoreState(blob); err != nil {
			t.Fatal(err)
		}
		for ; i < len(ps); i++ {
			c, ev := b.Process(ps[i])
			got = append(got, ev...)
			if !reflect.DeepEqual(jsonOf(t, c), jsonOf(t, wantCols[i])) {
				t.Fatalf("cut at day %.1f: column at %s differs after restart", cut, ps[i].Time)
			}
		}
		if !reflect.DeepEqual(jsonOf(t, got), jsonOf(t, want)) {
			t.Errorf("cut at day %.1f: %d events after restart, %d uninterrupted", cut, len(got), len(want))
			for _, e := range got {
				t.Logf("got  %s", eventLine(e))
			}
			for _, e := range want {
				t.Logf("want %s", eventLine(e))
			}
		}
		if !reflect.DeepEqual(b.Summary(), ref.Summary()) {
			t.Errorf("cut at day %.1f: summary differs after restart", cut)
		}
	}
	if len(want) < 10 {
		t.Fatalf("only %d events in the reference run", len(want))
	}
}

func jsonOf(t *testing.T, v any) string {
	t.Helper()
	b, err := json.Marshal(v)
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}
