package rig

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"time"

	"holomix/internal/testenv"
)

// BuildHolomix builds cmd/holomix into dir and returns the binary's path
// (HOLOMIX_BIN names a binary to use instead).
func BuildHolomix(ctx context.Context, dir string) (string, error) {
	if p := os.Getenv("HOLOMIX_BIN"); p != "" {
		return p, nil
	}
	root, err := testenv.RepoRoot()
	if err != nil {
		return "", err
	}
	bin := filepath.Join(dir, "holomix")
	cmd := exec.CommandContext(ctx, "go", "build", "-o", bin, "./cmd/holomix")
	cmd.Dir = root
	if out, err := cmd.CombinedOutput(); err != nil {
		return "", fmt.Errorf("go build ./cmd/holomix: %w\n%s", err, out)
	}
	return bin, nil
}

// Log collects a child's output in memory and, when File is set, on disk.
type Log struct {
	mu   sync.Mutex
	b    strings.Builder
	file *os.File
}

// NewLog returns a Log that also appends to path ("" : memory only).
func NewLog(path string) (*Log, error) {
	l := &Log{}
	if path != "" {
		f, err := os.OpenFile(path, os.O_CREATE|os.O_WRONLY|os.O_APPEND, 0o644)
		if err != nil {
			return nil, fmt.Errorf("daemon log: %w", err)
		}
		l.file = f
	}
	return l, nil
}

func (l *Log) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.file != nil {
		_, _ = l.file.Write(p)
	}
	return l.b.Write(p)
}

// String returns everything written so far.
func (l *Log) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

// Count returns how many times s occurs in the log.
func (l *Log) Count(s string) int { return strings.Count(l.String(), s) }

// Tail returns the last n bytes.
func (l *Log) Tail(n int) string {
	s := l.String()
	if len(s) > n {
		s = "…" + s[len(s)-n:]
	}
	return s
}

// Close closes the log file.
func (l *Log) Close() {
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.file != nil {
		l.file.Close()
		l.file = nil
	}
}

// Daemon is `holomix run` as a child process.
type Daemon struct {
	Bin      string
	Config   string // path of the configuration file
	HTTPAddr string // http.listen of the configuration
	Env      []string
	Log      *Log

	cmd     *exec.Cmd
	done    chan error
	Started time.Time // when the last Start executed the binary
}

// Start runs the daemon and waits (up to 30 s) until it has subscribed.
func (d *Daemon) Start() error {
	if d.cmd != nil {
		return errors.New("daemon already running")
	}
	mark := d.Log.Count(`"msg":"subscribed"`)
	if err := d.Spawn(); err != nil {
		return err
	}
	deadline := time.Now().Add(30 * time.Second)
	for d.Log.Count(`"msg":"subscribed"`) == mark {
		select {
		case err := <-d.done:
			d.cmd = nil
			return fmt.Errorf("daemon exited at start: %v\n%s", err, d.Log.Tail(3000))
		default:
		}
		if time.Now().After(deadline) {
			return fmt.Errorf("daemon did not subscribe within 30 s\n%s", d.Log.Tail(3000))
		}
		time.Sleep(10 * time.Millisecond)
	}
	return nil
}

// Spawn executes the daemon without waiting for anything.
func (d *Daemon) Spawn() error {
	cmd := exec.Command(d.Bin, "run", "-c", d.Config)
	cmd.Env = append(os.Environ(), d.Env...)
	cmd.Stdout, cmd.Stderr = d.Log, d.Log
	cmd.SysProcAttr = &syscall.SysProcAttr{Setpgid: true}
	d.Started = time.Now()
	if err := cmd.Start(); err != nil {
		return fmt.Errorf("start daemon: %w", err)
	}
	done := make(chan error, 1)
	go func() { done <- cmd.Wait() }()
	d.cmd, d.done = cmd, done
	return nil
}

// Running reports whether the daemon process is running.
func (d *Daemon) Running() bool { return d.cmd != nil }

// PID returns the daemon's process id (0 when not running).
func (d *Daemon) PID() int {
	if d.cmd == nil {
		return 0
	}
	return d.cmd.Process.Pid
}

// Kill ends the daemon with SIGKILL (a crash) and waits for it.
func (d *Daemon) Kill() {
	if d.cmd == nil {
		return
	}
	_ = syscall.Kill(-d.cmd.Process.Pid, syscall.SIGKILL)
	<-d.done
	d.cmd = nil
}

// Term sends SIGTERM and waits up to limit; it returns the exit code and
// how long the exit took. After limit the daemon is killed and an error
// returned.
func (d *Daemon) Term(limit time.Duration) (int, time.Duration, error) {
	if d.cmd == nil {
		return 0, 0, errors.New("daemon not running")
	}
	start := time.Now()
	_ = d.cmd.Process.Signal(syscall.SIGTERM)
	select {
	case err := <-d.done:
		d.cmd = nil
		took := time.Since(start)
		var ee *exec.ExitError
		if errors.As(err, &ee) {
			return ee.ExitCode(), took, nil
		}
		if err != nil {
			return -1, took, err
		}
		return 0, took, nil
	case <-time.After(limit):
		d.Kill()
		return -1, time.Since(start), fmt.Errorf("daemon still running %v after SIGTERM (killed)", limit)
	}
}

// Metrics scrapes /metrics (name with labels → value).
func (d *Daemon) Metrics() (map[string]float64, error) {
	return ScrapeMetrics("http://" + d.HTTPAddr + "/metrics")
}

// Metric returns one metric (0 when it cannot be read).
func (d *Daemon) Metric(name string) float64 {
	m, err := d.Metrics()
	if err != nil {
		return 0
	}
	return m[name]
}

// Readyz returns /readyz's status code and body.
func (d *Daemon) Readyz() (int, map[string]any, error) {
	resp, err := http.Get("http://" + d.HTTPAddr + "/readyz")
	if err != nil {
		return 0, nil, err
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	var body map[string]any
	_ = json.Unmarshal(b, &body)
	return resp.StatusCode, body, nil
}

// ScrapeMetrics reads a Prometheus text exposition.
func ScrapeMetrics(url string) (map[string]float64, error) {
	client := &http.Client{Timeout: 10 * time.Second}
	resp, err := client.Get(url)
	if err != nil {
		return nil, err
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		return nil, fmt.Errorf("GET %s: %s", url, resp.Status)
	}
	out := map[string]float64{}
	sc := bufio.NewScanner(resp.Body)
	sc.Buffer(make([]byte, 1<<20), 1<<20)
	for sc.Scan() {
		line := sc.Text()
		if line == "" || line[0] == '#' {
			continue
		}
		i := strings.LastIndexByte(line, ' ')
		if i < 0 {
			continue
		}
		if v, err := strconv.ParseFloat(line[i+1:], 64); err == nil {
			out[line[:i]] = v
		}
	}
	return out, sc.Err()
}

// Mem is a process's memory from /proc/PID/status, in MiB.
type Mem struct {
	RSS, HWM        float64 // VmRSS, VmHWM (peak)
	Anon, File, Shm float64 // RssAnon, RssFile (mapped files, e.g. bbolt), RssShmem
}

// ProcMem reads /proc/PID/status.
func ProcMem(pid int) (Mem, error) {
	var m Mem
	b, err := os.ReadFile(fmt.Sprintf("/proc/%d/status", pid))
	if err != nil {
		return m, err
	}
	for _, l := range strings.Split(string(b), "\n") {
		f := strings.Fields(l)
		if len(f) < 2 {
			continue
		}
		v, _ := strconv.ParseFloat(f[1], 64)
		v /= 1024
		switch f[0] {
		case "VmRSS:":
			m.RSS = v
		case "VmHWM:":
			m.HWM = v
		case "RssAnon:":
			m.Anon = v
		case "RssFile:":
			m.File = v
		case "RssShmem:":
			m.Shm = v
		}
	}
	return m, nil
}

// ProcMemory returns a process's resident set size and its peak (VmRSS,
// VmHWM from /proc/PID/status) in MiB.
func ProcMemory(pid int) (rss, hwm float64, err error) {
	m, err := ProcMem(pid)
	return m.RSS, m.HWM, err
}
