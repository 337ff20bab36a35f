package alert

import (
	"slices"
	"sort"
	"strings"
	"testing"
	"time"

	bolt "go.etcd.io/bbolt"

	"holomix/config"
	"holomix/detect"
)

// Episode lifecycles across seasons (the rule in episode.go): transition kinds
// are one-shot, ice_on lasts until a resolved ice_on or an ice_off at the same
// site. The event sequences follow what detect sends (detect/season.go,
// detect/hourly.go, detect/site.go): subject "column" for the seasonal
// transitions, "ice cover" for ice_on and ice_off.

// loggedAt returns the alert log as "receiver status kind event-day" lines, sorted.
func loggedAt(d *Dispatcher) []string {
	var out []string
	for _, e := range d.Recent(0) {
		out = append(out, e.Receiver+" "+e.Status+" "+e.Kind+" "+e.EventTime.Format("2006-01-02"))
	}
	sort.Strings(out)
	return out
}

// ticker advances the fake clock by dur once the housekeeping loop has armed
// its timer, and waits until the loop has run and the queues are empty.
func ticker(t *testing.T, d *Dispatcher, clk *fakeClock) func(time.Duration) {
	return func(dur time.Duration) {
		t.Helper()
		waitTimer(t, clk, 2*time.Minute)
		clk.Advance(dur)
		waitTimer(t, clk, 2*time.Minute)
		drained(t, d)
	}
}

func seasonal(kind detect.Kind, at time.Time, season string) detect.Event {
	ev := event("vell", kind, detect.StatusFiring, at, "info")
	ev.Subject, ev.Season = "column", season
	return ev
}

func iceEvent(kind detect.Kind, status detect.Status, at time.Time) detect.Event {
	ev := event("vell", kind, status, at, "info")
	ev.Subject = "ice cover"
	return ev
}

// Every firing of a transition kind is delivered exactly once, across years;
// none opens an episode that would suppress the next one or send reminders.
func TestTransitionsEveryFiringDelivered(t *testing.T) {
	clk := newFakeClock(time.Date(2026, 12, 1, 0, 0, 0, 0, time.UTC))
	all := logReceiver("all")
	all.Resolved = true
	all.Reminder = config.Duration(7 * 24 * time.Hour)
	d, reg := testOpen(t, Options{Receivers: []config.Receiver{all}, Clock: clk.Now, after: clk.After})
	defer closeD(t, d)
	run(t, d)
	day := func(y int, m time.Month, dd int) time.Time { return time.Date(y, m, dd, 6, 0, 0, 0, time.UTC) }
	atu := func(at time.Time) detect.Event {
		ev := event("vell", detect.KindDegreeDays, detect.StatusFiring, at, "info")
		ev.Subject = "hatchery deep" // the same subject twice: still two messages
		return ev
	}
	evs := []detect.Event{
		seasonal(detect.KindStratificationOnset, day(2025, 5, 21), ""),
		seasonal(detect.KindOverturn, day(2025, 11, 3), "fall"),
		seasonal(detect.KindMaxDensityReached, day(2025, 11, 29), ""),
		seasonal(detect.KindInverseStratification, day(2025, 12, 11), ""),
		atu(day(2026, 1, 20)),
		atu(day(2026, 2, 14)),
		seasonal(detect.KindMaxDensityReached, day(2026, 4, 22), ""),
		seasonal(detect.KindOverturn, day(2026, 4, 28), "spring"),
		seasonal(detect.KindStratificationOnset, day(2026, 5, 25), ""),
		seasonal(detect.KindOverturn, day(2026, 11, 6), "fall"),
		seasonal(detect.KindMaxDensityReached, day(2026, 11, 30), ""),
		seasonal(detect.KindInverseStratification, day(2026, 12, 9), ""),
	}
	for _, ev := range evs { // one at a time, as detection raises them
		if err := d.Submit(ev); err != nil {
			t.Fatal(err)
		}
	}
	got := waitLogged(t, d, len(evs))
	var want []string
	for _, ev := range evs {
		want = append(want, "all firing "+string(ev.Kind)+" "+ev.Time.Format("2006-01-02"))
	}
	sort.Strings(want)
	if got := loggedAt(d); !slices.Equal(got, want) {
		t.Fatalf("messages:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
	if len(got) != len(evs) {
		t.Fatalf("%d messages, want %d", len(got), len(evs))
	}
	var spring, fall2 bool
	for _, e := range d.Recent(0) {
		spring = spring || strings.HasPrefix(e.Summary, "Spring overturn at Tarn Vell (column) since 28 Apr 2026 06:00 UTC")
		fall2 = fall2 || strings.HasPrefix(e.Summary, "Fall overturn at Tarn Vell (column) since 6 Nov 2026 06:00 UTC")
	}
	if !spring || !fall2 {
		t.Errorf("spring overturn delivered %v, second fall overturn delivered %v", spring, fall2)
	}

	// Re-fed (e.g. replayed after a crash): nothing new.
	if err := d.Submit(evs...); err != nil {
		t.Fatal(err)
	}
	if v := metricValue(t, reg, "holomix_alert_events_total", "outcome", "duplicate"); v != float64(len(evs)) {
		t.Errorf("duplicates counted %v, want %d", v, len(evs))
	}
	// detect never resolves or updates these kinds; a stray one sends nothing.
	last := evs[len(evs)-3]
	if err := d.Submit(withStatus(withTime(last, last.Time.Add(time.Hour)), detect.StatusResolved),
		withStatus(withTime(last, last.Time.Add(2*time.Hour)), detect.StatusUpdate)); err != nil {
		t.Fatal(err)
	}
	if v := metricValue(t, reg, "holomix_alert_events_total", "outcome", "orphan"); v != 1 {
		t.Errorf("stray resolved counted as orphan %v times, want 1", v)
	}
	if v := metricValue(t, reg, "holomix_alert_events_total", "outcome", "suppressed"); v != 1 {
		t.Errorf("stray update counted as suppressed %v times, want 1", v)
	}
	// No episode is open, so weeks pass without reminders.
	tick := ticker(t, d, clk)
	tick(7 * 24 * time.Hour)
	tick(7 * 24 * time.Hour)
	if got := loggedAt(d); !slices.Equal(got, want) {
		t.Errorf("after two weeks:\n%s\nwant no reminders:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
}

// ice_on → ice_off → next winter's ice_on: each delivered once; reminders stop
// at ice_off; a receiver that asked for resolved messages but does not get
// ice_off learns the end from a resolved ice_on; re-feeding changes nothing.
func TestIceCoverAcrossWinters(t *testing.T) {
	clk := newFakeClock(time.Date(2025, 12, 15, 0, 0, 0, 0, time.UTC))
	weekly := logReceiver("weekly")
	weekly.Reminder = config.Duration(7 * 24 * time.Hour)
	weekly.Resolved = true
	onOnly := logReceiver("on-only")
	onOnly.Kinds = []string{"ice_on"}
	onOnly.Resolved = true
	plain := logReceiver("plain")
	d, reg := testOpen(t, Options{Receivers: []config.Receiver{weekly, onOnly, plain}, Clock: clk.Now, after: clk.After})
	defer closeD(t, d)
	run(t, d)
	tick := ticker(t, d, clk)
	on1 := iceEvent(detect.KindIceOn, detect.StatusFiring, time.Date(2025, 12, 14, 6, 0, 0, 0, time.UTC))
	off1 := iceEvent(detect.KindIceOff, detect.StatusFiring, time.Date(2026, 4, 19, 12, 0, 0, 0, time.UTC))
	on2 := iceEvent(detect.KindIceOn, detect.StatusFiring, time.Date(2026, 12, 20, 6, 0, 0, 0, time.UTC))
	submit := func(evs ...detect.Event) {
		t.Helper()
		if err := d.Submit(evs...); err != nil {
			t.Fatal(err)
		}
	}

	submit(on1)
	waitLogged(t, d, 3)
	tick(7 * 24 * time.Hour) // weekly reminder of the first winter's ice
	waitLogged(t, d, 4)
	submit(off1)
	waitLogged(t, d, 7)
	tick(7 * 24 * time.Hour)
	tick(7 * 24 * time.Hour) // no reminders once the ice is off
	if n := len(d.Recent(0)); n != 7 {
		t.Fatalf("after ice-off: %d messages, want 7:\n%s", n, strings.Join(loggedAt(d), "\n"))
	}
	submit(on2)
	waitLogged(t, d, 10)
	tick(7 * 24 * time.Hour) // the second winter's cover is reminded again
	waitLogged(t, d, 11)
	want := []string{
		"on-only firing ice_on 2025-12-14",
		"on-only firing ice_on 2026-12-20",
		"on-only resolved ice_on 2026-04-19",
		"plain firing ice_off 2026-04-19",
		"plain firing ice_on 2025-12-14",
		"plain firing ice_on 2026-12-20",
		"weekly firing ice_off 2026-04-19",
		"weekly firing ice_on 2025-12-14",
		"weekly firing ice_on 2026-12-20",
		"weekly reminder ice_on 2025-12-14",
		"weekly reminder ice_on 2026-12-20",
	}
	if got := loggedAt(d); !slices.Equal(got, want) {
		t.Fatalf("messages:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
	for _, e := range d.Recent(0) {
		if e.Status != "resolved" {
			continue
		}
		if e.EpisodeID != EpisodeID("vell", detect.KindIceOn, "ice cover", on1.Time) {
			t.Errorf("resolved ice_on belongs to %s, want the first winter's episode", e.EpisodeID)
		}
		if !strings.HasPrefix(e.Summary, "Resolved: the likely ice cover at Tarn Vell (ice cover) has ended since 19 Apr 2026 12:00 UTC") ||
			!strings.Contains(e.Text, "closed by: ice_off al_") {
			t.Errorf("resolved ice_on from the ice_off:\n%s\n%s", e.Summary, e.Text)
		}
	}

	// Re-fed events change nothing; in particular the old ice_off does not end
	// the second winter's cover, whose reminders go on.
	submit(on1, off1, on2)
	if v := metricValue(t, reg, "holomix_alert_events_total", "outcome", "duplicate"); v != 3 {
		t.Errorf("duplicates counted %v, want 3", v)
	}
	tick(7 * 24 * time.Hour)
	if got := waitLogged(t, d, 12); len(got) != 12 || loggedAt(d)[11] != "weekly reminder ice_on 2026-12-20" {
		t.Errorf("after re-feeding: %v, want one more reminder of the second winter", loggedAt(d))
	}
}

// A resolved ice_on for a data gap closes the episode with its own wording, and
// the next winter's ice_on is a new episode that is delivered.
func TestIceDataGapClosesEpisode(t *testing.T) {
	all := logReceiver("all")
	all.Resolved = true
	d, reg := testOpen(t, Options{Receivers: []config.Receiver{all}})
	defer closeD(t, d)
	run(t, d)
	on1 := iceEvent(detect.KindIceOn, detect.StatusFiring, time.Date(2025, 12, 14, 6, 0, 0, 0, time.UTC))
	gap := iceEvent(detect.KindIceOn, detect.StatusResolved, time.Date(2026, 2, 20, 9, 0, 0, 0, time.UTC))
	gap.Details = map[string]string{"reason": "data gap", "last_data": "2026-02-08T06:00:00Z", "data_resumed": "2026-02-20T09:00:00Z"}
	on2 := iceEvent(detect.KindIceOn, detect.StatusFiring, time.Date(2026, 12, 18, 6, 0, 0, 0, time.UTC))
	off2 := iceEvent(detect.KindIceOff, detect.StatusFiring, time.Date(2027, 4, 10, 12, 0, 0, 0, time.UTC))
	for _, ev := range []detect.Event{on1, gap, on2, off2} {
		if err := d.Submit(ev); err != nil {
			t.Fatal(err)
		}
	}
	waitLogged(t, d, 4)
	want := []string{
		"all firing ice_off 2027-04-10",
		"all firing ice_on 2025-12-14",
		"all firing ice_on 2026-12-18",
		"all resolved ice_on 2026-02-20", // the ice_off itself tells "all" that the second cover ended
	}
	if got := loggedAt(d); !slices.Equal(got, want) {
		t.Fatalf("messages:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
	for _, e := range d.Recent(0) {
		if e.Status == "resolved" && (!strings.Contains(e.Summary, "can no longer be followed because the data stopped") ||
			strings.Contains(e.Text, "has ended")) {
			t.Errorf("data-gap message:\n%s\n%s", e.Summary, e.Text)
		}
	}
	// Both covers are closed and a re-fed data gap is recognised.
	if err := d.db.View(func(tx *bolt.Tx) error {
		if s := getSubject(tx, subjectKey("vell", detect.KindIceOn, "ice cover")); s.open != 0 || s.last == 0 {
			t.Errorf("ice_on subject %+v, want no open episode", s)
		}
		return nil
	}); err != nil {
		t.Fatal(err)
	}
	if err := d.Submit(gap, on1, on2, off2); err != nil {
		t.Fatal(err)
	}
	if v := metricValue(t, reg, "holomix_alert_events_total", "outcome", "duplicate"); v != 4 {
		t.Errorf("duplicates counted %v, want 4", v)
	}
	drained(t, d)
	if got := loggedAt(d); len(got) != 4 {
		t.Errorf("after re-feeding: %v", got)
	}
}

// An outbox written before the one-shot rule may hold an open overturn
// episode: Open closes it, so the next overturn is delivered and no reminder
// of the old one follows.
func TestStaleTransitionEpisodeClosedOnOpen(t *testing.T) {
	dir := t.TempDir()
	clk := newFakeClock(time.Date(2026, 5, 1, 0, 0, 0, 0, time.UTC))
	weekly := logReceiver("weekly")
	weekly.Reminder = config.Duration(7 * 24 * time.Hour)
	rc := []config.Receiver{weekly}
	fall := seasonal(detect.KindOverturn, time.Date(2025, 11, 3, 6, 0, 0, 0, time.UTC), "fall")
	d1, _ := testOpen(t, Options{Dir: dir, Receivers: rc, Clock: clk.Now, after: clk.After})
	// What an earlier version wrote for the fall overturn: an episode left open.
	err := writeTx(d1.db, func(tx *bolt.Tx) error {
		seq, err := tx.Bucket(bktEpisodes).NextSequence()
		if err != nil {
			return err
		}
		ep := &episodeRecord{ID: EpisodeID("vell", fall.Kind, fall.Subject, fall.Time), Seq: seq, Site: "vell", Kind: fall.Kind,
			Subject: fall.Subject, Onset: fall.Time, Open: true, LastMsgDay: eventDay(fall.Time), Latest: fall,
			Receivers: []string{"weekly"}, Opened: clk.Now(), Reminders: map[string]reminderState{"weekly": {Next: clk.Now()}}}
		if err := putEpisode(tx, ep); err != nil {
			return err
		}
		return putSubject(tx, subjectKey("vell", fall.Kind, fall.Subject), subjectRecord{open: seq, last: seq})
	})
	if err != nil {
		t.Fatal(err)
	}
	if due, err := d1.remindersDue(clk.Now()); err != nil || !due {
		t.Fatalf("stale episode not set up: due %v, %v", due, err)
	}
	closeD(t, d1)

	d, _ := testOpen(t, Options{Dir: dir, Receivers: rc, Clock: clk.Now, after: clk.After})
	defer closeD(t, d)
	if due, err := d.remindersDue(clk.Now().Add(30 * 24 * time.Hour)); err != nil || due {
		t.Errorf("after Open: reminder due %v (%v), want none", due, err)
	}
	run(t, d)
	spring := seasonal(detect.KindOverturn, time.Date(2026, 4, 28, 6, 0, 0, 0, time.UTC), "spring")
	if err := d.Submit(spring); err != nil {
		t.Fatal(err)
	}
	waitLogged(t, d, 1)
	ticker(t, d, clk)(7 * 24 * time.Hour)
	if got := loggedAt(d); !slices.Equal(got, []string{"weekly firing overturn 2026-04-28"}) {
		t.Errorf("messages %v, want only the spring overturn", got)
	}
}
