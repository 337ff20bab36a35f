package main

import (
	"bufio"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"holomix/internal/testenv"
)

// TestRunConnectsSubscribesAndStopsOnSIGTERM: `holomix run -c FILE` against a
// real Mosquitto logs structured "connected" and "subscribed" lines (JSON,
// one object per line), reloads its file on SIGHUP, and exits 0 within 2 s of
// SIGTERM when idle.
func TestRunConnectsSubscribesAndStopsOnSIGTERM(t *testing.T) {
	bin := filepath.Join(t.TempDir(), "holomix")
	if out, err := exec.Command("go", "build", "-o", bin, ".").CombinedOutput(); err != nil {
		t.Fatalf("go build: %v\n%s", err, out)
	}
	mq := testenv.StartMosquitto(t, testenv.MosquittoOptions{Extra: testenv.MosquittoUserLine()})
	dir := t.TempDir()
	listen := fmt.Sprintf("127.0.0.1:%d", testenv.FreePort(t))
	cfg := fmt.Sprintf(`mqtt:
  broker: %s
  client_id: holomix-run-test
  subscriptions:
    - topic: buoys/+/temp/+
      format: value
      template: buoys/{site}/temp/{depth}
    - topic: lakes/+/profile
      format: json-profile
storage:
  dir: %s
http:
  listen: %s
log:
  format: json
`, mq.URL, filepath.Join(dir, "data"), listen)
	path := filepath.Join(dir, "holomix.yaml")
	if err := os.WriteFile(path, []byte(cfg), 0o600); err != nil {
		t.Fatal(err)
	}
	cmd := exec.Command(bin, "run", "-c", path)
	stderr, err := cmd.StderrPipe()
	if err != nil {
		t.Fatal(err)
	}
	cmd.Stdout = os.Stderr
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = cmd.Process.Kill() })
	lines := make(chan map[string]any, 100)
	scanDone := make(chan error, 1)
	var raw strings.Builder // the whole log; read only after scanDone
	go func() {
		sc := bufio.NewScanner(stderr)
		for sc.Scan() {
			raw.Write(sc.Bytes())
			raw.WriteByte('\n')
			var m map[string]any
			if err := json.Unmarshal(sc.Bytes(), &m); err != nil {
				scanDone <- fmt.Errorf("log line is not JSON: %q", sc.Text())
				return
			}
			lines <- m
		}
		close(lines)
		scanDone <- nil
	}()
	var all []map[string]any
	want := map[string]bool{"connected": false, "subscribed buoys/+/temp/+": false, "subscribed lakes/+/profile": false}
	timeout := time.After(20 * time.Second)
	for !(want["connected"] && want["subscribed buoys/+/temp/+"] && want["subscribed lakes/+/profile"]) {
		select {
		case m, ok := <-lines:
			if !ok {
				t.Fatalf("daemon exited before subscribing: %v", all)
			}
			all = append(all, m)
			switch m["msg"] {
			case "connected":
				if m["client_id"] != "holomix-run-test" || m["level"] != "INFO" || m["broker"] != mq.URL {
					t.Fatalf("connected line: %v", m)
				}
				want["connected"] = true
			case "subscribed":
				want[fmt.Sprintf("subscribed %v", m["topic"])] = true
			}
		case <-timeout:
			t.Fatalf("no connected/subscribed lines within 20 s: %v", all)
		}
	}
	// SIGHUP reloads the file instead of ending the process.
	if err := os.WriteFile(path, []byte(strings.Replace(cfg, "log:\n  format: json\n", "log:\n  format: json\n  level: debug\ndetect:\n  hold_time: 3h\n", 1)), 0o600); err != nil {
		t.Fatal(err)
	}
	if err := cmd.Process.Signal(syscall.SIGHUP); err != nil {
		t.Fatal(err)
	}
	for reloaded := false; !reloaded; {
		select {
		case m, ok := <-lines:
			if !ok {
				t.Fatalf("daemon exited on SIGHUP: %v", all)
			}
			all = append(all, m)
			if m["msg"] == "configuration reloaded" {
				if fmt.Sprint(m["applied"]) != "[log.level detect]" {
					t.Fatalf("reload line: %v", m)
				}
				reloaded = true
			}
		case <-time.After(10 * time.Second):
			t.Fatalf("no reload line within 10 s of SIGHUP: %v", all)
		}
	}
	resp, err := http.Get("http://" + listen + "/healthz")
	if err != nil || resp.StatusCode != http.StatusOK {
		t.Fatalf("/healthz: %v %v", resp, err)
	}
	resp.Body.Close()
	time.Sleep(300 * time.Millisecond) // idle
	start := time.Now()
	if err := cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatal(err)
	}
	// The log ends when the process exits (its stderr closes).
	deadline := time.After(10 * time.Second)
	for open := true; open; {
		select {
		case m, ok := <-lines:
			if ok {
				all = append(all, m)
			}
			open = ok
		case <-deadline:
			t.Fatal("still running 10 s after SIGTERM")
		}
	}
	err = cmd.Wait()
	took := time.Since(start)
	var ee *exec.ExitError
	if errors.As(err, &ee) {
		t.Fatalf("exit code %d after SIGTERM", ee.ExitCode())
	} else if err != nil {
		t.Fatal(err)
	}
	if err := <-scanDone; err != nil {
		t.Fatal(err)
	}
	// An idle daemon drains at once: its own account of the stop (slog writes
	// the duration in nanoseconds) must be short; the outside view adds
	// process teardown and this test's scheduling.
	own, logged := testenv.StoppedTook(raw.String())
	if !logged {
		t.Fatalf("no stopped line: %v", all)
	}
	if own > 2*time.Second || took > 5*time.Second {
		t.Fatalf("idle stop drained in %v (want at most 2 s), exit %v after SIGTERM", own, took)
	}
	t.Logf("drained in %v, exited 0 %v after SIGTERM", own, took.Round(time.Millisecond))
}
