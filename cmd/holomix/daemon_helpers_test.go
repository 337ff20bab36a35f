package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"

	"holomix/config"
)

// buildHolomix builds this command into a temporary directory (the daemon
// tests run the real binary, signals and all).
func buildHolomix(t *testing.T) string {
	t.Helper()
	bin := filepath.Join(t.TempDir(), "holomix")
	cmd := exec.Command("go", "build", "-o", bin, ".")
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("go build ./cmd/holomix: %v\n%s", err, out)
	}
	return bin
}

// syncBuffer is a bytes.Buffer safe for a child's output and the test.
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

// daemon is a running `holomix run` child process.
type daemon struct {
	t    *testing.T
	name string
	bin  string
	args []string
	env  []string
	out  *syncBuffer // stdout and stderr: the daemon's log

	mu   sync.Mutex
	cmd  *exec.Cmd
	done chan struct{}
	err  error
}

func newDaemon(t *testing.T, name, bin string, env []string, args ...string) *daemon {
	d := &daemon{t: t, name: name, bin: bin, args: args, env: env, out: &syncBuffer{}}
	t.Cleanup(func() {
		if d.running() {
			d.kill()
		}
	})
	return d
}

func (d *daemon) start() {
	d.t.Helper()
	cmd := exec.Command(d.bin, d.args...)
	cmd.Env = append(os.Environ(), d.env...)
	cmd.Stdout, cmd.Stderr = d.out, d.out
	cmd.SysProcAttr = &syscall.SysProcAttr{Setpgid: true}
	if err := cmd.Start(); err != nil {
		d.t.Fatalf("%s: start: %v", d.name, err)
	}
	done := make(chan struct{})
	d.mu.Lock()
	d.cmd, d.done, d.err = cmd, done, nil
	d.mu.Unlock()
	go func() {
		err := cmd.Wait()
		d.mu.Lock()
		d.err = err
		d.mu.Unlock()
		close(done)
	}()
}

func (d *daemon) running() bool {
	d.mu.Lock()
	done := d.done
	d.mu.Unlock()
	if done == nil {
		return false
	}
	select {
	case <-done:
		return false
	default:
		return true
	}
}

func (d *daemon) signal(sig syscall.Signal) {
	d.mu.Lock()
	cmd := d.cmd
	d.mu.Unlock()
	if cmd != nil && cmd.Process != nil {
		_ = cmd.Process.Signal(sig)
	}
}

// stop sends SIGTERM and waits for the exit; it returns the exit code.
func (d *daemon) stop(timeout time.Duration) int {
	d.t.Helper()
	d.signal(syscall.SIGTERM)
	d.mu.Lock()
	done := d.done
	d.mu.Unlock()
	select {
	case <-done:
	case <-time.After(timeout):
		d.kill()
		d.t.Fatalf("%s did not stop within %s of SIGTERM\n%s", d.name, timeout, d.tail())
	}
	d.mu.Lock()
	defer d.mu.Unlock()
	var ee *exec.ExitError
	if errors.As(d.err, &ee) {
		return ee.ExitCode()
	}
	if d.err != nil {
		return -1
	}
	return 0
}

func (d *daemon) kill() {
	d.signal(syscall.SIGKILL)
	d.mu.Lock()
	done := d.done
	d.mu.Unlock()
	if done != nil {
		<-done
	}
}

func (d *daemon) tail() string {
	s := d.out.String()
	if len(s) > 6000 {
		s = "…" + s[len(s)-6000:]
	}
	return s
}

// httpGet fetches url with the given Authorization header value ("" for none).
func httpGet(url, authz string) (int, string, http.Header, error) {
	req, err := http.NewRequest(http.MethodGet, url, nil)
	if err != nil {
		return 0, "", nil, err
	}
	if authz != "" {
		req.Header.Set("Authorization", authz)
	}
	c := &http.Client{Timeout: 5 * time.Second}
	resp, err := c.Do(req)
	if err != nil {
		return 0, "", nil, err
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b), resp.Header, err
}

// waitHTTP polls url until it answers 200 or the daemon exits.
func (d *daemon) waitHTTP(url, authz string, timeout time.Duration) {
	d.t.Helper()
	deadline := time.Now().Add(timeout)
	var last string
	for time.Now().Before(deadline) {
		if !d.running() {
			d.t.Fatalf("%s exited before %s answered\n%s", d.name, url, d.tail())
		}
		code, body, _, err := httpGet(url, authz)
		if err == nil && code == http.StatusOK {
			return
		}
		last = fmt.Sprintf("%d %v %.200s", code, err, body)
		time.Sleep(100 * time.Millisecond)
	}
	d.t.Fatalf("%s: %s not 200 within %s (last: %s)\n%s", d.name, url, timeout, last, d.tail())
}

// webhookCollector is a loopback webhook receiver that answers 200 and keeps
// every delivery.
type webhookCollector struct {
	mu         sync.Mutex
	deliveries []webhookDelivery
}

type webhookDelivery struct {
	ID      string // webhook-id header
	Header  http.Header
	Body    string
	Payload struct {
		ID        string              `json:"id"`
		Site      struct{ ID string } `json:"site"`
		Kind      string              `json:"kind"`
		Subject   string              `json:"subject"`
		Status    string              `json:"status"`
		EventTime time.Time           `json:"event_time"`
	}
}

func (c *webhookCollector) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	b, _ := io.ReadAll(r.Body)
	d := webhookDelivery{ID: r.Header.Get("webhook-id"), Header: r.Header.Clone(), Body: string(b)}
	_ = json.Unmarshal(b, &d.Payload)
	c.mu.Lock()
	c.deliveries = append(c.deliveries, d)
	c.mu.Unlock()
	w.WriteHeader(http.StatusOK)
}

func (c *webhookCollector) all() []webhookDelivery {
	c.mu.Lock()
	defer c.mu.Unlock()
	return append([]webhookDelivery(nil), c.deliveries...)
}

// publisher is a QoS 1 MQTT client for test data.
func publisher(t *testing.T, broker, id string) mqtt.Client {
	t.Helper()
	c := mqtt.NewClient(mqtt.NewClientOptions().AddBroker(broker).SetClientID(id).SetConnectTimeout(5 * time.Second))
	if tok := c.Connect(); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		t.Fatalf("publisher connect: %v", tok.Error())
	}
	t.Cleanup(func() { c.Disconnect(200) })
	return c
}

func publish(t *testing.T, c mqtt.Client, topic, payload string) {
	t.Helper()
	tok := c.Publish(topic, 1, false, payload)
	if !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		t.Fatalf("publish %s: %v", topic, tok.Error())
	}
}

// chainReading is the JSON of one reading as a buoy publishes it.
func chainReading(ts time.Time, depth, temp float64) string {
	return fmt.Sprintf(`{"time":%q,"depth_m":%g,"temp_c":%.3f}`, ts.UTC().Format(time.RFC3339), depth, temp)
}

// influxCount runs an InfluxQL COUNT grouped by site and returns count per site.
func influxCount(ctx context.Context, ql func(context.Context, string, string) ([]byte, error), token, q string) (map[string]int64, error) {
	b, err := ql(ctx, token, q)
	if err != nil {
		return nil, err
	}
	var res struct {
		Results []struct {
			Series []struct {
				Tags   map[string]string `json:"tags"`
				Values [][]any           `json:"values"`
			} `json:"series"`
		} `json:"results"`
	}
	if err := json.Unmarshal(b, &res); err != nil {
		return nil, fmt.Errorf("influxql answer: %w: %s", err, b)
	}
	out := map[string]int64{}
	for _, r := range res.Results {
		for _, s := range r.Series {
			for _, v := range s.Values {
				if len(v) >= 2 {
					if n, ok := v[1].(float64); ok {
						out[s.Tags["site"]] += int64(n)
					}
				}
			}
		}
	}
	return out, nil
}

func containsAny(text string, secrets map[string]string) []string {
	var found []string
	for name, s := range secrets {
		if strings.Contains(text, s) {
			found = append(found, name)
		}
	}
	return found
}

// loadTLS is a config.TLS with the given files.
func loadTLS(ca, cert, key string) config.TLS {
	return config.TLS{CAFile: ca, CertFile: cert, KeyFile: key}
}
