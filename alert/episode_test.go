package alert

import (
	"slices"
	"strings"
	"testing"
	"time"

	"holomix/config"
	"holomix/detect"
)

// drained waits until every receiver queue is empty (delivered or failed).
func drained(t *testing.T, d *Dispatcher) {
	t.Helper()
	waitFor(t, 5*time.Second, "queues drained", func() bool {
		for _, q := range d.queues {
			if q.len() > 0 {
				return false
			}
		}
		return true
	})
}

func waitLogged(t *testing.T, d *Dispatcher, n int) []string {
	t.Helper()
	waitFor(t, 5*time.Second, "log entries", func() bool { return len(d.Recent(0)) >= n })
	drained(t, d)
	return logged(d)
}

func TestRoutingFilters(t *testing.T) {
	all := logReceiver("all")
	vellOnly := logReceiver("vell-only")
	vellOnly.Sites = []string{"vell"}
	ice := logReceiver("ice")
	ice.Kinds = []string{"ice_on", "ice_off"}
	crit := logReceiver("critical")
	crit.MinSeverity = "critical"
	warn := logReceiver("warning")
	warn.MinSeverity = "warning"
	d, _ := testOpen(t, Options{Receivers: []config.Receiver{all, vellOnly, ice, crit, warn}})
	defer closeD(t, d)
	run(t, d)
	deep := event("orrin", detect.KindIntakeOverturnRisk, detect.StatusFiring, t0, "critical")
	deep.Subject = "deep"
	evs := []detect.Event{
		event("vell", detect.KindOverturn, detect.StatusFiring, t0, "warning"),
		event("orrin", detect.KindIceOn, detect.StatusFiring, t0, "info"),
		deep,
		event("vell", detect.KindIceOff, detect.StatusFiring, t0, "critical"),
	}
	if err := d.Submit(evs...); err != nil {
		t.Fatal(err)
	}
	got := waitLogged(t, d, 13)
	want := []string{
		"all firing orrin ice_on ",
		"all firing orrin intake_overturn_risk deep",
		"all firing vell ice_off ",
		"all firing vell overturn ",
		"critical firing orrin intake_overturn_risk deep",
		"critical firing vell ice_off ",
		"ice firing orrin ice_on ",
		"ice firing vell ice_off ",
		"vell-only firing vell ice_off ",
		"vell-only firing vell overturn ",
		"warning firing orrin intake_overturn_risk deep",
		"warning firing vell ice_off ",
		"warning firing vell overturn ",
	}
	if !slices.Equal(got, want) {
		t.Errorf("routed:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
}

func TestEpisodesDeduplicate(t *testing.T) {
	a := logReceiver("a")
	a.Resolved = true
	b := logReceiver("b") // no send_resolved
	d, reg := testOpen(t, Options{Receivers: []config.Receiver{a, b}})
	defer closeD(t, d)
	run(t, d)
	submit := func(ev detect.Event) {
		t.Helper()
		if err := d.Submit(ev); err != nil {
			t.Fatal(err)
		}
	}
	fire := event("vell", detect.KindIceOn, detect.StatusFiring, t0, "warning")
	submit(fire)
	submit(fire)                                // the same event again (re-fed after a crash)
	submit(withTime(fire, t0.Add(2*time.Hour))) // flicker: firing again while the episode is open
	submit(withSubject(fire, "north bay"))      // another subject: its own episode
	resolved := withStatus(withTime(fire, t0.Add(10*24*time.Hour)), detect.StatusResolved)
	submit(resolved)
	submit(resolved)                                // resolved again
	submit(withTime(fire, t0.Add(11*24*time.Hour))) // a new episode after the end
	got := waitLogged(t, d, 7)
	want := []string{
		"a firing vell ice_on ",
		"a firing vell ice_on ",
		"a firing vell ice_on north bay",
		"a resolved vell ice_on ",
		"b firing vell ice_on ",
		"b firing vell ice_on ",
		"b firing vell ice_on north bay",
	}
	if !slices.Equal(got, want) {
		t.Errorf("messages:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
	if v := metricValue(t, reg, "holomix_alert_events_total", "outcome", "duplicate"); v != 2 {
		t.Errorf("duplicates counted %v, want 2", v)
	}
	if v := metricValue(t, reg, "holomix_alert_events_total", "outcome", "suppressed"); v != 1 {
		t.Errorf("suppressed counted %v, want 1", v)
	}
	// The resolved message belongs to the first episode.
	var firstEp, resolvedEp string
	for _, e := range d.Recent(0) {
		if e.Receiver == "a" && e.Subject == "" && e.Status == "firing" && e.EventTime.Equal(t0) {
			firstEp = e.EpisodeID
		}
		if e.Status == "resolved" {
			resolvedEp = e.EpisodeID
			if !strings.HasPrefix(e.Summary, "Resolved: the likely ice cover at Tarn Vell has ended since 13 Nov 2025 06:40 UTC") {
				t.Errorf("resolved summary = %q", e.Summary)
			}
		}
	}
	if firstEp == "" || firstEp != resolvedEp || firstEp != EpisodeID("vell", detect.KindIceOn, "", t0) {
		t.Errorf("resolved episode %q, first episode %q", resolvedEp, firstEp)
	}
	// A resolved event with no episode is counted, not an error.
	submit(withStatus(event("orrin", detect.KindFrazilRisk, detect.StatusFiring, t0, "info"), detect.StatusResolved))
	if v := metricValue(t, reg, "holomix_alert_events_total", "outcome", "orphan"); v != 1 {
		t.Errorf("orphans counted %v, want 1", v)
	}
}

// Projection updates change an open episode's message at most once per day of
// event time, however fast they arrive in wall-clock time. (frazil_risk: the
// condition kind detect updates; transition kinds have no open episode.)
func TestUpdatesAtMostOncePerEventDay(t *testing.T) {
	all := logReceiver("all")
	crit := logReceiver("critical-only")
	crit.MinSeverity = "critical"
	d, reg := testOpen(t, Options{Receivers: []config.Receiver{all, crit}})
	defer closeD(t, d)
	run(t, d)
	fire := event("vell", detect.KindFrazilRisk, detect.StatusFiring, t0, "warning") // 3 Nov 06:40
	upd := func(at time.Time, days float64, sev string) detect.Event {
		ev := withStatus(withTime(fire, at), detect.StatusUpdate)
		ev.Severity = sev
		ev.Projections = []detect.Projection{{Name: "days_to_surface_freezing", LowDays: days, HighDays: days + 2, Method: "linear fit"}}
		return ev
	}
	nov := func(day, h, m int) time.Time { return time.Date(2025, 11, day, h, m, 0, 0, time.UTC) }
	evs := []detect.Event{
		fire,
		upd(nov(3, 7, 40), 9, "warning"),   // same event day as the firing: not sent
		upd(nov(3, 23, 50), 8, "warning"),  // same day
		upd(nov(4, 1, 0), 7, "warning"),    // next day: sent
		upd(nov(4, 20, 0), 6, "warning"),   // same day: not sent
		upd(nov(4, 1, 0), 7, "warning"),    // re-fed: not sent again
		upd(nov(5, 0, 10), 5, "critical"),  // next day, escalated: sent, also to critical-only
		upd(nov(5, 0, 20), 4.5, "warning"), // same day
	}
	for _, ev := range evs {
		if err := d.Submit(ev); err != nil {
			t.Fatal(err)
		}
	}
	got := waitLogged(t, d, 4)
	want := []string{
		"all firing vell frazil_risk ",
		"all update vell frazil_risk ",
		"all update vell frazil_risk ",
		"critical-only update vell frazil_risk ",
	}
	if !slices.Equal(got, want) {
		t.Errorf("messages:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
	if v := metricValue(t, reg, "holomix_alert_events_total", "outcome", "suppressed"); v != 5 {
		t.Errorf("suppressed %v, want 5", v)
	}
	for _, e := range d.Recent(0) {
		if e.Status != "update" || e.Receiver != "all" {
			continue
		}
		if !strings.Contains(e.Summary, "continues, since 3 Nov 2025 06:40 UTC") {
			t.Errorf("update summary lacks the onset: %q", e.Summary)
		}
		if e.EventTime.Equal(nov(4, 1, 0)) && !strings.Contains(e.Text, "in 7 to 9 days (between 11 Nov 2025 and 13 Nov 2025)") {
			t.Errorf("update text lacks its projection:\n%s", e.Text)
		}
	}
}

// Reminders go out every Reminder of wall-clock time while the episode is open,
// with the latest figures, and stop when it ends.
func TestReminders(t *testing.T) {
	clk := newFakeClock(time.Date(2026, 1, 10, 12, 0, 0, 0, time.UTC))
	weekly := logReceiver("weekly")
	weekly.Reminder = config.Duration(7 * 24 * time.Hour)
	weekly.Resolved = true
	once := logReceiver("once")
	d, _ := testOpen(t, Options{Receivers: []config.Receiver{weekly, once}, Clock: clk.Now, after: clk.After})
	defer closeD(t, d)
	run(t, d)
	ice := event("vell", detect.KindIceOn, detect.StatusFiring, time.Date(2026, 1, 9, 6, 0, 0, 0, time.UTC), "warning")
	if err := d.Submit(ice); err != nil {
		t.Fatal(err)
	}
	waitLogged(t, d, 2)
	// A later same-day update is not sent but becomes the figures of the reminder.
	u := withStatus(withTime(ice, ice.Time.Add(3*time.Hour)), detect.StatusUpdate)
	u.Metrics = []detect.Metric{{Name: "surface_temp_c", Value: 0.04, Unit: "C"}}
	if err := d.Submit(u); err != nil {
		t.Fatal(err)
	}
	tick := func(dur time.Duration) {
		t.Helper()
		waitTimer(t, clk, 2*time.Minute)
		clk.Advance(dur)
		waitTimer(t, clk, 2*time.Minute) // the housekeeping loop ran and re-armed
		drained(t, d)
	}
	tick(7 * 24 * time.Hour)
	got := waitLogged(t, d, 3)
	if want := []string{"once firing vell ice_on ", "weekly firing vell ice_on ", "weekly reminder vell ice_on "}; !slices.Equal(got, want) {
		t.Fatalf("after a week: %v, want %v", got, want)
	}
	r := d.Recent(1)[0]
	if !strings.HasPrefix(r.Summary, "Reminder, Tarn Vell: likely ice cover continues, since 9 Jan 2026 06:00 UTC") ||
		!strings.Contains(r.Text, "surface water temperature: 0.04 °C") || !strings.Contains(r.Text, "no ice is guaranteed safe") {
		t.Errorf("reminder:\n%s\n%s", r.Summary, r.Text)
	}
	tick(3 * 24 * time.Hour)
	if n := len(d.Recent(0)); n != 3 {
		t.Errorf("a reminder came after 3 more days: %v", logged(d))
	}
	tick(4 * 24 * time.Hour)
	if got := waitLogged(t, d, 4); got[3] != "weekly reminder vell ice_on " {
		t.Errorf("second reminder missing: %v", got)
	}
	if err := d.Submit(withStatus(withTime(ice, ice.Time.Add(60*24*time.Hour)), detect.StatusResolved)); err != nil {
		t.Fatal(err)
	}
	waitLogged(t, d, 5)
	tick(7 * 24 * time.Hour)
	tick(7 * 24 * time.Hour)
	if got := logged(d); len(got) != 5 || got[4] != "weekly resolved vell ice_on " {
		t.Errorf("after the end: %v, want no more reminders", got)
	}
}

// waitTimer waits until a live fake timer due within `within` exists.
func waitTimer(t *testing.T, clk *fakeClock, within time.Duration) {
	t.Helper()
	waitFor(t, 5*time.Second, "a timer", func() bool {
		clk.mu.Lock()
		defer clk.mu.Unlock()
		for _, ft := range clk.timers {
			if !ft.stopped && ft.at.After(clk.now) && ft.at.Sub(clk.now) <= within {
				return true
			}
		}
		return false
	})
}

func TestInvalidEvents(t *testing.T) {
	d, reg := testOpen(t, Options{Receivers: []config.Receiver{logReceiver("log")}})
	defer closeD(t, d)
	run(t, d)
	noSite := event("", detect.KindOverturn, detect.StatusFiring, t0, "info")
	badStatus := withStatus(event("vell", detect.KindOverturn, detect.StatusFiring, t0, "info"), StatusReminder)
	oddSeverity := event("vell", detect.KindFrazilRisk, detect.StatusFiring, t0, "severe")
	err := d.Submit(noSite, badStatus, oddSeverity)
	if err == nil || !strings.Contains(err.Error(), "missing site") || !strings.Contains(err.Error(), `status "reminder"`) {
		t.Fatalf("Submit = %v, want errors for the missing site and the status", err)
	}
	waitLogged(t, d, 1)
	if e := d.Recent(1)[0]; e.Severity != "warning" || e.Kind != string(detect.KindFrazilRisk) {
		t.Errorf("odd severity delivered as %q (%s), want warning", e.Severity, e.Kind)
	}
	if v := metricValue(t, reg, "holomix_alert_events_total", "outcome", "rejected"); v != 2 {
		t.Errorf("rejected %v, want 2", v)
	}
	if v := metricValue(t, reg, "holomix_alert_events_total", "outcome", "bad_severity"); v != 1 {
		t.Errorf("bad_severity %v, want 1", v)
	}
}

// The alert log survives a restart (rebuilt from the outbox), newest first.
func TestRecentSurvivesRestart(t *testing.T) {
	dir := t.TempDir()
	rc := []config.Receiver{logReceiver("log")}
	d, _ := testOpen(t, Options{Dir: dir, Receivers: rc})
	stop := run(t, d)
	if err := d.Submit(event("vell", detect.KindOverturn, detect.StatusFiring, t0, "info")); err != nil {
		t.Fatal(err)
	}
	waitLogged(t, d, 1)
	if err := d.Submit(event("orrin", detect.KindIceOn, detect.StatusFiring, t0, "info")); err != nil {
		t.Fatal(err)
	}
	waitLogged(t, d, 2)
	waitFor(t, 5*time.Second, "marks written", func() bool { p, _ := d.Pending(); return len(p) == 0 })
	stop()
	closeD(t, d)
	d2, _ := testOpen(t, Options{Dir: dir, Receivers: rc})
	defer closeD(t, d2)
	got := d2.Recent(5)
	if len(got) != 2 || got[0].SiteID != "orrin" || got[1].SiteID != "vell" {
		t.Errorf("Recent after restart = %+v", got)
	}
	if len(d2.Recent(1)) != 1 {
		t.Error("Recent(1) did not limit")
	}
}

func TestPruneKeepsOpenAndUndelivered(t *testing.T) {
	clk := newFakeClock(time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC))
	lr := logReceiver("log")
	lr.Resolved = true
	d, _ := testOpen(t, Options{Receivers: []config.Receiver{lr}, Clock: clk.Now, after: clk.After, Retention: 24 * time.Hour})
	defer closeD(t, d)
	stop := run(t, d)
	closed := event("vell", detect.KindFrazilRisk, detect.StatusFiring, t0, "info")
	open := event("orrin", detect.KindIceOn, detect.StatusFiring, t0, "info")
	if err := d.Submit(closed, open, withStatus(withTime(closed, t0.Add(time.Hour)), detect.StatusResolved)); err != nil {
		t.Fatal(err)
	}
	waitLogged(t, d, 3)
	waitFor(t, 5*time.Second, "marks written", func() bool { p, _ := d.Pending(); return len(p) == 0 })
	stop()
	clk.Advance(48 * time.Hour)
	n, err := d.prune(clk.Now())
	if err != nil {
		t.Fatal(err)
	}
	if n != 2 {
		t.Errorf("pruned %d alerts, want 2 (the closed episode's firing and resolved)", n)
	}
	// The open episode still guards against a re-fed firing.
	if err := d.Submit(open); err != nil {
		t.Fatal(err)
	}
	if p, _ := d.Pending(); len(p) != 0 {
		t.Errorf("re-fed firing of an open episode was queued after pruning: %v", p)
	}
}

func withTime(ev detect.Event, at time.Time) detect.Event { ev.Time = at; return ev }
func withSubject(ev detect.Event, s string) detect.Event  { ev.Subject = s; return ev }
func withStatus(ev detect.Event, s detect.Status) detect.Event {
	ev.Status = s
	return ev
}
