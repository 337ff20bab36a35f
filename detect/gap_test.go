package detect

import (
	"encoding/json"
	"math"
	"strings"
	"testing"
	"time"
)

// Data gaps (SiteConfig.MaxGap): an invented lake (synth_test.go) whose
// chain is pulled out under the ice and put back after the ice has gone.
// Nothing may be invented for the silence: no ice_off, no overturn; the ice
// period ends at the last profile before the gap, and a resolved ice_on with
// reason "data gap" closes its alert episode.
func TestDataGapEndsIceWithoutInventingEvents(t *testing.T) {
	l := newSynthLake(10, 3)
	before := l.profiles("synth", 10*time.Minute, l.DIce-3, l.DIce+20, 31)
	after := l.profiles("synth", 10*time.Minute, l.DOff+5, l.DOff+10, 32)
	s := synthSite(l)
	var evs []Event
	for _, p := range before {
		_, ev := s.Process(p)
		evs = append(evs, ev...)
	}
	last := before[len(before)-1].Time
	if !s.Summary().IcePeriods[0].To.Equal(last) || s.Summary().IcePeriods[0].End != IceEndRecord {
		t.Fatalf("before the gap: ice periods %+v, want one open to %s", s.Summary().IcePeriods, last)
	}
	for i, p := range after {
		c, ev := s.Process(p)
		evs = append(evs, ev...)
		if i == 0 {
			if c.Seasonal != SeasonUnknown || c.IceInferred || c.Ice.OK {
				t.Errorf("first profile after the gap: seasonal %q, ice %v (signals ok %v), want unknown without ice", c.Seasonal, c.IceInferred, c.Ice.OK)
			}
			if len(ev) != 1 || ev[0].Kind != KindIceOn || ev[0].Status != StatusResolved {
				t.Fatalf("first profile after the gap raised %v, want one resolved ice_on", ev)
			}
		}
	}
	var fired, resolved []Event
	for _, e := range evs {
		checkEventShape(t, e)
		switch {
		case e.Kind == KindIceOn && e.Status == StatusFiring:
			fired = append(fired, e)
		case e.Kind == KindIceOn && e.Status == StatusResolved:
			resolved = append(resolved, e)
		case e.Kind == KindIceOff, e.Kind == KindOverturn, e.Kind == KindStratificationOnset, e.Kind == KindMaxDensityReached,
			e.Kind == KindIntakeOverturnRisk:
			t.Errorf("%s invented across the gap: %s", e.Kind, eventLine(e))
		}
	}
	if len(fired) != 1 || len(resolved) != 1 {
		t.Fatalf("ice_on: %d firing, %d resolved; want 1 and 1", len(fired), len(resolved))
	}
	r := resolved[0]
	if r.Details["reason"] != "data gap" || r.Details["onset"] != fired[0].Details["onset"] || r.Subject != fired[0].Subject ||
		r.Details["last_data"] != stamp(last) || !r.Time.Equal(after[0].Time) || r.Details["caution"] != CautionIce {
		t.Errorf("resolved ice_on %+v", r)
	}
	if !strings.Contains(r.Summary, "can no longer be followed") || !strings.Contains(r.Summary, "does not say that the ice has gone") {
		t.Errorf("resolved ice_on summary %q", r.Summary)
	}

	sum := s.Summary()
	if len(sum.IceOff) != 0 || len(sum.Overturns) != 0 || len(sum.IcePeriods) != 1 || len(sum.Gaps) != 1 {
		t.Fatalf("summary: %+v", sum)
	}
	ip := sum.IcePeriods[0]
	on := onsetOf(t, fired[0])
	if !ip.From.Equal(on) || !ip.To.Equal(last) || ip.End != IceEndGap || !ip.Ongoing() {
		t.Errorf("ice period %+v, want %s .. %s ended by the data gap", ip, on, last)
	}
	if want := last.Sub(on).Hours() / 24; math.Abs(ip.Days-want) > 1e-9 || math.Abs(sum.IceDays-want) > 1e-9 {
		t.Errorf("ice days %.2f (total %.2f), want %.2f: up to the last profile before the gap, not across it", ip.Days, sum.IceDays, want)
	}
	if g := sum.Gaps[0]; !g.From.Equal(last) || !g.To.Equal(after[0].Time) {
		t.Errorf("gap %+v", g)
	}
	// The lake model is in open water after the gap: the detector, started
	// afresh, settles on a seasonal state without raising a change.
	if c, _ := s.Process(l.profiles("synth", 10*time.Minute, l.DOff+10, l.DOff+10.01, 33)[0]); c.Seasonal == SeasonUnknown || c.IceInferred {
		t.Errorf("five days after the gap: seasonal %q, ice %v", c.Seasonal, c.IceInferred)
	}
}

// Holds do not bridge a long gap: a column that began to mix three hours
// before the chain went silent does not complete its overturn hold on the
// first profile after the gap. A short outage (under MaxGap) is bridged.
func TestDataGapHoldsDoNotBridge(t *testing.T) {
	depths := depthsEvery(1, 9.5)
	strat := func(z float64) float64 { return 8 + 6*(1-math.Tanh((z-4)/1.0)) }
	mixed := func(z float64) float64 { return 11 }
	run := func(gap time.Duration) ([]Event, []Column, SeasonSummary) {
		cfg := DefaultSiteConfig("pond")
		cfg.MaxDepth = 10
		s := NewSite(cfg)
		var evs []Event
		var cols []Column
		tm := t0
		step := func(f func(float64) float64, d time.Duration) {
			for end := tm.Add(d); tm.Before(end); tm = tm.Add(10 * time.Minute) {
				c, ev := s.Process(profileAt("pond", tm, depths, f))
				evs = append(evs, ev...)
				cols = append(cols, c)
			}
		}
		step(strat, 10*24*time.Hour)
		step(mixed, 3*time.Hour) // the overturn hold (6 h) half done
		tm = tm.Add(gap)
		step(mixed, 24*time.Hour)
		return evs, cols, s.Summary()
	}

	evs, cols, sum := run(8 * 24 * time.Hour)
	if n := len(kinds(evs, KindOverturn)); n != 0 {
		t.Errorf("after an 8-day gap: %d overturn events, want none (the hold must not bridge the gap)", n)
	}
	after := cols[len(cols)-24*6]
	if after.Seasonal != SeasonUnknown {
		t.Errorf("first profile after the gap: seasonal %q, want unknown", after.Seasonal)
	}
	if c := cols[len(cols)-1]; c.Seasonal != SeasonMixed {
		t.Errorf("a day after the gap: seasonal %q, want mixed (taken silently)", c.Seasonal)
	}
	if len(sum.Gaps) != 1 || len(sum.StratifiedTo) != 1 || len(sum.Overturns) != 0 {
		t.Errorf("summary after the gap: gaps %v, stratified to %v, overturns %v", sum.Gaps, sum.StratifiedTo, sum.Overturns)
	}

	evs, _, sum = run(2 * 24 * time.Hour)
	ov := kinds(evs, KindOverturn)
	if len(ov) != 1 || len(sum.Gaps) != 0 {
		t.Fatalf("after a 2-day outage: %d overturns, gaps %v; want the hold bridged (1 overturn, no gap)", len(ov), sum.Gaps)
	}
	if on := onsetOf(t, ov[0]); !on.Before(ov[0].Time.Add(-2 * 24 * time.Hour)) {
		t.Errorf("bridged overturn onset %s, want before the outage", on)
	}
}

// A state written before data gaps and seasonal stratification were kept
// (version 1) is still restored: its stratified stretch counts as seasonal
// (it was announced) and its ice periods are rebuilt.
func TestRestoreVersion1State(t *testing.T) {
	s := NewSite(DefaultSiteConfig("pond"))
	depths := depthsEvery(1, 9.5)
	for i := 0; i < 12; i++ {
		s.Process(profileAt("pond", t0.Add(time.Duration(i)*time.Hour), depths, func(z float64) float64 { return 8 + 6*(1-math.Tanh((z-4)/1.0)) }))
	}
	blob, err := s.MarshalState()
	if err != nil {
		t.Fatal(err)
	}
	var m map[string]any
	if err := json.Unmarshal(blob, &m); err != nil {
		t.Fatal(err)
	}
	m["version"] = 1
	season := m["season"].(map[string]any)
	delete(season, "strat_confirmed")
	sum := m["summary"].(map[string]any)
	delete(sum, "ice_periods")
	sum["ice_on"] = []string{"2024-01-05T00:00:00Z", "2025-01-03T00:00:00Z"}
	sum["ice_off"] = []string{"2024-04-01T00:00:00Z"}
	v1, _ := json.Marshal(m)
	r := NewSite(DefaultSiteConfig("pond"))
	if err := r.RestoreState(v1); err != nil {
		t.Fatal(err)
	}
	if !r.st.Season.StratConfirmed || r.st.Season.Current != SeasonStratified {
		t.Errorf("version 1 stratified state not seasonal: %+v", r.st.Season)
	}
	ps := r.Summary().IcePeriods
	if len(ps) != 2 || ps[0].End != IceEndOff || ps[1].End != IceEndRecord {
		t.Errorf("rebuilt ice periods %+v", ps)
	}
	m["version"] = 7
	v7, _ := json.Marshal(m)
	if err := r.RestoreState(v7); err == nil {
		t.Error("state version 7 restored")
	}
}

func TestSiteConfigGapAndStratifiedLimits(t *testing.T) {
	c := DefaultSiteConfig("pond")
	if c.MaxGap != 7*24*time.Hour || c.MinStratified != 7*24*time.Hour {
		t.Errorf("defaults: max gap %v, min stratified %v", c.MaxGap, c.MinStratified)
	}
	c.MaxGap = time.Hour
	c.MinStratified = -time.Hour
	err := c.Validate()
	for _, want := range []string{"data gap", "minimum stratified time"} {
		if err == nil || !strings.Contains(err.Error(), want) {
			t.Errorf("error %v does not report %q", err, want)
		}
	}
}
