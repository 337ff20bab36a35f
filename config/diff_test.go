package config

import (
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
)

const diffBase = `mqtt:
  broker: tcp://127.0.0.1:1883
  client_id: holomix-a
  subscriptions:
    - topic: buoys/+/chain
      template: buoys/{site}/chain
storage:
  dir: /var/lib/holomix
sites:
  - id: fenwater
    max_depth_m: 12
    sensor_depths_m: [0.5, 4, 10]
  - id: gorsemoor
    max_depth_m: 20
alerts:
  receivers:
    - name: ops
      type: log
    - name: hatchery
      url: https://hooks.example/h
      secret: {file: SECRET}
detect:
  hold_time: 6h
log:
  level: info
`

func parseDiff(t *testing.T, y, secretPath string) *Config {
	t.Helper()
	cfg, err := Parse([]byte(strings.ReplaceAll(y, "SECRET", secretPath)), Options{Getenv: noenv})
	if err != nil {
		t.Fatalf("parse: %v\n%s", err, y)
	}
	return cfg
}

func TestDiff(t *testing.T) {
	dir := t.TempDir()
	secret := filepath.Join(dir, "hook.secret")
	if err := os.WriteFile(secret, []byte("whsec_b2xkLXNlY3JldA==\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	old := parseDiff(t, diffBase, secret)
	cases := []struct {
		name       string
		from, to   string // text replaced in diffBase
		reloadable bool
		paths      []string
	}{
		{"nothing", "", "", true, nil},
		{"hold time", "hold_time: 6h", "hold_time: 12h", true, []string{"detect.hold_time"}},
		{"threshold added", "  hold_time: 6h\n", "  hold_time: 6h\n  strat_density_diff: 0.2\n", true, []string{"detect.strat_density_diff"}},
		{"gap and stratified time", "  hold_time: 6h\n", "  hold_time: 6h\n  max_gap: 3d\n  min_stratified: 10d\n", true,
			[]string{"detect.max_gap", "detect.min_stratified"}},
		{"log level", "level: info", "level: debug", true, []string{"log.level"}},
		{"log format", "level: info", "level: info\n  format: json", false, []string{"log.format"}},
		{"receiver added", "    - name: ops\n", "    - name: pager\n      type: log\n    - name: ops\n", true, []string{"alerts.receivers[pager]"}},
		{"receiver removed", "    - name: ops\n      type: log\n", "", true, []string{"alerts.receivers[ops]"}},
		{"receiver url", "https://hooks.example/h", "https://hooks.example/h2", true, []string{"alerts.receivers[hatchery].url"}},
		{"status url", "alerts:\n", "alerts:\n  status_url: https://lake.example/\n", true, []string{"alerts.status_url"}},
		{"broker", "tcp://127.0.0.1:1883", "tcp://127.0.0.1:1884", false, []string{"mqtt.broker"}},
		{"client id", "holomix-a", "holomix-b", false, []string{"mqtt.client_id"}},
		{"subscription", "buoys/+/chain\n", "buoys/#\n", false, []string{"mqtt.subscriptions"}},
		{"storage dir", "/var/lib/holomix", "/srv/holomix", false, []string{"storage.dir"}},
		{"site added", "sites:\n", "sites:\n  - id: aldwick\n    max_depth_m: 5\n", false, []string{"sites[aldwick]"}},
		{"site removed", "  - id: gorsemoor\n    max_depth_m: 20\n", "", false, []string{"sites[gorsemoor]"}},
		{"sensor depths", "[0.5, 4, 10]", "[0.5, 4, 8, 10]", false, []string{"sites[fenwater].sensor_depths_m"}},
		{"profile interval", "hold_time: 6h", "hold_time: 6h\n  profile_interval: 5m", false, []string{"detect.profile_interval"}},
		{"live and restart mixed", "level: info", "level: debug\nhttp:\n  listen: 127.0.0.1:9999", false, []string{"http.listen", "log.level"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			y := diffBase
			if c.from != "" {
				if !strings.Contains(y, c.from) {
					t.Fatalf("case text %q not in base", c.from)
				}
				y = strings.Replace(y, c.from, c.to, 1)
			}
			nw := parseDiff(t, y, secret)
			ok, reasons := Diff(old, nw)
			if ok != c.reloadable {
				t.Errorf("reloadable = %t, want %t (reasons %q)", ok, c.reloadable, reasons)
			}
			var got []string
			for _, ch := range Changes(old, nw) {
				got = append(got, ch.Path)
			}
			if !reflect.DeepEqual(sortedCopy(got), sortedCopy(c.paths)) {
				t.Errorf("changes %q, want %q", got, c.paths)
			}
			if len(reasons) != len(c.paths) {
				t.Errorf("reasons %q, want one per change", reasons)
			}
			for _, r := range reasons {
				if !strings.Contains(r, "(applied live)") && !strings.Contains(r, "(needs a restart)") {
					t.Errorf("reason %q does not say how it is applied", r)
				}
			}
		})
	}
}

// TestDiffSecretRotation: a rotated secret file is a change, and the reason
// names the setting without revealing either value. A rotated webhook secret is
// applied live; a rotated broker password needs a new connection.
func TestDiffSecretRotation(t *testing.T) {
	dir := t.TempDir()
	hook := filepath.Join(dir, "hook.secret")
	pw := filepath.Join(dir, "mqtt.password")
	write := func(path, v string) {
		if err := os.WriteFile(path, []byte(v), 0o600); err != nil {
			t.Fatal(err)
		}
	}
	y := strings.Replace(diffBase, "  client_id: holomix-a\n", "  client_id: holomix-a\n  username: buoyreader\n  password: {file: "+pw+"}\n", 1)
	write(hook, "whsec_b2xkLXNlY3JldA==")
	write(pw, "old-broker-pass")
	old := parseDiff(t, y, hook)

	write(hook, "whsec_bmV3LXNlY3JldA==")
	nw := parseDiff(t, y, hook)
	ok, reasons := Diff(old, nw)
	if !ok || len(reasons) != 1 || reasons[0] != "alerts.receivers[hatchery].secret changed (applied live)" {
		t.Fatalf("webhook secret rotation: reloadable=%t reasons=%q", ok, reasons)
	}

	write(pw, "new-broker-pass")
	nw2 := parseDiff(t, y, hook)
	ok, reasons = Diff(nw, nw2)
	if ok || len(reasons) != 1 || reasons[0] != "mqtt.password changed (needs a restart)" {
		t.Fatalf("broker password rotation: reloadable=%t reasons=%q", ok, reasons)
	}
	all := strings.Join(reasons, "\n")
	for _, secret := range []string{"old-broker-pass", "new-broker-pass", "b2xkLXNlY3JldA", "bmV3LXNlY3JldA"} {
		if strings.Contains(all, secret) {
			t.Fatalf("reasons reveal a secret: %q", reasons)
		}
	}
}

func sortedCopy(s []string) []string {
	c := append([]string(nil), s...)
	for i := range c {
		for j := i + 1; j < len(c); j++ {
			if c[j] < c[i] {
				c[i], c[j] = c[j], c[i]
			}
		}
	}
	return c
}
