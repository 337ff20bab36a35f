package alert

import (
	"context"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"sort"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"holomix/config"
	"holomix/detect"
	"holomix/internal/testenv"
)

func TestMain(m *testing.M) {
	testenv.MainNoLeaks(m)
}

// fakeClock is a manual clock for the dispatcher's wall time and timers.
type fakeClock struct {
	mu     sync.Mutex
	now    time.Time
	timers []*fakeTimer
}

type fakeTimer struct {
	d       time.Duration // as requested
	at      time.Time
	ch      chan time.Time
	stopped bool
}

func newFakeClock(t time.Time) *fakeClock { return &fakeClock{now: t} }

func (c *fakeClock) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.now
}

func (c *fakeClock) After(d time.Duration) (<-chan time.Time, func() bool) {
	c.mu.Lock()
	defer c.mu.Unlock()
	ft := &fakeTimer{d: d, at: c.now.Add(d), ch: make(chan time.Time, 1)}
	if d <= 0 {
		ft.ch <- c.now
		return ft.ch, func() bool { return false }
	}
	c.timers = append(c.timers, ft)
	return ft.ch, func() bool {
		c.mu.Lock()
		defer c.mu.Unlock()
		was := !ft.stopped
		ft.stopped = true
		return was
	}
}

// Advance moves the clock and fires every timer that is due.
func (c *fakeClock) Advance(d time.Duration) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.now = c.now.Add(d)
	c.fireLocked()
}

func (c *fakeClock) fireLocked() {
	kept := c.timers[:0]
	for _, ft := range c.timers {
		switch {
		case ft.stopped:
		case !ft.at.After(c.now):
			ft.ch <- c.now
		default:
			kept = append(kept, ft)
		}
	}
	c.timers = kept
}

// AdvanceToTimer waits (real time, up to 5 s) for a live timer due within
// `within` of now that is not a housekeeping tick (a timer of exactly
// housekeepingTick), moves the clock to it and fires every due timer. It
// returns the new time.
func (c *fakeClock) AdvanceToTimer(t *testing.T, within time.Duration) time.Time {
	t.Helper()
	deadline := time.Now().Add(5 * time.Second)
	for time.Now().Before(deadline) {
		c.mu.Lock()
		var next *fakeTimer
		for _, ft := range c.timers {
			if !ft.stopped && ft.d != housekeepingTick && ft.at.Sub(c.now) <= within && (next == nil || ft.at.Before(next.at)) {
				next = ft
			}
		}
		if next != nil {
			c.now = next.at
			c.fireLocked()
			now := c.now
			c.mu.Unlock()
			return now
		}
		c.mu.Unlock()
		time.Sleep(2 * time.Millisecond)
	}
	t.Fatalf("no timer due within %s was started", within)
	return time.Time{}
}

// hit is one request a test receiver got.
type hit struct {
	at     time.Time // from the test's clock
	header http.Header
	body   []byte
}

// sink is a test webhook receiver on 127.0.0.1.
type sink struct {
	t      *testing.T
	srv    *httptest.Server
	clock  func() time.Time
	mu     sync.Mutex
	hits   []hit
	answer func(n int, w http.ResponseWriter, r *http.Request) // n counts from 1; nil → 200
	notify chan struct{}
}

func newSink(t *testing.T, clock func() time.Time, answer func(n int, w http.ResponseWriter, r *http.Request)) *sink {
	t.Helper()
	if clock == nil {
		clock = time.Now
	}
	s := &sink{t: t, clock: clock, answer: answer, notify: make(chan struct{}, 1000000)}
	s.srv = httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		body, _ := io.ReadAll(r.Body)
		s.mu.Lock()
		s.hits = append(s.hits, hit{at: s.clock(), header: r.Header.Clone(), body: body})
		n := len(s.hits)
		s.mu.Unlock()
		if s.answer != nil {
			s.answer(n, w, r)
		} else {
			w.WriteHeader(http.StatusNoContent)
		}
		s.notify <- struct{}{}
	}))
	t.Cleanup(s.srv.Close)
	return s
}

func (s *sink) URL() string { return s.srv.URL }

func (s *sink) Hits() []hit {
	s.mu.Lock()
	defer s.mu.Unlock()
	return append([]hit(nil), s.hits...)
}

// waitHits waits (real time) until the sink has answered at least n requests.
func (s *sink) waitHits(n int, limit time.Duration) []hit {
	s.t.Helper()
	deadline := time.After(limit)
	for {
		if h := s.Hits(); len(h) >= n {
			// The answer is written after the hit is recorded; wait for it too.
			return h
		}
		select {
		case <-s.notify:
		case <-deadline:
			s.t.Fatalf("receiver got %d requests, want %d within %s", len(s.Hits()), n, limit)
		case <-time.After(5 * time.Millisecond):
		}
	}
}

func quietLogger() *slog.Logger { return slog.New(slog.NewTextHandler(io.Discard, nil)) }

func webhook(name, url, secret string) config.Receiver {
	r := config.Receiver{Name: name, Type: TypeWebhook, URL: url}
	r.Secret.Set(secret)
	return r
}

func logReceiver(name string) config.Receiver {
	return config.Receiver{Name: name, Type: TypeLog}
}

const testSecret = "whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw" // base64 of 24 bytes; an arbitrary test key

// testOpen opens a dispatcher in dir with a fresh registry.
func testOpen(t *testing.T, o Options) (*Dispatcher, *prometheus.Registry) {
	t.Helper()
	reg := prometheus.NewRegistry()
	if o.Dir == "" {
		o.Dir = t.TempDir()
	}
	if o.Logger == nil {
		o.Logger = quietLogger()
	}
	if o.Registerer == nil {
		o.Registerer = reg
	}
	if o.Sites == nil {
		o.Sites = map[string]SiteInfo{
			"vell":  {ID: "vell", Name: "Tarn Vell"},
			"orrin": {ID: "orrin", Name: "Orrin Reservoir"},
		}
	}
	d, err := Open(o)
	if err != nil {
		t.Fatalf("Open: %v", err)
	}
	return d, reg
}

// run starts d.Run and returns a stop function that cancels it and waits.
func run(t *testing.T, d *Dispatcher) (stop func()) {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- d.Run(ctx) }()
	var once sync.Once
	stop = func() {
		once.Do(func() {
			cancel()
			if err := <-done; err != nil {
				t.Errorf("Run: %v", err)
			}
		})
	}
	t.Cleanup(stop)
	return stop
}

func closeD(t *testing.T, d *Dispatcher) {
	t.Helper()
	if err := d.Close(); err != nil {
		t.Errorf("Close: %v", err)
	}
}

var t0 = time.Date(2025, 11, 3, 6, 40, 0, 0, time.UTC)

func event(site string, kind detect.Kind, status detect.Status, at time.Time, severity string) detect.Event {
	return detect.Event{
		Time: at, Site: site, Kind: kind, Status: status, Severity: severity,
		Summary: "test event", Confidence: "high",
		Metrics: []detect.Metric{{Name: "surface_temp_c", Value: 7.8, Unit: "C"}},
	}
}

// waitFor polls cond (real time) until it holds or fails the test after limit.
func waitFor(t *testing.T, limit time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(limit)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out after %s waiting for %s", limit, what)
		}
		time.Sleep(2 * time.Millisecond)
	}
}

// metricValue sums the counter/gauge samples of a metric family whose labels
// include the given pairs.
func metricValue(t *testing.T, reg *prometheus.Registry, name string, labels ...string) float64 {
	t.Helper()
	mfs, err := reg.Gather()
	if err != nil {
		t.Fatalf("gather: %v", err)
	}
	total := 0.0
	for _, mf := range mfs {
		if mf.GetName() != name {
			continue
		}
	next:
		for _, m := range mf.GetMetric() {
			got := map[string]string{}
			for _, lp := range m.GetLabel() {
				got[lp.GetName()] = lp.GetValue()
			}
			for i := 0; i+1 < len(labels); i += 2 {
				if got[labels[i]] != labels[i+1] {
					continue next
				}
			}
			switch {
			case m.GetCounter() != nil:
				total += m.GetCounter().GetValue()
			case m.GetGauge() != nil:
				total += m.GetGauge().GetValue()
			case m.GetHistogram() != nil:
				total += float64(m.GetHistogram().GetSampleCount())
			}
		}
	}
	return total
}

// logged returns the alert log as "receiver status kind subject" lines, sorted.
func logged(d *Dispatcher) []string {
	var out []string
	for _, e := range d.Recent(0) {
		out = append(out, e.Receiver+" "+e.Status+" "+e.SiteID+" "+e.Kind+" "+e.Subject)
	}
	sort.Strings(out)
	return out
}
