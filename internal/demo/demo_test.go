package demo

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"go.uber.org/goleak"

	"holomix/detect"
	"holomix/internal/testenv"
)

// syncBuffer is a bytes.Buffer safe for the demo's goroutines.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

func testLogger(t *testing.T) *slog.Logger {
	return slog.New(slog.NewTextHandler(tWriter{t}, &slog.HandlerOptions{Level: slog.LevelWarn}))
}

type tWriter struct{ t *testing.T }

func (w tWriter) Write(p []byte) (int, error) {
	w.t.Log(strings.TrimRight(string(p), "\n"))
	return len(p), nil
}

// TestDemoSeasonIn60s is `holomix demo --for 60s` in-process: the whole
// default season compressed into 60 s of wall time through the embedded
// broker, a real MQTT connection, the daemon and the signed webhooks. The
// demo's receiver checks every signature with the Standard Webhooks
// reference library (github.com/standard-webhooks/standard-webhooks); the
// test checks that a forged request is refused, that nothing published was
// lost, and that the season's main alerts arrived.
func TestDemoSeasonIn60s(t *testing.T) {
	out := &syncBuffer{}
	var forged int
	dir := filepath.Join(t.TempDir(), "store")
	rep, err := RunReport(context.Background(), Options{
		For: 60 * time.Second, Seed: 1, Dir: dir, Out: out, Logger: testLogger(t),
		OnReady: func(r Ready) {
			// A request without a valid signature must be refused.
			resp, err := http.Post(r.WebhookURL, "application/json", strings.NewReader(`{"id":"forged","kind":"ice_on"}`))
			if err != nil {
				t.Errorf("post to the webhook receiver: %v", err)
				return
			}
			resp.Body.Close()
			forged = resp.StatusCode
			if !strings.HasPrefix(r.StatusURL, "http://127.0.0.1:") {
				t.Errorf("status URL %q is not on loopback", r.StatusURL)
			}
		},
	})
	t.Logf("demo output:\n%s", out.String())
	if err != nil {
		t.Fatalf("demo: %v", err)
	}
	if forged != http.StatusUnauthorized || rep.Rejected != 1 {
		t.Errorf("forged webhook request: HTTP %d, rejected count %d; want 401 and 1", forged, rep.Rejected)
	}
	if rep.Interrupted || !rep.Drained {
		t.Errorf("interrupted %v, drained %v; want a drained, uninterrupted run", rep.Interrupted, rep.Drained)
	}
	if rep.Readings == 0 || rep.Spooled != rep.Readings || rep.Received != rep.Readings || rep.Detected != rep.Spooled {
		t.Errorf("readings: published %d, received %d, spooled %d, detected %d; want all equal", rep.Readings, rep.Received, rep.Spooled, rep.Detected)
	}
	if rep.BrokerDropped != 0 || rep.Dead != 0 {
		t.Errorf("broker dropped %d, daemon dead-lettered %d; want 0", rep.BrokerDropped, rep.Dead)
	}
	if rep.AlertsFailed != 0 || rep.AlertsPending != 0 || rep.AlertsDelivered != int64(len(rep.Alerts)+rep.Repeats) {
		t.Errorf("dispatcher: delivered %d, failed %d, pending %d; receiver got %d (+%d repeats)",
			rep.AlertsDelivered, rep.AlertsFailed, rep.AlertsPending, len(rep.Alerts), rep.Repeats)
	}
	got := map[detect.Kind]int{}
	for _, a := range rep.Alerts {
		p := a.Payload
		if a.MessageID == "" || p.ID == "" || p.Site.ID == "" || p.Summary == "" || p.EventTime.IsZero() {
			t.Errorf("incomplete alert: %+v", a)
		}
		if p.EventTime.After(time.Now()) {
			t.Errorf("alert %s at %s: data time in the future", p.Kind, p.EventTime)
		}
		if p.Status == detect.StatusFiring {
			got[p.Kind]++
		}
	}
	for _, k := range []detect.Kind{detect.KindOverturn, detect.KindMaxDensityReached, detect.KindIceOn} {
		if got[k] == 0 {
			t.Errorf("no %s alert reached the webhook; got %v", k, got)
		}
	}
	// The season is compressed into the minute; a slow machine (or the race
	// detector) gets less far, which the summary says.
	if rep.Wall > 75*time.Second {
		t.Errorf("the run took %v of wall time for --for 60s", rep.Wall)
	}
	text := out.String()
	for _, want := range []string{"status page: http://127.0.0.1:", "summary: ", "whole column at Tmd", "ice on"} {
		if !strings.Contains(text, want) {
			t.Errorf("output lacks %q", want)
		}
	}
	// --dir keeps the daemon's files.
	for _, f := range []string{"spool.db", "state.db", "outbox.db"} {
		if _, err := os.Stat(filepath.Join(dir, f)); err != nil {
			t.Errorf("storage: %v", err)
		}
	}
	t.Logf("wall %v; %d readings, %d events, %d alerts %v", rep.Wall.Round(time.Millisecond), rep.Readings, rep.EventCount, len(rep.Alerts), got)
}

// TestDemoStopsCleanlyOnCancel is Ctrl-C: the run ends without an error,
// everything it started is shut down (no goroutine left behind) and the
// temporary storage is removed.
func TestDemoStopsCleanlyOnCancel(t *testing.T) {
	defer goleak.VerifyNone(t, goleak.IgnoreCurrent())
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	var dir string
	out := &syncBuffer{}
	done := make(chan struct{})
	var rep *Report
	var err error
	go func() {
		defer close(done)
		rep, err = RunReport(ctx, Options{Seed: 2, Out: out, Logger: testLogger(t), OnReady: func(r Ready) {
			dir = r.Dir
			time.AfterFunc(3*time.Second, cancel)
		}})
	}()
	select {
	case <-done:
	case <-time.After(60 * time.Second):
		t.Fatalf("the demo did not stop within 60 s of start; output:\n%s", out.String())
	}
	t.Logf("output:\n%s", out.String())
	if err != nil {
		t.Fatalf("cancelled demo returned %v, want nil", err)
	}
	if !rep.Interrupted {
		t.Errorf("report not marked interrupted")
	}
	if !strings.Contains(out.String(), "summary: interrupted") {
		t.Errorf("no summary after the interruption")
	}
	if dir == "" {
		t.Fatal("OnReady was not called")
	}
	if _, err := os.Stat(dir); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("temporary storage %s still there: %v", dir, err)
	}
}

// TestDemoRefusesBadOptions: option errors are reported before anything starts.
func TestDemoRefusesBadOptions(t *testing.T) {
	full := t.TempDir()
	if err := os.WriteFile(filepath.Join(full, "x"), nil, 0o600); err != nil {
		t.Fatal(err)
	}
	for name, o := range map[string]Options{
		"format":          {Format: "value"},
		"public listen":   {Listen: "0.0.0.0:0"},
		"negative speed":  {Speed: -1},
		"token no URL":    {InfluxToken: "u:p"},
		"non-empty --dir": {Dir: full},
	} {
		t.Run(name, func(t *testing.T) {
			o.Out = io.Discard
			err := Run(context.Background(), o)
			if !errors.Is(err, ErrOptions) {
				t.Errorf("Run(%+v) = %v, want an ErrOptions error", o, err)
			}
		})
	}
}

// TestDemoWithInfluxDB: with --influx-url the readings and the derived
// series reach a real InfluxDB 1.8 (started by internal/testenv on a free
// loopback port), counted back with InfluxQL.
func TestDemoWithInfluxDB(t *testing.T) {
	in := testenv.StartInflux(t, testenv.InfluxOptions{})
	out := &syncBuffer{}
	rep, err := RunReport(context.Background(), Options{
		Speed: 2e6, For: 5 * time.Second, Seed: 4, Out: out, Logger: testLogger(t),
		InfluxURL: in.URL, InfluxBucket: in.Bucket, InfluxToken: in.Token,
	})
	t.Logf("output:\n%s", out.String())
	if err != nil {
		t.Fatalf("demo: %v", err)
	}
	if rep.Readings == 0 || rep.Stored != rep.Readings {
		t.Errorf("published %d readings, the daemon stored %d in InfluxDB; want all", rep.Readings, rep.Stored)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	for _, q := range []struct{ query, want string }{
		{"SELECT count(temp_c) FROM water_temperature", fmt.Sprintf(",%d]", rep.Readings)},
		{"SELECT count(*) FROM water_column", "water_column"},
	} {
		b, err := in.InfluxQL(ctx, in.Token, q.query)
		if err != nil {
			t.Fatalf("%s: %v", q.query, err)
		}
		if !strings.Contains(string(b), q.want) {
			t.Errorf("%s: answer %s lacks %q", q.query, b, q.want)
		}
	}
	if !strings.Contains(out.String(), "stored "+fmt.Sprint(rep.Readings)+" in InfluxDB") {
		t.Errorf("summary does not report the stored readings")
	}
}
