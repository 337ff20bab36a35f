package detect

import (
	"math"
	"testing"
	"time"
)

// A pond (invented, 10 m) with an intake at 6 m: a two-day stratified
// stretch whose mixed layer deepens past the intake before the pond mixes
// again is transient (shorter than MinStratified): no stratification_onset,
// no overturn, no intake risk. A stretch that lasts ten days is seasonal:
// one stratification_onset with its onset at the start of the stretch, one
// intake risk when the mixed layer deepens past the intake, one overturn.
func TestTransientStratificationRaisesNoAlertPair(t *testing.T) {
	cfg := DefaultSiteConfig("pond")
	cfg.MaxDepth = 10
	cfg.Intakes = []IntakeConfig{{Name: "hatchery", Depth: 6}}
	s := NewSite(cfg)
	depths := depthsEvery(1, 9.5)
	layered := func(zm float64) func(float64) float64 {
		return func(z float64) float64 { return 11 + 2.5*(1-math.Tanh((z-zm)/0.7)) }
	}
	mixed := func(float64) float64 { return 11 }
	tm := t0
	var evs []Event
	run := func(f func(float64) float64, d time.Duration) {
		for end := tm.Add(d); tm.Before(end); tm = tm.Add(10 * time.Minute) {
			_, ev := s.Process(profileAt("pond", tm, depths, f))
			evs = append(evs, ev...)
		}
	}
	run(mixed, 24*time.Hour)
	run(layered(3), 36*time.Hour) // transient: 1.5 days at 3 m…
	run(layered(8), 12*time.Hour) // …then the mixed layer passes the intake
	run(mixed, 48*time.Hour)
	// (The abrupt steps of this test raise intake_change; nothing else may come.)
	for _, e := range evs {
		if e.Kind != KindIntakeChange {
			t.Errorf("transient stratification raised %s", eventLine(e))
		}
	}
	seasonStart := tm
	run(layered(3), 10*24*time.Hour)
	run(layered(8), 24*time.Hour)
	run(mixed, 24*time.Hour)

	on, ov, risk := kinds(evs, KindStratificationOnset), kinds(evs, KindOverturn), kinds(evs, KindIntakeOverturnRisk)
	if len(on) != 1 || len(ov) != 1 || len(risk) != 1 {
		for _, e := range evs {
			t.Logf("%s", eventLine(e))
		}
		t.Fatalf("seasonal stretch: %d onsets, %d overturns, %d intake risks; want 1 each", len(on), len(ov), len(risk))
	}
	within(t, "stratification onset", onsetOf(t, on[0]), seasonStart, 10*time.Minute)
	within(t, "stratification_onset event", on[0].Time, seasonStart.Add(cfg.MinStratified), 10*time.Minute)
	if risk[0].Status != StatusFiring || !risk[0].Time.After(on[0].Time) || !risk[0].Time.Before(ov[0].Time) {
		t.Errorf("intake risk %s at %s, want firing between the onset %s and the overturn %s", risk[0].Status, risk[0].Time, on[0].Time, ov[0].Time)
	}
	if sum := s.Summary(); sum.TransientStratified != 1 || len(sum.StratifiedFrom) != 1 || len(sum.Overturns) != 1 {
		t.Errorf("summary: %d transient stretches, stratified from %v, overturns %v", sum.TransientStratified, sum.StratifiedFrom, sum.Overturns)
	}
}
