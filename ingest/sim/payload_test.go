package sim

import (
	"context"
	"encoding/json"
	"errors"
	"strings"
	"sync"
	"testing"
	"time"

	"holomix/ingest"
)

func sampleReadings() []ingest.Reading {
	t0 := time.Date(2025, 9, 15, 0, 10, 0, 0, time.UTC)
	return []ingest.Reading{
		{Site: "larchmere", Depth: 18, Time: t0, TempC: 6.512},
		{Site: "larchmere", Depth: 1, Time: t0, TempC: 19.4},
		{Site: "ottersedge", Depth: 0.75, Time: t0, TempC: 17.25},
		{Site: "larchmere", Depth: 1, Time: t0.Add(10 * time.Minute), TempC: 19.3},
	}
}

func TestPayloadJSON(t *testing.T) {
	msgs, err := Payload("json", sampleReadings())
	if err != nil {
		t.Fatal(err)
	}
	if len(msgs) != 4 {
		t.Fatalf("%d messages", len(msgs))
	}
	if msgs[0].Topic != "lakes/larchmere/temp/18" || msgs[2].Topic != "lakes/ottersedge/temp/0.75" {
		t.Errorf("topics %q %q", msgs[0].Topic, msgs[2].Topic)
	}
	var got map[string]any
	if err := json.Unmarshal(msgs[0].Payload, &got); err != nil {
		t.Fatal(err)
	}
	want := map[string]any{"time": "2025-09-15T00:10:00Z", "depth_m": 18.0, "temp_c": 6.512, "site": "larchmere"}
	for k, v := range want {
		if got[k] != v {
			t.Errorf("%s = %v, want %v", k, got[k], v)
		}
	}
	if len(got) != len(want) {
		t.Errorf("extra keys in %s", msgs[0].Payload)
	}
	// RFC 3339 parses back to the same instant.
	if ts, err := time.Parse(time.RFC3339, got["time"].(string)); err != nil || !ts.Equal(sampleReadings()[0].Time) {
		t.Errorf("time %v %v", ts, err)
	}
}

func TestPayloadJSONProfile(t *testing.T) {
	msgs, err := Payload("json-profile", sampleReadings())
	if err != nil {
		t.Fatal(err)
	}
	if len(msgs) != 3 {
		t.Fatalf("%d messages, want one per site and time", len(msgs))
	}
	if msgs[0].Topic != "lakes/larchmere/profile" {
		t.Errorf("topic %q", msgs[0].Topic)
	}
	var p struct {
		Time   string    `json:"time"`
		Site   string    `json:"site"`
		Depths []float64 `json:"depths_m"`
		Temps  []float64 `json:"temps_c"`
	}
	dec := json.NewDecoder(strings.NewReader(string(msgs[0].Payload)))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&p); err != nil {
		t.Fatal(err)
	}
	if p.Site != "larchmere" || p.Time != "2025-09-15T00:10:00Z" || len(p.Depths) != 2 || p.Depths[0] != 1 || p.Temps[0] != 19.4 || p.Temps[1] != 6.512 {
		t.Errorf("profile %+v: want depths ascending with their temperatures", p)
	}
}

func TestPayloadValueAndErrors(t *testing.T) {
	msgs, err := Payload("value", sampleReadings()[:1])
	if err != nil || len(msgs) != 1 || string(msgs[0].Payload) != "6.512" {
		t.Errorf("value payload %v %v", msgs, err)
	}
	if _, err := Payload("xml", sampleReadings()); err == nil {
		t.Error("unknown format accepted")
	}
	bad := []ingest.Reading{{Site: "a/#", Depth: 1, Time: time.Now(), TempC: 1}}
	if _, err := Payload("json", bad); err == nil {
		t.Error("site with topic wildcards accepted")
	}
	if msgs, err := Payload("json", nil); err != nil || len(msgs) != 0 {
		t.Errorf("empty input: %v %v", msgs, err)
	}
}

// recorder is a Publisher that keeps what it gets; it can fail on demand.
type recorder struct {
	mu     sync.Mutex
	topics []string
	failAt int
	first  chan struct{}
	once   sync.Once
}

func (r *recorder) Publish(_ context.Context, topic string, payload []byte) error {
	r.mu.Lock()
	defer r.mu.Unlock()
	if len(payload) == 0 {
		return errors.New("empty payload")
	}
	if r.failAt > 0 && len(r.topics)+1 == r.failAt {
		return errors.New("broker gone")
	}
	r.topics = append(r.topics, topic)
	if r.first != nil {
		r.once.Do(func() { close(r.first) })
	}
	return nil
}

func TestRun_AsFastAsPossibleUntil(t *testing.T) {
	s := New(DefaultScenario(5))
	until := s.Now().Add(2 * time.Hour)
	rec := &recorder{}
	if err := s.Run(context.Background(), rec, "json-profile", 0, until); err != nil {
		t.Fatal(err)
	}
	if !s.Now().Equal(until) {
		t.Errorf("stopped at %v, want %v", s.Now(), until)
	}
	// 12 reports × 3 sites, less whole-buoy outages (rare).
	if n := len(rec.topics); n < 30 || n > 36 {
		t.Errorf("%d profile messages in 2 h, want about 36", n)
	}
	for _, tp := range rec.topics {
		if !strings.HasPrefix(tp, "lakes/") || !strings.HasSuffix(tp, "/profile") {
			t.Fatalf("topic %q", tp)
		}
	}
}

func TestRun_PublishErrorStops(t *testing.T) {
	s := New(DefaultScenario(5))
	rec := &recorder{failAt: 3}
	err := s.Run(context.Background(), rec, "json", 0, time.Time{})
	if err == nil || !strings.Contains(err.Error(), "broker gone") {
		t.Fatalf("err = %v", err)
	}
}

func TestRun_PacedCancel(t *testing.T) {
	s := New(DefaultScenario(5))
	rec := &recorder{first: make(chan struct{})}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	// Speed 1: the next step is due 10 min of wall time later, so Run must
	// be waiting when we cancel.
	go func() { done <- s.Run(ctx, rec, "json", 1, time.Time{}) }()
	<-rec.first
	cancel()
	select {
	case err := <-done:
		if !errors.Is(err, context.Canceled) {
			t.Errorf("err = %v, want context.Canceled", err)
		}
	case <-time.After(10 * time.Second):
		t.Fatal("Run did not stop on cancel")
	}
	if got := s.Now().Sub(s.Scenario().Start); got != 10*time.Minute {
		t.Errorf("model advanced %v at speed 1 before cancel, want one step", got)
	}
}

func TestRun_BadArguments(t *testing.T) {
	s := New(DefaultScenario(5))
	if err := s.Run(context.Background(), &recorder{}, "csv", 0, time.Time{}); err == nil {
		t.Error("bad format accepted")
	}
	if err := s.Run(context.Background(), &recorder{}, "json", -1, time.Time{}); err == nil {
		t.Error("negative speed accepted")
	}
}
