package alert

import (
	"context"
	"errors"
	"net/http"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"holomix/config"
	"holomix/detect"
)

// A receiver that answers 500 three times and then 2xx gets one alert after
// three retries spaced 1 s, 2 s, 4 s (±20 % jitter), always with one webhook-id.
func TestRetry500ThenSuccessBackoff(t *testing.T) {
	clk := newFakeClock(t0)
	s := newSink(t, clk.Now, func(n int, w http.ResponseWriter, _ *http.Request) {
		if n <= 3 {
			http.Error(w, "temporarily broken", http.StatusInternalServerError)
			return
		}
		w.WriteHeader(http.StatusOK)
	})
	d, reg := testOpen(t, Options{Receivers: []config.Receiver{webhook("hook", s.URL(), testSecret)}, Clock: clk.Now, after: clk.After})
	defer closeD(t, d)
	run(t, d)
	if err := d.Submit(event("vell", detect.KindOverturn, detect.StatusFiring, t0, "warning")); err != nil {
		t.Fatal(err)
	}
	s.waitHits(1, 5*time.Second)
	for i := 2; i <= 4; i++ {
		clk.AdvanceToTimer(t, 30*time.Second) // the worker's backoff timer
		s.waitHits(i, 5*time.Second)
	}
	hits := s.Hits()
	if len(hits) != 4 {
		t.Fatalf("got %d requests, want 4", len(hits))
	}
	want := []time.Duration{time.Second, 2 * time.Second, 4 * time.Second}
	for i, base := range want {
		gap := hits[i+1].at.Sub(hits[i].at)
		lo, hi := time.Duration(float64(base)*0.8), time.Duration(float64(base)*1.2)
		if gap < lo || gap > hi {
			t.Errorf("retry %d came %s after the previous attempt, want %s..%s", i+1, gap, lo, hi)
		}
	}
	id := hits[0].header.Get("webhook-id")
	for i, h := range hits {
		if got := h.header.Get("webhook-id"); got != id || id == "" {
			t.Errorf("attempt %d: webhook-id %q, want the same %q on every retry", i+1, got, id)
		}
	}
	waitFor(t, 5*time.Second, "delivery recorded", func() bool {
		p, err := d.Pending()
		return err == nil && len(p) == 0 && metricValue(t, reg, "holomix_alert_delivered_total", "receiver", "hook") == 1
	})
	if got := metricValue(t, reg, "holomix_alert_retries_total", "receiver", "hook"); got != 3 {
		t.Errorf("retries_total = %v, want 3", got)
	}
	if got := metricValue(t, reg, "holomix_alert_failed_total", "receiver", "hook"); got != 0 {
		t.Errorf("failed_total = %v, want 0", got)
	}
	if got := metricValue(t, reg, "holomix_alert_delivery_latency_seconds", "receiver", "hook"); got != 1 {
		t.Errorf("latency observations = %v, want 1", got)
	}
}

// The backoff function itself: 1 s·2^(n-1) capped at 10 min, jitter within ±20 %.
func TestBackoffBounds(t *testing.T) {
	for n := 1; n <= 40; n++ {
		base := backoffCap
		if n <= 10 {
			base = min(time.Second<<(n-1), backoffCap)
		}
		lo, hi := backoff(n, 0), backoff(n, 0.999999)
		if lo != time.Duration(float64(base)*0.8) {
			t.Errorf("n=%d: lowest %s, want %s", n, lo, time.Duration(float64(base)*0.8))
		}
		if hi > time.Duration(float64(base)*1.2) || hi < time.Duration(float64(base)*1.19) {
			t.Errorf("n=%d: highest %s, want just under %s", n, hi, time.Duration(float64(base)*1.2))
		}
	}
	if got := backoff(11, 0.5); got != 10*time.Minute {
		t.Errorf("backoff(11) = %s, want the 10 min cap", got)
	}
}

// A receiver that hangs does not delay the others: they get the alert while
// the hung request is still open; the hung one times out and is retried.
func TestHungReceiverDoesNotBlockOthers(t *testing.T) {
	release := make(chan struct{})
	var firstEnd atomic.Value
	slow := newSink(t, nil, func(n int, w http.ResponseWriter, r *http.Request) {
		select {
		case <-r.Context().Done(): // the client gave up
		case <-release:
		}
		if n == 1 {
			firstEnd.Store(time.Now())
		}
	})
	defer close(release)
	fast1, fast2 := newSink(t, nil, nil), newSink(t, nil, nil)
	slowCfg := webhook("slow", slow.URL(), testSecret)
	slowCfg.Timeout = config.Duration(2 * time.Second)
	d, reg := testOpen(t, Options{Receivers: []config.Receiver{slowCfg, webhook("fast1", fast1.URL(), testSecret), webhook("fast2", fast2.URL(), testSecret)}})
	defer closeD(t, d)
	run(t, d)
	start := time.Now()
	if err := d.Submit(event("vell", detect.KindIceOn, detect.StatusFiring, t0, "warning")); err != nil {
		t.Fatal(err)
	}
	slow.waitHits(1, 5*time.Second)
	fast1.waitHits(1, 5*time.Second)
	fast2.waitHits(1, 5*time.Second)
	t.Logf("fast receivers served %s after Submit", time.Since(start))
	// The hung attempt times out after 2 s and is retried with the same webhook-id.
	hits := slow.waitHits(2, 10*time.Second)
	// Causal check: both fast receivers were served while the first slow
	// request was still open.
	if end, _ := firstEnd.Load().(time.Time); end.IsZero() || !fast1.Hits()[0].at.Before(end) || !fast2.Hits()[0].at.Before(end) {
		t.Errorf("fast receivers were served at %v/%v, the hung request ended at %v: want before",
			fast1.Hits()[0].at, fast2.Hits()[0].at, end)
	}
	if hits[0].header.Get("webhook-id") != hits[1].header.Get("webhook-id") {
		t.Errorf("retry changed webhook-id: %q then %q", hits[0].header.Get("webhook-id"), hits[1].header.Get("webhook-id"))
	}
	waitFor(t, 5*time.Second, "retry counted", func() bool {
		return metricValue(t, reg, "holomix_alert_retries_total", "receiver", "slow") >= 1
	})
	// The counter moves when the attempt ends; its result reaches the outbox
	// with the next group commit (up to commitLinger later), so wait for it.
	var pend []Delivery
	waitFor(t, 10*time.Second, "the timeout recorded in the outbox", func() bool {
		var err error
		if pend, err = d.Pending(); err != nil {
			t.Fatal(err)
		}
		for _, p := range pend {
			if p.Receiver == "slow" && p.LastError != "" {
				return true
			}
		}
		return false
	})
	for _, p := range pend {
		if p.Receiver != "slow" {
			t.Errorf("delivery to %s still pending", p.Receiver)
		} else if !strings.Contains(p.LastError, "no answer within 2s") {
			t.Errorf("slow delivery last error = %q, want the timeout", p.LastError)
		}
	}
}

// Written but not delivered before a stop: delivered exactly once after reopening.
func TestOutboxSurvivesRestartBeforeDelivery(t *testing.T) {
	dir := t.TempDir()
	s := newSink(t, nil, nil)
	rc := []config.Receiver{webhook("hook", s.URL(), testSecret)}
	d, _ := testOpen(t, Options{Dir: dir, Receivers: rc})
	if err := d.Submit(event("vell", detect.KindOverturn, detect.StatusFiring, t0, "critical")); err != nil {
		t.Fatal(err)
	}
	closeD(t, d) // no Run: nothing was delivered
	if n := len(s.Hits()); n != 0 {
		t.Fatalf("delivered %d times before Run", n)
	}

	d2, _ := testOpen(t, Options{Dir: dir, Receivers: rc})
	pend, err := d2.Pending()
	if err != nil || len(pend) != 1 {
		t.Fatalf("after reopen: pending %v, %v; want 1", pend, err)
	}
	stop := run(t, d2)
	s.waitHits(1, 5*time.Second)
	waitFor(t, 5*time.Second, "delivery marked", func() bool { p, _ := d2.Pending(); return len(p) == 0 })
	stop()
	closeD(t, d2)

	d3, _ := testOpen(t, Options{Dir: dir, Receivers: rc})
	stop = run(t, d3)
	// Re-feeding the same event after the restart is a no-op.
	if err := d3.Submit(event("vell", detect.KindOverturn, detect.StatusFiring, t0, "critical")); err != nil {
		t.Fatal(err)
	}
	stop()
	closeD(t, d3)
	if n := len(s.Hits()); n != 1 {
		t.Fatalf("receiver got %d requests, want exactly 1", n)
	}
}

// A crash after the receiver's 2xx but before the mark: the message is sent
// again after the restart, with the same webhook-id, and then never again.
func TestCrashBeforeMarkResendsSameID(t *testing.T) {
	dir := t.TempDir()
	s := newSink(t, nil, nil)
	rc := []config.Receiver{webhook("hook", s.URL(), testSecret)}
	d, _ := testOpen(t, Options{Dir: dir, Receivers: rc})
	d.hooks.afterSend = func(string, string) bool { return false } // "crash": result lost
	stop := run(t, d)
	if err := d.Submit(event("orrin", detect.KindFrazilRisk, detect.StatusFiring, t0, "warning")); err != nil {
		t.Fatal(err)
	}
	s.waitHits(1, 5*time.Second)
	stop()
	closeD(t, d)

	d2, _ := testOpen(t, Options{Dir: dir, Receivers: rc})
	stop = run(t, d2)
	hits := s.waitHits(2, 5*time.Second)
	waitFor(t, 5*time.Second, "delivery marked", func() bool { p, _ := d2.Pending(); return len(p) == 0 })
	stop()
	closeD(t, d2)
	if a, b := hits[0].header.Get("webhook-id"), hits[1].header.Get("webhook-id"); a == "" || a != b {
		t.Fatalf("duplicate after crash has webhook-id %q, first had %q: want equal", b, a)
	}

	d3, _ := testOpen(t, Options{Dir: dir, Receivers: rc})
	stop = run(t, d3)
	time.Sleep(50 * time.Millisecond) // give a wrong resend a chance to show
	stop()
	closeD(t, d3)
	if n := len(s.Hits()); n != 2 {
		t.Fatalf("receiver got %d requests, want 2 (one duplicate, then none)", n)
	}
}

// 429 with Retry-After in seconds, and 503 with an HTTP date, are honoured
// exactly (no jitter). RFC 9110 §10.2.3.
func TestRetryAfterHonoured(t *testing.T) {
	clk := newFakeClock(t0)
	s := newSink(t, clk.Now, func(n int, w http.ResponseWriter, _ *http.Request) {
		switch n {
		case 1:
			w.Header().Set("Retry-After", "120")
			http.Error(w, "slow down", http.StatusTooManyRequests)
		case 2:
			w.Header().Set("Retry-After", clk.Now().Add(300*time.Second).Format(http.TimeFormat))
			http.Error(w, "maintenance", http.StatusServiceUnavailable)
		default:
			w.WriteHeader(http.StatusAccepted)
		}
	})
	d, reg := testOpen(t, Options{Receivers: []config.Receiver{webhook("hook", s.URL(), testSecret)}, Clock: clk.Now, after: clk.After})
	defer closeD(t, d)
	run(t, d)
	if err := d.Submit(event("vell", detect.KindIceOff, detect.StatusFiring, t0, "info")); err != nil {
		t.Fatal(err)
	}
	s.waitHits(1, 5*time.Second)
	clk.AdvanceToTimer(t, time.Hour)
	s.waitHits(2, 5*time.Second)
	clk.AdvanceToTimer(t, time.Hour)
	h := s.waitHits(3, 5*time.Second)
	if gap := h[1].at.Sub(h[0].at); gap != 120*time.Second {
		t.Errorf("after 429 Retry-After: 120 the retry came after %s, want 120s", gap)
	}
	if gap := h[2].at.Sub(h[1].at); gap != 300*time.Second {
		t.Errorf("after 503 Retry-After: <date +300 s> the retry came after %s, want 300s", gap)
	}
	waitFor(t, 5*time.Second, "delivered", func() bool {
		return metricValue(t, reg, "holomix_alert_delivered_total", "receiver", "hook") == 1
	})
}

func TestParseRetryAfter(t *testing.T) {
	now := time.Date(2025, 11, 3, 6, 40, 0, 0, time.UTC)
	cases := []struct {
		in   string
		want time.Duration
	}{
		{"120", 120 * time.Second}, // delay-seconds
		{" 60\r\n", time.Minute},   // surrounding white space
		{"0", 0},                   // no wait: normal backoff applies
		{"-3", 0},                  // invalid
		{"1.5", 0},                 // delay-seconds is an integer
		{"soon", 0},                // invalid
		{"", 0},                    // absent
		{"3600", time.Hour},        // exactly the cap
		{"999999", maxRetryAfter},  // capped
		{"Mon, 03 Nov 2025 06:45:00 GMT", 5 * time.Minute}, // IMF-fixdate, RFC 9110 §5.6.7
		{"Monday, 03-Nov-25 06:41:00 GMT", time.Minute},    // obsolete RFC 850 form
		{"Mon Nov  3 06:42:00 2025", 2 * time.Minute},      // obsolete asctime form
		{"Mon, 03 Nov 2025 06:00:00 GMT", 0},               // in the past
		{"Tue, 04 Nov 2025 06:40:00 GMT", maxRetryAfter},   // a day ahead: capped
		{"Mon, 03 Nov 2025 06:41:00 GMT extra", 0},         // trailing junk
	}
	for _, c := range cases {
		if got := parseRetryAfter(c.in, now); got != c.want {
			t.Errorf("parseRetryAfter(%q) = %s, want %s", c.in, got, c.want)
		}
	}
}

// A 400 is not retried: the delivery goes to the failed list with the status
// and the first 512 bytes of the answer; Retry puts it back.
func TestClientErrorGoesToFailedList(t *testing.T) {
	long := "bad payload: " + strings.Repeat("x", 2000)
	var fixed atomic.Bool
	s := newSink(t, nil, func(_ int, w http.ResponseWriter, _ *http.Request) {
		if fixed.Load() {
			w.WriteHeader(http.StatusOK)
			return
		}
		w.WriteHeader(http.StatusBadRequest)
		_, _ = w.Write([]byte(long))
	})
	d, reg := testOpen(t, Options{Receivers: []config.Receiver{webhook("hook", s.URL(), testSecret)}})
	defer closeD(t, d)
	run(t, d)
	ev := event("vell", detect.KindSensorFault, detect.StatusFiring, t0, "warning")
	ev.Subject = "12 m"
	if err := d.Submit(ev); err != nil {
		t.Fatal(err)
	}
	s.waitHits(1, 5*time.Second)
	var failed []Delivery
	waitFor(t, 5*time.Second, "failed list", func() bool {
		failed, _ = d.Failed()
		return len(failed) == 1
	})
	f := failed[0]
	if f.LastStatus != 400 || f.Attempts != 1 || f.State != StateFailed || f.Receiver != "hook" {
		t.Errorf("failed delivery = %+v, want status 400 after 1 attempt", f)
	}
	if f.Excerpt != long[:ExcerptBytes] {
		t.Errorf("excerpt is %d bytes %q…, want the first %d bytes of the answer", len(f.Excerpt), f.Excerpt[:min(40, len(f.Excerpt))], ExcerptBytes)
	}
	if f.SiteID != "vell" || f.Kind != string(detect.KindSensorFault) || f.Subject != "12 m" {
		t.Errorf("failed delivery identity = %+v", f)
	}
	if got := metricValue(t, reg, "holomix_alert_failed_total", "receiver", "hook"); got != 1 {
		t.Errorf("failed_total = %v, want 1", got)
	}
	if n := len(s.Hits()); n != 1 {
		t.Errorf("a 400 was retried: %d requests", n)
	}
	if err := d.Retry("al_nonexistent"); err == nil {
		t.Error("Retry of an unknown id succeeded")
	}
	fixed.Store(true)
	if err := d.Retry(f.AlertID); err != nil {
		t.Fatal(err)
	}
	s.waitHits(2, 5*time.Second)
	waitFor(t, 5*time.Second, "delivered after retry", func() bool {
		fl, _ := d.Failed()
		p, _ := d.Pending()
		return len(fl) == 0 && len(p) == 0
	})
	if err := d.Retry(f.AlertID); err == nil {
		t.Error("Retry of a delivered alert succeeded")
	}
}

// DeliverNow (the standalone `alerts retry`) attempts once and records it; it
// refuses while Run is active.
func TestDeliverNow(t *testing.T) {
	var fixed atomic.Bool
	s := newSink(t, nil, func(_ int, w http.ResponseWriter, _ *http.Request) {
		if !fixed.Load() {
			http.Error(w, "gone", http.StatusGone)
			return
		}
		w.WriteHeader(http.StatusOK)
	})
	dir := t.TempDir()
	rc := []config.Receiver{webhook("hook", s.URL(), testSecret)}
	d, _ := testOpen(t, Options{Dir: dir, Receivers: rc})
	stop := run(t, d)
	if err := d.Submit(event("vell", detect.KindIceOn, detect.StatusFiring, t0, "warning")); err != nil {
		t.Fatal(err)
	}
	var failed []Delivery
	waitFor(t, 5*time.Second, "failed", func() bool { failed, _ = d.Failed(); return len(failed) == 1 })
	if err := d.Retry(failed[0].AlertID); err != nil {
		t.Fatal(err)
	}
	stop()
	// The running workers may already have re-attempted (and failed again).
	_, _ = d.Failed()
	closeD(t, d)

	d2, _ := testOpen(t, Options{Dir: dir, Receivers: rc})
	defer closeD(t, d2)
	id := failed[0].AlertID
	if p, _ := d2.Pending(); len(p) == 0 {
		if err := d2.Retry(id); err != nil {
			t.Fatal(err)
		}
	}
	fixed.Store(true)
	got, err := d2.DeliverNow(context.Background(), id)
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != 1 || got[0].State != StateDelivered {
		t.Fatalf("DeliverNow = %+v, want one delivered", got)
	}
	if _, err := d2.DeliverNow(context.Background(), id); err == nil {
		t.Error("DeliverNow with nothing pending succeeded")
	}
}

// SendTest sends a signed message outside the outbox and reports the status.
func TestSendTest(t *testing.T) {
	s := newSink(t, nil, func(_ int, w http.ResponseWriter, _ *http.Request) { w.WriteHeader(http.StatusAccepted) })
	bad := newSink(t, nil, func(_ int, w http.ResponseWriter, _ *http.Request) { http.Error(w, "nope", http.StatusUnauthorized) })
	d, _ := testOpen(t, Options{Receivers: []config.Receiver{webhook("hook", s.URL(), testSecret), webhook("bad", bad.URL(), testSecret), logReceiver("log")}})
	defer closeD(t, d)
	code, err := d.SendTest(context.Background(), "hook")
	if err != nil || code != http.StatusAccepted {
		t.Fatalf("SendTest = %d, %v; want 202", code, err)
	}
	h := s.Hits()[0]
	if h.header.Get("webhook-signature") == "" || !strings.Contains(string(h.body), `"summary":"Test alert from holomix`) {
		t.Errorf("test message not signed or not a test: %s", h.body)
	}
	code, err = d.SendTest(context.Background(), "bad")
	var he *HTTPError
	if code != http.StatusUnauthorized || !errors.As(err, &he) || !strings.Contains(he.Body, "nope") {
		t.Errorf("SendTest(bad) = %d, %v; want 401 with the answer", code, err)
	}
	if _, err := d.SendTest(context.Background(), "missing"); err == nil {
		t.Error("SendTest to an unknown receiver succeeded")
	}
	if code, err := d.SendTest(context.Background(), "log"); err != nil || code != 0 || len(d.Recent(1)) != 1 {
		t.Errorf("SendTest(log) = %d, %v, log %v", code, err, d.Recent(1))
	}
	if p, _ := d.Pending(); len(p) != 0 {
		t.Errorf("test messages went through the outbox: %v", p)
	}
}

func TestOpenLockedAndInvalid(t *testing.T) {
	dir := t.TempDir()
	d, _ := testOpen(t, Options{Dir: dir, Receivers: []config.Receiver{logReceiver("log")}})
	defer closeD(t, d)
	_, err := Open(Options{Dir: dir, Logger: quietLogger(), LockTimeout: 100 * time.Millisecond})
	if !errors.Is(err, ErrLocked) {
		t.Fatalf("second Open = %v, want ErrLocked", err)
	}

	bad := []config.Receiver{
		{Name: "a", Type: TypeWebhook, URL: "http://192.0.2.1/hook"}, // plain http off loopback
		{Name: "b", Type: TypeLog, MinSeverity: "urgent"},
		{Name: "c", Type: TypeLog, Kinds: []string{"earthquake"}},
		{Name: "c", Type: TypeLog},
		{Name: "d", Type: "pager"},
		{Name: "e", Type: TypeWebhook, URL: "https://127.0.0.1/h", Template: "{{.Nope"},
		{Name: "f", Type: TypeLog, Sites: []string{"atlantis"}},
	}
	bad = append(bad, webhook("g", "https://127.0.0.1/h", "whsec_***"))
	_, err = Open(Options{Dir: t.TempDir(), Receivers: bad, Logger: quietLogger(),
		Sites: map[string]SiteInfo{"vell": {ID: "vell"}}})
	if err == nil {
		t.Fatal("Open accepted invalid receivers")
	}
	for _, want := range []string{"plain http", "min_severity", "earthquake", "duplicate", "pager", "template", "atlantis", "base64"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("error does not mention %q:\n%v", want, err)
		}
	}
}
