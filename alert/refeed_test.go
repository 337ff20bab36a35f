package alert

import (
	"slices"
	"strings"
	"testing"
	"time"

	"holomix/config"
	"holomix/detect"
)

// TestRefedResolutionOfEarlierEpisode: after a crash detection replays from
// its last checkpoint, so the outbox sees again the firing and the
// resolution of an episode it already closed while a later episode of the
// same subject is open. The old resolution must not close the later episode
// (found by deploy/faults, scenario sigkill-restart-x3: the later episode was
// resolved with the earlier time and its own resolution was then dropped as
// an orphan).
func TestRefedResolutionOfEarlierEpisode(t *testing.T) {
	a := logReceiver("a")
	a.Resolved = true
	d, reg := testOpen(t, Options{Receivers: []config.Receiver{a}})
	defer closeD(t, d)
	run(t, d)
	submit := func(ev detect.Event) {
		t.Helper()
		if err := d.Submit(ev); err != nil {
			t.Fatal(err)
		}
	}
	fire1 := event("vell", detect.KindIntakeChange, detect.StatusFiring, t0, "warning")
	fire1.Subject = "hatchery"
	res1 := withStatus(withTime(fire1, t0.Add(2*time.Hour)), detect.StatusResolved)
	fire2 := withTime(fire1, t0.Add(150*time.Minute))
	res2 := withStatus(withTime(fire1, t0.Add(270*time.Minute)), detect.StatusResolved)
	// First pass, then the crash replays everything from the start.
	for _, ev := range []detect.Event{fire1, res1, fire2, fire1, res1, fire2, res2} {
		submit(ev)
	}
	got := waitLogged(t, d, 4)
	want := []string{"a firing vell intake_change hatchery", "a firing vell intake_change hatchery",
		"a resolved vell intake_change hatchery", "a resolved vell intake_change hatchery"}
	if !slices.Equal(got, want) {
		t.Fatalf("messages:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
	ends := map[string]time.Time{}
	for _, e := range d.Recent(0) {
		if e.Status == "resolved" {
			ends[e.EpisodeID] = e.EventTime
		}
	}
	ep1, ep2 := EpisodeID("vell", detect.KindIntakeChange, "hatchery", t0), EpisodeID("vell", detect.KindIntakeChange, "hatchery", fire2.Time)
	if !ends[ep1].Equal(res1.Time) || !ends[ep2].Equal(res2.Time) {
		t.Fatalf("resolutions %v, want %s at %v and %s at %v", ends, ep1, res1.Time, ep2, res2.Time)
	}
	if v := metricValue(t, reg, "holomix_alert_events_total", "outcome", "duplicate"); v != 3 {
		t.Errorf("duplicates counted %v, want 3 (the re-fed firing, resolution and firing)", v)
	}
}
