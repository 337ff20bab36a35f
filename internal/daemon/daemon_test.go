package daemon

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"holomix/config"
	"holomix/detect"
	"holomix/internal/testenv"
)

// dtConfig is a configuration for an in-process daemon against broker.
func dtConfig(t *testing.T, broker string) *config.Config {
	cfg := &config.Config{}
	cfg.MQTT.Broker = broker
	cfg.MQTT.ClientID = "holomix-" + strings.ToLower(strings.ReplaceAll(t.Name(), "/", "-"))
	cfg.MQTT.Subscriptions = []config.Subscription{{Topic: "lakes/+/temp", Format: "json", Template: "lakes/{site}/temp"}}
	cfg.Storage.Dir = filepath.Join(t.TempDir(), "data")
	cfg.Sites = []config.Site{{ID: "fen-water", Name: "Fen Water", MaxDepth: 12, Depths: []float64{1, 5, 10}}}
	config.Defaults(cfg)
	return cfg
}

// dtRun starts Run in the background and returns its address and a stop
// function that returns Run's error and how long the drain took.
func dtRun(t *testing.T, o Options) (string, func() (error, time.Duration)) {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	o.Listener = ln
	if o.Logger == nil {
		o.Logger = slog.New(slog.DiscardHandler)
	}
	ready := make(chan Info, 1)
	o.OnReady = func(i Info) { ready <- i }
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- Run(ctx, o) }()
	var info Info
	select {
	case info = <-ready:
	case err := <-done:
		cancel()
		t.Fatalf("Run: %v", err)
	case <-time.After(20 * time.Second):
		cancel()
		t.Fatal("not ready within 20 s")
	}
	stopped := false
	stop := func() (error, time.Duration) {
		if stopped {
			return nil, 0
		}
		stopped = true
		start := time.Now()
		cancel()
		select {
		case err := <-done:
			return err, time.Since(start)
		case <-time.After(10 * time.Second):
			t.Fatal("Run still running 10 s after cancel")
		}
		return nil, 0
	}
	t.Cleanup(func() { stop() })
	return "http://" + info.HTTPAddr, stop
}

func dtGet(t *testing.T, url, bearer string) (int, string) {
	t.Helper()
	req, _ := http.NewRequest(http.MethodGet, url, nil)
	if bearer != "" {
		req.Header.Set("Authorization", "Bearer "+bearer)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatalf("GET %s: %v", url, err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b)
}

func dtWait(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(20 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// TestRunOperationalSurface checks /healthz, /readyz (200, then 503 naming
// the broker), /metrics on the daemon's own registry, the Extra hook, and a
// prompt drain.
func TestRunOperationalSurface(t *testing.T) {
	mq := testenv.StartMosquitto(t, testenv.MosquittoOptions{Extra: testenv.MosquittoUserLine()})
	reg := prometheus.NewRegistry()
	extra := http.HandlerFunc(func(w http.ResponseWriter, _ *http.Request) { io.WriteString(w, "extra page") })
	base, stop := dtRun(t, Options{Config: dtConfig(t, mq.URL), Registry: reg, Extra: extra})

	if code, body := dtGet(t, base+"/healthz", ""); code != 200 || strings.TrimSpace(body) != "ok" {
		t.Fatalf("/healthz %d %q", code, body)
	}
	var r readiness
	dtWait(t, "ready", func() bool {
		code, body := dtGet(t, base+"/readyz", "")
		r = readiness{}
		_ = json.Unmarshal([]byte(body), &r)
		return code == 200 && r.Ready
	})
	if !r.Broker.OK || !r.Spool.OK || !r.Database.OK || !strings.Contains(r.Database.Detail, "not configured") {
		t.Fatalf("/readyz body %+v", r)
	}
	code, metrics := dtGet(t, base+"/metrics", "")
	for _, name := range []string{"holomix_readings_received_total", "holomix_spool_readings ", "holomix_spool_oldest_age_seconds",
		"holomix_messages_rejected_total{reason=\"bad_json\"} 0", "holomix_mqtt_connected 1", "holomix_backpressure_active 0",
		"holomix_influx_write_duration_seconds_bucket", "holomix_mqtt_acks_pending", "go_goroutines"} {
		if code != 200 || !strings.Contains(metrics, name) {
			t.Fatalf("/metrics (%d) lacks %q", code, name)
		}
	}
	if _, err := reg.Gather(); err != nil {
		t.Fatalf("the daemon's registry: %v", err)
	}
	if code, body := dtGet(t, base+"/", ""); code != 200 || body != "extra page" {
		t.Fatalf("Extra at /: %d %q", code, body)
	}

	mq.Stop()
	dtWait(t, "503 naming the broker", func() bool {
		code, body := dtGet(t, base+"/readyz", "")
		r = readiness{}
		_ = json.Unmarshal([]byte(body), &r)
		return code == http.StatusServiceUnavailable && !r.Ready && !r.Broker.OK && r.Spool.OK
	})
	err, took := stop()
	if err != nil || took > 5*time.Second {
		t.Fatalf("Run returned %v after %v (want nil within 5 s)", err, took)
	}
}

// TestRunStatusPageAndAuth: the status page is served at / by default, and
// with a bearer token configured /metrics and / need it; the probes do not.
func TestRunStatusPageAndAuth(t *testing.T) {
	mq := testenv.StartMosquitto(t, testenv.MosquittoOptions{Extra: testenv.MosquittoUserLine()})
	cfg := dtConfig(t, mq.URL)
	cfg.HTTP.BearerToken = config.Secret{Env: "UNUSED"}
	cfg.HTTP.BearerToken.Set("t0ken-for-tests")
	base, _ := dtRun(t, Options{Config: cfg})
	for _, path := range []string{"/metrics", "/"} {
		if code, _ := dtGet(t, base+path, ""); code != http.StatusUnauthorized {
			t.Fatalf("%s without a token: %d", path, code)
		}
	}
	if code, _ := dtGet(t, base+"/healthz", ""); code != 200 {
		t.Fatalf("/healthz without a token: %d", code)
	}
	if code, body := dtGet(t, base+"/", "t0ken-for-tests"); code != 200 || !strings.Contains(body, "Fen Water") {
		t.Fatalf("status page: %d %.300q", code, body)
	}
	if code, body := dtGet(t, base+"/metrics", "t0ken-for-tests"); code != 200 || !strings.Contains(body, `holomix_http_auth_rejected_total{reason="missing"} 2`) {
		t.Fatalf("/metrics with the token: %d, rejections not counted", code)
	}
}

func TestSiteResolver(t *testing.T) {
	cfg := &config.Config{Sites: []config.Site{{ID: "north", Name: "Fen Water"}, {ID: "fen water", Name: "Other"}}}
	res := siteResolver(cfg)
	for in, want := range map[string]string{
		"north": "north", "NORTH": "north", "Fen Water": "fen water", // an id wins over another site's name
		"other": "fen water", " Other ": "fen water", "unknown-lake": "unknown-lake",
	} {
		if got := res(in); got != want {
			t.Errorf("resolve %q = %q, want %q", in, got, want)
		}
	}
}

// dtLogBuf is a goroutine-safe log sink.
type dtLogBuf struct {
	mu sync.Mutex
	b  strings.Builder
}

func (l *dtLogBuf) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *dtLogBuf) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

// TestRunReload: a new configuration applies detector thresholds, alert
// receivers and the log level live and names the changes that need a restart.
func TestRunReload(t *testing.T) {
	mq := testenv.StartMosquitto(t, testenv.MosquittoOptions{Extra: testenv.MosquittoUserLine()})
	cfg := dtConfig(t, mq.URL)
	logs := &dtLogBuf{}
	level := new(slog.LevelVar)
	reload := make(chan *config.Config)
	base, stop := dtRun(t, Options{Config: cfg, Reload: reload, LogLevel: level,
		Logger: slog.New(slog.NewTextHandler(logs, &slog.HandlerOptions{Level: level}))})
	nc := *cfg
	nc.Detect.HoldTime = config.Duration(3 * time.Hour)
	nc.Log.Level = "debug"
	nc.MQTT.KeepAlive = config.Duration(45 * time.Second)
	nc.Alerts.Receivers = []config.Receiver{{Name: "journal", Type: "log", MinSeverity: "info"}}
	reload <- &nc
	dtWait(t, "reload applied", func() bool { return strings.Contains(logs.String(), "configuration reloaded") })
	line := logs.String()
	for _, want := range []string{"applied=\"[log.level detect alerts]\"", "needs_restart=\"[mqtt.keep_alive changed]\""} {
		if !strings.Contains(line, want) {
			t.Fatalf("reload log lacks %s:\n%s", want, line)
		}
	}
	if level.Level() != slog.LevelDebug {
		t.Fatalf("log level %v after reload", level.Level())
	}
	if code, _ := dtGet(t, base+"/healthz", ""); code != 200 {
		t.Fatal("daemon unhealthy after reload")
	}
	// The same file again: the live changes are in force, the restart-only
	// one is still pending.
	reload <- &nc
	dtWait(t, "second reload", func() bool {
		return strings.Contains(logs.String(), "msg=\"configuration reloaded\" applied=[] needs_restart=\"[mqtt.keep_alive changed]\"")
	})
	back := *cfg
	back.Detect, back.Alerts, back.Log = nc.Detect, nc.Alerts, nc.Log
	reload <- &back
	dtWait(t, "a reload without changes", func() bool { return strings.Contains(logs.String(), "configuration reloaded: no changes") })
	if err, _ := stop(); err != nil {
		t.Fatal(err)
	}
}

// dtTap counts what detection derives.
type dtTap struct {
	mu      sync.Mutex
	columns []detect.Column
}

func (d *dtTap) Column(c detect.Column, _ detect.Profile) {
	d.mu.Lock()
	d.columns = append(d.columns, c)
	d.mu.Unlock()
}

func (d *dtTap) Event(detect.Event) {}

func (d *dtTap) n() int {
	d.mu.Lock()
	defer d.mu.Unlock()
	return len(d.columns)
}

// TestRunFeedsDetection: readings published over MQTT reach detection (the
// Tap and the status page see the columns) with the site named as configured.
func TestRunFeedsDetection(t *testing.T) {
	mq := testenv.StartMosquitto(t, testenv.MosquittoOptions{Extra: testenv.MosquittoUserLine()})
	tap := &dtTap{}
	base, _ := dtRun(t, Options{Config: dtConfig(t, mq.URL), Tap: tap})
	dtWait(t, "subscribed (ready)", func() bool { code, _ := dtGet(t, base+"/readyz", ""); return code == 200 })
	pub := newE2EPublisher(t, mq.URL, "dt-pub")
	t0 := time.Now().UTC().Add(-24 * time.Hour).Truncate(time.Hour)
	var msgs []e2eMsg
	for step := 0; step < 6; step++ {
		for _, d := range []float64{1, 5, 10} {
			msgs = append(msgs, e2eMsg{topic: "lakes/FEN WATER/temp", // the site's name, any case: resolved to its id
				payload: fmt.Appendf(nil, `{"time":"%s","depth_m":%g,"temp_c":%.2f}`, t0.Add(time.Duration(step)*10*time.Minute).Format(time.RFC3339), d, 18-d)})
		}
	}
	pub.publish(t, msgs, 50, 30*time.Second)
	dtWait(t, "columns", func() bool { return tap.n() >= 4 })
	tap.mu.Lock()
	c := tap.columns[0]
	tap.mu.Unlock()
	if c.Site != "fen-water" || !c.Time.Equal(t0) {
		t.Fatalf("first column: site %q at %v, want fen-water at %v", c.Site, c.Time, t0)
	}
	if code, body := dtGet(t, base+"/api/sites/fen-water", ""); code != 200 || !strings.Contains(body, "fen-water") {
		t.Fatalf("status API: %d %.200s", code, body)
	}
}

// TestRunAirTopic: a site's air_topic subscription takes a bare number and a
// JSON object, acknowledges both (the publisher's QoS 1 publish completes),
// counts them as used by detection, and refuses a non-number with a reason.
func TestRunAirTopic(t *testing.T) {
	mq := testenv.StartMosquitto(t, testenv.MosquittoOptions{Extra: testenv.MosquittoUserLine()})
	cfg := dtConfig(t, mq.URL)
	cfg.Sites[0].AirTopic = "weather/fen-water/air"
	base, _ := dtRun(t, Options{Config: cfg})
	dtWait(t, "subscribed (ready)", func() bool { code, _ := dtGet(t, base+"/readyz", ""); return code == 200 })
	pub := newE2EPublisher(t, mq.URL, "dt-air-pub")
	pub.resendAfter = 20 * time.Second // a resend would count a third "used"
	now := time.Now().UTC().Format(time.RFC3339)
	pub.publish(t, []e2eMsg{
		{topic: "weather/fen-water/air", payload: []byte("-7.5")},
		{topic: "weather/fen-water/air", payload: fmt.Appendf(nil, `{"time":"%s","temp_c":-8.25}`, now)},
		{topic: "weather/fen-water/air", payload: []byte(`"cold"`)},
	}, 3, 20*time.Second)
	dtWait(t, "two air temperatures used, one rejected", func() bool {
		_, body := dtGet(t, base+"/metrics", "")
		return strings.Contains(body, `holomix_air_temperatures_total{outcome="used"} 2`) &&
			strings.Contains(body, `holomix_air_temperatures_total{outcome="dropped"} 0`) &&
			strings.Contains(body, `holomix_messages_rejected_total{reason="bad_number"} 1`)
	})
}
