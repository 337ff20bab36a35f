package main

import (
	"bytes"
	"context"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"holomix/alert"
	"holomix/config"
	"holomix/detect"
)

func runAlertsCmd(t *testing.T, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	var out, errb bytes.Buffer
	e := &env{stdin: strings.NewReader(""), stdout: &out, stderr: &errb, getenv: func(string) string { return "" }}
	code = runAlerts(context.Background(), e, args)
	return code, out.String(), errb.String()
}

// TestAlertsCommand drives list, retry and test against a loopback receiver.
func TestAlertsCommand(t *testing.T) {
	var ok atomic.Bool
	var hits atomic.Int32
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		_, _ = io.Copy(io.Discard, r.Body)
		hits.Add(1)
		if r.Header.Get("webhook-signature") == "" {
			http.Error(w, "unsigned", http.StatusUnauthorized)
			return
		}
		if !ok.Load() {
			http.Error(w, "schema rejected", http.StatusBadRequest)
			return
		}
		w.WriteHeader(http.StatusNoContent)
	}))
	defer srv.Close()

	dir := t.TempDir()
	secret := filepath.Join(dir, "hook.secret")
	if err := os.WriteFile(secret, []byte("whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	cfgPath := filepath.Join(dir, "holomix.yaml")
	yaml := fmt.Sprintf(`mqtt:
  subscriptions:
    - topic: buoys/+/temp
storage:
  dir: %s
sites:
  - id: vell
    name: Tarn Vell
    max_depth_m: 20
alerts:
  status_url: https://status.example.org
  receivers:
    - name: hook
      type: webhook
      url: %s
      secret: {file: %s}
    - name: journal
      type: log
`, filepath.Join(dir, "state"), srv.URL, secret)
	if err := os.WriteFile(cfgPath, []byte(yaml), 0o600); err != nil {
		t.Fatal(err)
	}

	// Usage errors.
	if code, _, _ := runAlertsCmd(t); code != 2 {
		t.Errorf("no action: exit %d, want 2", code)
	}
	if code, _, errs := runAlertsCmd(t, "purge", "-c", cfgPath); code != 2 || !strings.Contains(errs, "unknown action") {
		t.Errorf("unknown action: exit %d, %q", code, errs)
	}
	if code, _, errs := runAlertsCmd(t, "list"); code != 2 || !strings.Contains(errs, "-c FILE is required") {
		t.Errorf("no config: exit %d, %q", code, errs)
	}
	if code, _, _ := runAlertsCmd(t, "retry", "-c", cfgPath); code != 2 {
		t.Errorf("retry without id: exit %d, want 2", code)
	}

	code, out, errs := runAlertsCmd(t, "list", "-c", cfgPath)
	if code != 0 || !strings.Contains(out, "no pending deliveries") || !strings.Contains(out, "no failed deliveries") {
		t.Fatalf("empty list: exit %d\n%s\n%s", code, out, errs)
	}

	// The daemon's side: an alert the receiver rejects with 400.
	cfg, err := config.LoadWith(cfgPath, config.Options{Getenv: func(string) string { return "" }})
	if err != nil {
		t.Fatal(err)
	}
	o, err := alert.ConfigOptions(cfg)
	if err != nil {
		t.Fatal(err)
	}
	o.Logger = slog.New(slog.NewTextHandler(io.Discard, nil))
	d, err := alert.Open(o)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- d.Run(ctx) }()
	ev := detect.Event{Time: time.Date(2025, 11, 3, 6, 40, 0, 0, time.UTC), Site: "vell", Kind: detect.KindOverturn,
		Status: detect.StatusFiring, Severity: "warning", Season: "fall"}
	if err := d.Submit(ev); err != nil {
		t.Fatal(err)
	}
	var failed []alert.Delivery
	for deadline := time.Now().Add(5 * time.Second); len(failed) == 0; {
		if time.Now().After(deadline) {
			t.Fatal("the delivery did not fail")
		}
		time.Sleep(5 * time.Millisecond)
		failed, _ = d.Failed()
	}

	// While the daemon holds the outbox, the tool says so.
	code, _, errs = runAlertsCmd(t, "list", "-c", cfgPath)
	if code != 1 || !strings.Contains(errs, "the daemon is running; stop it or use the status page") {
		t.Errorf("locked outbox: exit %d, %q", code, errs)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	if err := d.Close(); err != nil {
		t.Fatal(err)
	}

	code, out, errs = runAlertsCmd(t, "-c", cfgPath, "list")
	id := failed[0].AlertID
	if code != 0 || !strings.Contains(out, "failed deliveries: 1") || !strings.Contains(out, id) ||
		!strings.Contains(out, "HTTP 400 Bad Request: schema rejected") || !strings.Contains(out, "overturn") {
		t.Fatalf("list: exit %d\n%s\n%s", code, out, errs)
	}
	t.Logf("holomix alerts list:\n%s", out)

	ok.Store(true)
	code, out, errs = runAlertsCmd(t, "retry", id, "-c", cfgPath)
	if code != 0 || !strings.Contains(out, "hook: delivered") {
		t.Fatalf("retry: exit %d\n%s\n%s", code, out, errs)
	}
	code, out, _ = runAlertsCmd(t, "list", "-c", cfgPath)
	if code != 0 || !strings.Contains(out, "no failed deliveries") || !strings.Contains(out, "no pending deliveries") {
		t.Errorf("after retry: %s", out)
	}
	if code, _, errs := runAlertsCmd(t, "retry", id, "-c", cfgPath); code != 1 || !strings.Contains(errs, "no failed delivery") {
		t.Errorf("second retry: exit %d, %q", code, errs)
	}

	before := hits.Load()
	code, out, errs = runAlertsCmd(t, "test", "hook", "-c", cfgPath)
	if code != 0 || strings.TrimSpace(out) != "hook: HTTP 204 No Content" || hits.Load() != before+1 {
		t.Errorf("test: exit %d %q %q", code, out, errs)
	}
	code, out, _ = runAlertsCmd(t, "test", "journal", "-c", cfgPath)
	if code != 0 || !strings.Contains(out, "journal: written to the log") {
		t.Errorf("test log receiver: exit %d %q", code, out)
	}
	if code, _, errs := runAlertsCmd(t, "test", "nobody", "-c", cfgPath); code != 1 || !strings.Contains(errs, `no receiver named "nobody"`) {
		t.Errorf("test unknown receiver: exit %d %q", code, errs)
	}
}
