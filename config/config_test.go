package config

import (
	"bytes"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

func noenv(string) string { return "" }

// TestExampleConfig loads the shipped, commented example: it must be valid.
func TestExampleConfig(t *testing.T) {
	cfg, err := LoadWith(filepath.Join("..", "deploy", "holomix.example.yaml"), Options{Getenv: noenv})
	if err != nil {
		t.Fatalf("example config: %v", err)
	}
	if len(cfg.Sites) != 2 || cfg.Sites[0].ID != "larchmere" || cfg.Sites[0].Intakes[0].Depth != 18 {
		t.Fatalf("sites not as written: %+v", cfg.Sites)
	}
	if got := cfg.Alerts.Receivers[0].Secret.Get(); !strings.HasPrefix(got, "whsec_") {
		t.Fatalf("webhook secret not resolved from the file next to the config")
	}
	var buf bytes.Buffer
	cfg.WriteSummary(&buf)
	out := buf.String()
	for _, want := range []string{"larchmere", "Larchmere Reservoir", "buoys/larchmere/chain", "hatchery-on-call", "brackenford-hatchery"} {
		if !strings.Contains(out, want) {
			t.Errorf("summary lacks %q:\n%s", want, out)
		}
	}
	if strings.Contains(out, cfg.Alerts.Receivers[0].Secret.Get()) {
		t.Fatalf("summary reveals a secret:\n%s", out)
	}
}

// TestDefaults checks the defaults of SCIENCE.md §5 and the operational ones.
func TestDefaults(t *testing.T) {
	cfg, err := Parse([]byte("mqtt:\n  subscriptions:\n    - topic: a/b\n"), Options{Getenv: noenv})
	if err != nil {
		t.Fatal(err)
	}
	d := cfg.Detect
	if d.StratDensityDiff != 0.1 || d.TmdDelta != 0.3 || d.InverseDeltaT != 0.1 || d.ThermoclineMinGrad != 0.1 {
		t.Errorf("detection thresholds %+v differ from SCIENCE.md §5", d)
	}
	if d.HoldTime.D() != 6*time.Hour || d.ProfileInterval.D() != 10*time.Minute {
		t.Errorf("hold %v interval %v", d.HoldTime.D(), d.ProfileInterval.D())
	}
	// Design choices of the detectors (detect.DefaultMaxGap, detect.DefaultMinStratified).
	if d.MaxGap.D() != 7*24*time.Hour || d.MinStratified.D() != 7*24*time.Hour {
		t.Errorf("max_gap %v min_stratified %v, want 7 days each", d.MaxGap.D(), d.MinStratified.D())
	}
	if cfg.MQTT.QoS != 1 || cfg.MQTT.CleanSession || cfg.HTTP.Listen != "127.0.0.1:8750" || cfg.MQTT.Subscriptions[0].Format != "json" {
		t.Errorf("mqtt/http defaults: %+v %+v", cfg.MQTT, cfg.HTTP)
	}
	if cfg.Ingest.RangeMinC != -3 || cfg.Ingest.RangeMaxC != 45 {
		t.Errorf("QC range %v..%v", cfg.Ingest.RangeMinC, cfg.Ingest.RangeMaxC)
	}
}

func TestExplicitQoS0Kept(t *testing.T) {
	cfg, err := Parse([]byte("mqtt:\n  qos: 0\n  subscriptions:\n    - topic: a/b\n"), Options{Getenv: noenv})
	if err != nil {
		t.Fatal(err)
	}
	if cfg.MQTT.QoS != 0 || len(cfg.Warnings()) == 0 {
		t.Fatalf("qos 0 should be kept with a warning: qos=%d warnings=%v", cfg.MQTT.QoS, cfg.Warnings())
	}
}

const base = `mqtt:
  subscriptions:
    - topic: buoys/+/temp
sites:
  - id: fenwater
    max_depth_m: 12
`

func TestBadConfigs(t *testing.T) {
	dir := t.TempDir()
	cases := []struct {
		name, yaml string
		line       int
		want       string
	}{
		{"unknown key", "mqtt:\n  brokr: tcp://x:1\n  subscriptions:\n    - topic: a\n", 2, `unknown key "brokr"`},
		{"wrong type", "mqtt:\n  qos: high\n  subscriptions:\n    - topic: a\n", 2, "cannot unmarshal"},
		{"negative depth", base + "    sensor_depths_m: [0.5, -2]\n", 7, "negative depth -2"},
		{"hypsography not decreasing", base + "    hypsography:\n      - {depth_m: 0, area_m2: 100}\n      - {depth_m: 5, area_m2: 150}\n", 9, "hypsography not decreasing"},
		{"duplicate site id", base + "  - id: fenwater\n    max_depth_m: 3\n", 7, `duplicate site id "fenwater"`},
		{"missing secret file", base + "alerts:\n  receivers:\n    - name: r\n      url: https://hooks.example/x\n      secret: {file: " + filepath.Join(dir, "nope") + "}\n", 11, "missing secret file"},
		{"inline secret", base + "alerts:\n  receivers:\n    - name: r\n      url: https://hooks.example/x\n      secret: hunter2\n", 11, "inline secrets are not accepted"},
		{"unset env secret", base + "alerts:\n  receivers:\n    - name: r\n      url: https://hooks.example/x\n      secret: {env: HOLOMIX_TEST_NOT_SET}\n", 11, "HOLOMIX_TEST_NOT_SET is not set"},
		{"plain http webhook", base + "alerts:\n  receivers:\n    - name: r\n      url: http://hooks.example/x\n      secret: {env: X}\n", 10, "plain http webhook"},
		{"unknown format", "mqtt:\n  subscriptions:\n    - topic: a\n      format: xml\n", 4, `unknown payload format "xml"`},
		{"public listener without auth", base + "http:\n  listen: 0.0.0.0:8750\n", 8, "not loopback"},
		{"intake below lake", base + "    intakes:\n      - {name: h, depth_m: 20}\n", 8, "intake depth 20 below max_depth_m 12"},
		{"bad duration", base + "detect:\n  hold_time: soon\n", 8, `invalid duration "soon"`},
		{"short max gap", base + "detect:\n  max_gap: 90m\n", 8, "max_gap must be at least 2h"},
		{"negative min stratified", base + "detect:\n  hold_time: 6h\n  min_stratified: -1h\n", 9, "min_stratified must not be negative"},
		{"unknown kind", base + "alerts:\n  receivers:\n    - name: r\n      type: log\n      kinds: [turnover]\n", 11, `unknown event kind "turnover"`},
		{"zero max depth", "mqtt:\n  subscriptions:\n    - topic: a\nsites:\n  - id: x\n", 5, "max_depth_m must be greater than 0"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			_, err := Parse([]byte(tc.yaml), Options{Getenv: noenv})
			var ps Problems
			if !errors.As(err, &ps) {
				t.Fatalf("want Problems, got %v", err)
			}
			for _, p := range ps {
				if strings.Contains(p.String(), tc.want) {
					if p.Line != tc.line {
						t.Fatalf("%q reported at line %d, want %d", p, p.Line, tc.line)
					}
					return
				}
			}
			t.Fatalf("no problem mentions %q: %v", tc.want, ps)
		})
	}
}

// TestAllProblemsAtOnce plants three errors and expects all three, each with its line.
func TestAllProblemsAtOnce(t *testing.T) {
	y := `mqtt:
  subscriptions:
    - topic: buoys/#/x
sites:
  - id: Bad Id
    max_depth_m: -4
`
	_, err := Parse([]byte(y), Options{Getenv: noenv})
	var ps Problems
	if !errors.As(err, &ps) {
		t.Fatalf("want Problems, got %v", err)
	}
	want := map[int]string{3: "invalid topic filter", 5: "invalid site id", 6: "max_depth_m must be greater than 0"}
	for line, msg := range want {
		found := false
		for _, p := range ps {
			if p.Line == line && strings.Contains(p.Msg, msg) {
				found = true
			}
		}
		if !found {
			t.Errorf("missing %q at line %d in %v", msg, line, ps)
		}
	}
}

func TestSecretFilePermissionWarning(t *testing.T) {
	dir := t.TempDir()
	f := filepath.Join(dir, "s")
	if err := os.WriteFile(f, []byte("whsec_c2VjcmV0\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	y := base + "alerts:\n  receivers:\n    - name: r\n      url: https://hooks.example/x\n      secret: {file: " + f + "}\n"
	cfg, err := Parse([]byte(y), Options{Getenv: noenv})
	if err != nil {
		t.Fatal(err)
	}
	if got := cfg.Alerts.Receivers[0].Secret.Get(); got != "whsec_c2VjcmV0" {
		t.Fatalf("secret %q", got)
	}
	if len(cfg.Warnings()) == 0 || !strings.Contains(strings.Join(cfg.Warnings(), "\n"), "readable by others") {
		t.Fatalf("no permission warning: %v", cfg.Warnings())
	}
	if s := cfg.Alerts.Receivers[0].Secret.String(); strings.Contains(s, "c2VjcmV0") {
		t.Fatalf("String reveals the secret: %s", s)
	}
}

func TestEnvSecret(t *testing.T) {
	y := base + "influx:\n  url: http://127.0.0.1:8086\n  token: {env: HOLOMIX_TOKEN}\n"
	cfg, err := Parse([]byte(y), Options{Getenv: func(k string) string {
		if k == "HOLOMIX_TOKEN" {
			return "user:pw"
		}
		return ""
	}})
	if err != nil {
		t.Fatal(err)
	}
	if cfg.Influx.Token.Get() != "user:pw" {
		t.Fatal("env secret not resolved")
	}
}

func TestParseSizesAndDurations(t *testing.T) {
	for in, want := range map[string]int64{"512MB": 512e6, "2GiB": 2 << 30, "100": 100, "1.5KiB": 1536} {
		if got, err := ParseByteSize(in); err != nil || got != want {
			t.Errorf("ParseByteSize(%q) = %d, %v; want %d", in, got, err, want)
		}
	}
	for in, want := range map[string]time.Duration{"7d": 7 * 24 * time.Hour, "6h": 6 * time.Hour, "90": 90 * time.Second} {
		if got, err := ParseDuration(in); err != nil || got != want {
			t.Errorf("ParseDuration(%q) = %v, %v; want %v", in, got, err, want)
		}
	}
}
