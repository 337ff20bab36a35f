package main

import (
	"bytes"
	"context"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

func runCheck(t *testing.T, vars map[string]string, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	var out, errb bytes.Buffer
	e := &env{stdin: strings.NewReader(""), stdout: &out, stderr: &errb, getenv: func(k string) string { return vars[k] }}
	code = runCheckConfig(context.Background(), e, args)
	return code, out.String(), errb.String()
}

func writeFile(t *testing.T, dir, name, body string, mode os.FileMode) string {
	t.Helper()
	p := filepath.Join(dir, name)
	if err := os.WriteFile(p, []byte(body), mode); err != nil {
		t.Fatal(err)
	}
	return p
}

// Secret values used by the tests below; none may ever appear in output.
var testSecrets = map[string]string{
	"mqtt":    "mqtt-pw-Q9v!larch",
	"influx":  "holomix:influx-pw-7Rk2",
	"basic":   "basic-pw-hatchery-55",
	"bearer":  "bearer-tok-0c1d2e3f4a5b",
	"webhook": "whsec_c2VjcmV0LWZvci1ob29rLXRlc3Q=",
	"pager":   "whsec_cGFnZXItc2VjcmV0LWVudg==",
}

// secretConfig writes a configuration whose every secret kind is set, from
// files (mqtt password, basic password, webhook secret) and from the environment
// (influx token, bearer token, a second webhook secret).
func secretConfig(t *testing.T, dir string) (path string, vars map[string]string) {
	t.Helper()
	mqttPw := writeFile(t, dir, "mqtt.password", testSecrets["mqtt"]+"\n", 0o600)
	basic := writeFile(t, dir, "basic.password", testSecrets["basic"]+"\n", 0o600)
	hook := writeFile(t, dir, "hook.secret", testSecrets["webhook"]+"\n", 0o644) // loose: a warning names the file
	y := fmt.Sprintf(`mqtt:
  broker: tcp://127.0.0.1:1883
  client_id: holomix-secrets
  username: buoyreader
  password: {file: %s}
  subscriptions:
    - topic: buoys/+/chain
      template: buoys/{site}/chain
influx:
  url: http://127.0.0.1:8086
  token: {env: HOLOMIX_TEST_INFLUX_TOKEN}
storage:
  dir: %s
sites:
  - id: larchmere
    max_depth_m: 32
alerts:
  receivers:
    - name: hatchery
      url: https://hooks.example/h
      secret: {file: %s}
    - name: pager
      url: https://pager.example/h
      secret: {env: HOLOMIX_TEST_PAGER_SECRET}
http:
  listen: 0.0.0.0:8750
  allow_public: true
  basic_user: hatchery
  basic_password: {file: %s}
  bearer_token: {env: HOLOMIX_TEST_BEARER}
`, mqttPw, filepath.Join(dir, "state"), hook, basic)
	vars = map[string]string{
		"HOLOMIX_TEST_INFLUX_TOKEN": testSecrets["influx"],
		"HOLOMIX_TEST_BEARER":       testSecrets["bearer"],
		"HOLOMIX_TEST_PAGER_SECRET": testSecrets["pager"],
	}
	return writeFile(t, dir, "holomix.yaml", y, 0o600), vars
}

func assertNoSecrets(t *testing.T, where, text string) {
	t.Helper()
	for name, s := range testSecrets {
		if strings.Contains(text, s) {
			t.Errorf("%s reveals the %s secret:\n%s", where, name, text)
		}
		// A secret's distinctive middle must not leak either (e.g. without its prefix).
		if mid := s[len(s)/4 : len(s)*3/4]; strings.Contains(text, mid) {
			t.Errorf("%s reveals part of the %s secret (%q):\n%s", where, name, mid, text)
		}
	}
}

// TestCheckConfigNeverPrintsSecrets: with every secret set from files and from
// the environment, check-config prints a summary that says where each secret
// comes from and that it is set, but never its value; the same holds for the
// problem listing of a broken file.
func TestCheckConfigNeverPrintsSecrets(t *testing.T) {
	dir := t.TempDir()
	path, vars := secretConfig(t, dir)
	code, out, errs := runCheck(t, vars, path)
	if code != 0 {
		t.Fatalf("exit %d\nstdout:\n%s\nstderr:\n%s", code, out, errs)
	}
	for _, want := range []string{"ok", "password=file " + filepath.Join(dir, "mqtt.password") + " (set, ****)",
		"token=env HOLOMIX_TEST_INFLUX_TOKEN (set, ****)", "secret=env HOLOMIX_TEST_PAGER_SECRET (set, ****)"} {
		if !strings.Contains(out, want) {
			t.Errorf("summary lacks %q:\n%s", want, out)
		}
	}
	if !strings.Contains(errs, "hook.secret is readable by others") {
		t.Errorf("no permission warning for the loose secret file:\n%s", errs)
	}
	assertNoSecrets(t, "check-config stdout", out)
	assertNoSecrets(t, "check-config stderr", errs)

	// A broken file: problems are listed, secrets still not shown.
	b, _ := os.ReadFile(path)
	broken := strings.Replace(string(b), "max_depth_m: 32", "max_depth_m: -1", 1)
	bad := writeFile(t, dir, "broken.yaml", broken, 0o600)
	code, out, errs = runCheck(t, vars, bad)
	if code != 2 || !strings.Contains(errs, "max_depth_m must be greater than 0") {
		t.Fatalf("broken file: exit %d\n%s", code, errs)
	}
	assertNoSecrets(t, "check-config problem listing", out+errs)
}

// TestCheckConfigExample keeps the original behaviour: the shipped example is valid.
func TestCheckConfigExample(t *testing.T) {
	code, out, errs := runCheck(t, nil, filepath.Join("..", "..", "deploy", "holomix.example.yaml"))
	if code != 0 || !strings.Contains(out, "holomix.example.yaml: ok") || !strings.Contains(out, "larchmere") {
		t.Fatalf("exit %d\n%s\n%s", code, out, errs)
	}
	if code, _, _ := runCheck(t, nil); code != 2 {
		t.Fatalf("no file: exit %d, want 2", code)
	}
	if code, _, _ := runCheck(t, nil, "-h"); code != 0 {
		t.Fatalf("-h: exit %d, want 0", code)
	}
}

func partitionFile(t *testing.T, dir, name, clientID, storage string, topics []string, sites ...string) string {
	t.Helper()
	var b strings.Builder
	fmt.Fprintf(&b, "mqtt:\n  broker: tcp://broker.lake.example:1883\n  client_id: %s\n  password: {file: /etc/holomix/not-read-in-partition-mode}\n  username: u\n  subscriptions:\n", clientID)
	for _, tp := range topics {
		fmt.Fprintf(&b, "    - topic: %s\n      template: buoys/{site}/chain\n", tp)
	}
	fmt.Fprintf(&b, "influx:\n  url: http://127.0.0.1:8086\n  token: {env: HOLOMIX_UNSET_IN_PARTITION_MODE}\nstorage:\n  dir: %s\nsites:\n", storage)
	for _, s := range sites {
		fmt.Fprintf(&b, "  - id: %s\n    max_depth_m: 10\n", s)
	}
	return writeFile(t, dir, name, b.String(), 0o600)
}

func TestCheckConfigPartition(t *testing.T) {
	dir := t.TempDir()
	a := partitionFile(t, dir, "a.yaml", "holomix-a", "/var/lib/holomix", []string{"buoys/larchmere/chain", "buoys/fenwater/chain"}, "larchmere", "fenwater")
	b := partitionFile(t, dir, "b.yaml", "holomix-b", "/var/lib/holomix", []string{"buoys/gorsemoor/chain", "buoys/aldwick/chain"}, "gorsemoor", "aldwick")
	code, out, errs := runCheck(t, nil, "--partition", a, b)
	if code != 0 {
		t.Fatalf("clean partition: exit %d\n%s\n%s", code, out, errs)
	}
	// Same storage dir on (possibly) one machine is the only warning here.
	if !strings.Contains(out, "partition: 2 instances, 4 sites, 4 subscriptions: 1 warning(s)") || !strings.Contains(errs, "storage.dir /var/lib/holomix is used by both") {
		t.Fatalf("partition summary:\n%s\n%s", out, errs)
	}

	c := partitionFile(t, dir, "c.yaml", "holomix-a", "/var/lib/holomix-c", []string{"buoys/+/chain"}, "fenwater", "brackley")
	code, out, errs = runCheck(t, nil, "--partition", a, c)
	if code != 0 {
		t.Fatalf("clashing partition: exit %d, want 0 with warnings\n%s\n%s", code, out, errs)
	}
	for _, want := range []string{
		`site "fenwater" is configured in both`,
		`topic filter "buoys/larchmere/chain" (` + a + ` mqtt.subscriptions[0]) overlaps "buoys/+/chain"`,
		`topic filter "buoys/fenwater/chain" (` + a + ` mqtt.subscriptions[1]) overlaps "buoys/+/chain"`,
		`mqtt.client_id "holomix-a" is used by both`,
	} {
		if !strings.Contains(errs, want) {
			t.Errorf("missing warning %q in:\n%s", want, errs)
		}
	}
	if !strings.Contains(out, ": 4 warning(s)") {
		t.Errorf("summary:\n%s", out)
	}

	broken := writeFile(t, dir, "broken.yaml", "mqtt:\n  subscriptions:\n    - topic: a/#/b\n", 0o600)
	code, _, errs = runCheck(t, nil, "--partition", a, broken)
	if code != 2 || !strings.Contains(errs, "line 3") || !strings.Contains(errs, "invalid topic filter") {
		t.Fatalf("load error: exit %d, want 2 with the line\n%s", code, errs)
	}
	if code, _, _ := runCheck(t, nil, "--partition", a); code != 2 {
		t.Fatalf("one file: exit %d, want 2", code)
	}
}
