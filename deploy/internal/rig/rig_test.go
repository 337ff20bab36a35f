package rig

import (
	"fmt"
	"net/http"
	"sort"
	"strings"
	"testing"
	"time"

	standardwebhooks "github.com/standard-webhooks/standard-webhooks/libraries/go"

	"holomix/config"
	"holomix/detect"
	"holomix/ingest"
	"holomix/internal/engine"
)

type eventSink struct{ events []detect.Event }

func (s *eventSink) Column(detect.Column, detect.Profile) {}
func (s *eventSink) Event(e detect.Event)                 { s.events = append(s.events, e) }

// detected runs a stream's readings through the live detection path
// (internal/engine, the same code `holomix run` and `holomix replay` use)
// and returns its events as ExpectedAlert strings.
func detected(t *testing.T, s Stream, steps int) []string {
	t.Helper()
	cfg := &config.Config{}
	for _, sc := range SitesOf(s) {
		cs := config.Site{ID: sc.ID, MaxDepth: sc.MaxDepth, Depths: sc.Depths}
		if sc.IntakeDepth > 0 {
			cs.Intakes = []config.Intake{{Name: "hatchery", Depth: sc.IntakeDepth, MaxRateCPerH: 1}}
		}
		cfg.Sites = append(cfg.Sites, cs)
	}
	config.Defaults(cfg)
	sink := &eventSink{}
	eng, err := engine.New(cfg, sink)
	if err != nil {
		t.Fatal(err)
	}
	for k := 0; k < steps; k++ {
		for i := 0; i < s.Sites; i++ {
			for d, z := range s.Depths {
				eng.Add(ingest.Reading{Site: s.SiteID(i), Depth: z, Time: s.Time(k), TempC: s.Temp(i, d, k)})
			}
		}
	}
	var out []string
	for _, e := range sink.events {
		out = append(out, ExpectedAlert{Site: e.Site, Kind: string(e.Kind), Status: string(e.Status), Time: e.Time}.String())
	}
	sort.Strings(out)
	return out
}

func strs(as []ExpectedAlert) []string {
	out := make([]string, len(as))
	for i, a := range as {
		out[i] = a.String()
	}
	sort.Strings(out)
	return out
}

// TestFaultStreamAlerts: the fault suite's still 10 °C column raises exactly
// the intake_change episodes ExpectedAlerts predicts (a firing at each jump,
// resolved an hour after the rate calms) and nothing else, through the
// detection path of the daemon (detect/intake.go: rate against the sample
// 30-65 min old, resolution after an hour below the relaxed limit).
func TestFaultStreamAlerts(t *testing.T) {
	s := Stream{Prefix: "t", Sites: 4, Depths: Depths(12, 1, 1), T0: time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC),
		IntakeDepth: 5, TriggerEvery: 15, TriggerSites: 3}
	const steps = 100
	got, want := detected(t, s, steps), strs(s.ExpectedAlerts(steps))
	// Jumps at steps 15, 30, …, 90: 6 firings per trigger site, 5 resolutions
	// (the change at 90 resolves at 102, after the last step).
	if len(want) != 3*11 {
		t.Fatalf("%d expected alerts, want 33", len(want))
	}
	if strings.Join(got, "\n") != strings.Join(want, "\n") {
		t.Fatalf("detection raised\n%s\nwant\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
}

// TestBenchStreamAlerts: in the benchmark's stratified summer column the
// intake_change alerts are those ExpectedAlerts predicts (other kinds may
// fire too, e.g. stratification onset after the hold time).
func TestBenchStreamAlerts(t *testing.T) {
	s := Stream{Prefix: "t", Sites: 3, Depths: Depths(24, 0.5, 1), T0: time.Date(2026, 7, 1, 0, 0, 0, 0, time.UTC),
		Stratified: true, IntakeDepth: 5, TriggerEvery: 15, TriggerSites: 2}
	const steps = 80
	var got []string
	for _, e := range detected(t, s, steps) {
		if strings.Contains(e, " intake_change ") {
			got = append(got, e)
		}
	}
	want := strs(s.ExpectedAlerts(steps))
	if strings.Join(got, "\n") != strings.Join(want, "\n") {
		t.Fatalf("detection raised\n%s\nwant\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
}

// TestHookVerifies: the receiver accepts a request signed by the Standard
// Webhooks reference library, refuses a forged one, and answers 500 and 429
// with Retry-After in those modes.
func TestHookVerifies(t *testing.T) {
	secret, err := NewSecret()
	if err != nil {
		t.Fatal(err)
	}
	h, err := NewHook(secret)
	if err != nil {
		t.Fatal(err)
	}
	defer h.Close()
	wh, _ := standardwebhooks.NewWebhook(secret)
	post := func(id string, body string, sign bool) *http.Response {
		t.Helper()
		req, _ := http.NewRequest(http.MethodPost, h.URL(), strings.NewReader(body))
		now := time.Now()
		req.Header.Set("webhook-id", id)
		req.Header.Set("webhook-timestamp", fmt.Sprint(now.Unix()))
		sig := "v1,Zm9yZ2Vk"
		if sign {
			if sig, err = wh.Sign(id, now, []byte(body)); err != nil {
				t.Fatal(err)
			}
		}
		req.Header.Set("webhook-signature", sig)
		resp, err := http.DefaultClient.Do(req)
		if err != nil {
			t.Fatal(err)
		}
		resp.Body.Close()
		return resp
	}
	body := `{"id":"al_1","episode_id":"ep_1","site":{"id":"buoy000"},"kind":"intake_change","status":"firing","event_time":"2026-03-01T02:30:00Z"}`
	if r := post("msg_1", body, true); r.StatusCode != 200 {
		t.Fatalf("signed request: %d", r.StatusCode)
	}
	if r := post("msg_2", body, false); r.StatusCode != 401 || h.BadSignatures() != 1 {
		t.Fatalf("forged request: %d, bad signatures %d", r.StatusCode, h.BadSignatures())
	}
	h.SetMode(HookThrottle, 7)
	if r := post("msg_1", body, true); r.StatusCode != 429 || r.Header.Get("Retry-After") != "7" {
		t.Fatalf("throttled: %d Retry-After %q", r.StatusCode, r.Header.Get("Retry-After"))
	}
	h.SetMode(HookFail, 0)
	if r := post("msg_1", body, true); r.StatusCode != 500 {
		t.Fatalf("failing: %d", r.StatusCode)
	}
	h.Down()
	if _, err := http.Post(h.URL(), "application/json", strings.NewReader(body)); err == nil {
		t.Fatal("receiver still answers while down")
	}
	if err := h.Up(); err != nil {
		t.Fatal(err)
	}
	h.SetMode(HookOK, 0)
	if r := post("msg_1", body, true); r.StatusCode != 200 {
		t.Fatalf("after Up: %d", r.StatusCode)
	}
	tally := Tally(h.Deliveries(), []ExpectedAlert{{Site: "buoy000", Kind: "intake_change", Status: "firing",
		Time: time.Date(2026, 3, 1, 2, 30, 0, 0, time.UTC)}})
	if tally.Delivered != 1 || tally.Repeats != 1 || tally.Refused != 2 || tally.Throttled != 1 || tally.Duplicated != 0 {
		t.Fatalf("tally %+v", tally)
	}
}

// TestTally: a second webhook-id for one alert is a duplicate; the same
// webhook-id accepted twice is a repeat; an alert never expected is listed.
func TestTally(t *testing.T) {
	at := time.Date(2026, 3, 1, 2, 30, 0, 0, time.UTC)
	want := []ExpectedAlert{{Site: "a", Kind: "intake_change", Status: "firing", Time: at},
		{Site: "b", Kind: "intake_change", Status: "firing", Time: at}}
	d := func(wid, ep, site string, ans int, t0 time.Time) Delivery {
		return Delivery{At: t0, Sent: t0.Truncate(time.Second), WebhookID: wid, Answer: ans, EpisodeID: ep, Site: site, Kind: "intake_change", Status: "firing", EventTime: at}
	}
	now := time.Now()
	got := Tally([]Delivery{
		d("w1", "e1", "a", 429, now), d("w1", "e1", "a", 200, now.Add(3*time.Second)), d("w1", "e1", "a", 200, now.Add(4*time.Second)),
		d("w2", "e1", "a", 200, now), // a second message for the same alert
		d("w3", "e3", "c", 200, now), // not expected
	}, want)
	if got.Expected != 2 || got.Delivered != 1 || got.Repeats != 1 || got.Duplicated != 1 || len(got.Unexpected) != 1 ||
		len(got.Missing) != 1 || got.MinRetryAfterGap != 3*time.Second {
		t.Fatalf("tally %+v", got)
	}
}

// TestTallyReadings counts lost, duplicated (two series for one site,
// depth and time) and wrong readings.
func TestTallyReadings(t *testing.T) {
	at := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	want := map[Key]float64{KeyOf("a", 1, at): 10, KeyOf("a", 2, at): 10.5, KeyOf("a", 3, at): 11}
	got := TallyReadings([]Point{
		{Key: KeyOf("a", 1, at), Temp: 10},
		{Key: KeyOf("a", 1, at), Sensor: "x", Temp: 10},
		{Key: KeyOf("a", 2, at), Temp: 10.25, QC: 8},
	}, want)
	if got.Lost != 1 || got.Duplicated != 1 || got.WrongValue != 1 || got.Stored != 2 || got.Flagged[8] != 1 {
		t.Fatalf("tally %+v", got)
	}
}
