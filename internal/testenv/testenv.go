// Package testenv starts real services for tests: a Mosquitto broker and an
// InfluxDB 1.8 server, each on a free loopback port with its configuration and
// data in the test's temporary directory, stopped and removed on cleanup.
//
// A missing binary fails the test with the command that installs it; the
// helper never skips. deploy/test.sh installs both before running the tests.
package testenv

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"net"
	"net/http"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"
)

// FreePort returns a TCP port on 127.0.0.1 that was free a moment ago.
func FreePort(t testing.TB) int {
	t.Helper()
	p, err := freePort()
	if err != nil {
		t.Fatalf("testenv: %v", err)
	}
	return p
}

func freePort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, fmt.Errorf("find a free port: %w", err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}

// RepoRoot walks up from the working directory to the directory holding go.mod.
func RepoRoot() (string, error) {
	dir, err := os.Getwd()
	if err != nil {
		return "", err
	}
	for {
		if _, err := os.Stat(filepath.Join(dir, "go.mod")); err == nil {
			return dir, nil
		}
		parent := filepath.Dir(dir)
		if parent == dir {
			return "", errors.New("testenv: go.mod not found above the working directory")
		}
		dir = parent
	}
}

// process is a server child process with its log captured to a file.
type process struct {
	name string
	bin  string
	args []string
	log  string

	mu   sync.Mutex
	cmd  *exec.Cmd
	done chan struct{}
}

func (p *process) start() error {
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.cmd != nil {
		select {
		case <-p.done: // exited on its own: start it again
		default:
			// A second process would fail to bind and leave the first one
			// running with nobody to stop it.
			return fmt.Errorf("%s is already running (pid %d)", p.name, p.cmd.Process.Pid)
		}
	}
	f, err := os.OpenFile(p.log, os.O_CREATE|os.O_WRONLY|os.O_APPEND, 0o644)
	if err != nil {
		return fmt.Errorf("open %s log: %w", p.name, err)
	}
	cmd := exec.Command(p.bin, p.args...)
	cmd.Stdout, cmd.Stderr = f, f
	cmd.SysProcAttr = &syscall.SysProcAttr{Setpgid: true}
	if err := cmd.Start(); err != nil {
		f.Close()
		return fmt.Errorf("start %s: %w", p.name, err)
	}
	done := make(chan struct{})
	go func() { _ = cmd.Wait(); f.Close(); close(done) }()
	p.cmd, p.done = cmd, done
	return nil
}

// stop ends the process with SIGTERM (SIGKILL after 10 s) and waits for it.
func (p *process) stop(sig syscall.Signal) {
	p.mu.Lock()
	cmd, done := p.cmd, p.done
	p.cmd = nil
	p.mu.Unlock()
	if cmd == nil || cmd.Process == nil {
		return
	}
	_ = cmd.Process.Signal(sig)
	select {
	case <-done:
	case <-time.After(10 * time.Second):
		_ = cmd.Process.Kill()
		<-done
	}
}

// Kill ends the process with SIGKILL at once (a crash, for fault tests).
func (p *process) kill() { p.stop(syscall.SIGKILL) }

func (p *process) pid() int {
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.cmd == nil || p.cmd.Process == nil {
		return 0
	}
	select {
	case <-p.done:
		return 0 // exited
	default:
		return p.cmd.Process.Pid
	}
}

func (p *process) tail() string {
	b, _ := os.ReadFile(p.log)
	if len(b) > 2000 {
		b = b[len(b)-2000:]
	}
	return string(b)
}

func findBinary(name, envVar string, candidates []string, install string) (string, error) {
	if v := os.Getenv(envVar); v != "" {
		return v, nil
	}
	for _, c := range candidates {
		if st, err := os.Stat(c); err == nil && !st.IsDir() {
			return c, nil
		}
	}
	if p, err := exec.LookPath(name); err == nil {
		return p, nil
	}
	return "", fmt.Errorf("%s not found (set %s or install it: %s)", name, envVar, install)
}

// dials reports whether addr accepts a TCP connection now.
func dials(addr string) bool {
	c, err := net.DialTimeout("tcp", addr, 200*time.Millisecond)
	if err != nil {
		return false
	}
	c.Close()
	return true
}

// MosquittoOptions tune the broker a test starts.
type MosquittoOptions struct {
	// MaxInflight sets max_inflight_messages (0: the broker's default, 20).
	MaxInflight int
	// MaxQueued sets max_queued_messages for persistent sessions (0: 1,000,000 so tests never lose queued QoS 1 messages).
	MaxQueued int
	// TLS, when set, adds a TLS listener on TLSPort with these files.
	TLS *TLSFiles
	// PasswordFile, when set, turns anonymous access off.
	PasswordFile string
	// Extra lines appended to mosquitto.conf.
	Extra string
}

// TLSFiles are PEM files for a TLS listener.
type TLSFiles struct {
	CAFile, CertFile, KeyFile string
	RequireClientCert         bool
}

// Mosquitto is a running broker.
type Mosquitto struct {
	Port    int    // plain MQTT listener on 127.0.0.1
	TLSPort int    // TLS listener when MosquittoOptions.TLS is set
	URL     string // tcp://127.0.0.1:PORT
	TLSURL  string // ssl://127.0.0.1:TLSPORT (empty without TLS)
	Dir     string
	p       *process
}

// StartMosquitto starts a broker with persistence on and returns when it accepts connections.
func StartMosquitto(t testing.TB, o MosquittoOptions) *Mosquitto {
	t.Helper()
	m, err := newMosquitto(t.TempDir(), o)
	if err != nil {
		t.Fatalf("testenv: %v", err)
	}
	t.Cleanup(m.Stop)
	return m
}

// StartMosquittoDir is StartMosquitto outside a test (benchmark and fault
// drivers): configuration, persistence and log live in dir, which must exist.
// The returned cleanup stops the broker.
func StartMosquittoDir(dir string, o MosquittoOptions) (*Mosquitto, func(), error) {
	m, err := newMosquitto(dir, o)
	if err != nil {
		return nil, nil, fmt.Errorf("testenv: %w", err)
	}
	return m, m.Stop, nil
}

func newMosquitto(dir string, o MosquittoOptions) (*Mosquitto, error) {
	bin, err := findBinary("mosquitto", "HOLOMIX_MOSQUITTO", []string{"/usr/sbin/mosquitto"},
		"apt-get update && apt-get install -y mosquitto")
	if err != nil {
		return nil, err
	}
	return onFreshPorts(func() (*Mosquitto, error) { return tryMosquitto(bin, dir, o) })
}

func tryMosquitto(bin, dir string, o MosquittoOptions) (*Mosquitto, error) {
	port, err := freePort()
	if err != nil {
		return nil, err
	}
	m := &Mosquitto{Port: port, Dir: dir}
	m.URL = fmt.Sprintf("tcp://127.0.0.1:%d", m.Port)
	var conf strings.Builder
	fmt.Fprintf(&conf, "per_listener_settings false\npersistence true\npersistence_location %s/\nautosave_interval 1\n", dir)
	fmt.Fprintf(&conf, "log_dest stdout\nlog_type error\nlog_type warning\nlog_type notice\n")
	queued := o.MaxQueued
	if queued == 0 {
		queued = 1000000
	}
	fmt.Fprintf(&conf, "max_queued_messages %d\n", queued)
	if o.MaxInflight > 0 {
		fmt.Fprintf(&conf, "max_inflight_messages %d\n", o.MaxInflight)
	}
	if o.PasswordFile != "" {
		fmt.Fprintf(&conf, "allow_anonymous false\npassword_file %s\n", o.PasswordFile)
	} else {
		fmt.Fprintf(&conf, "allow_anonymous true\n")
	}
	fmt.Fprintf(&conf, "listener %d 127.0.0.1\n", m.Port)
	if o.TLS != nil {
		if m.TLSPort, err = freePort(); err != nil {
			return nil, err
		}
		m.TLSURL = fmt.Sprintf("ssl://127.0.0.1:%d", m.TLSPort)
		fmt.Fprintf(&conf, "listener %d 127.0.0.1\ncafile %s\ncertfile %s\nkeyfile %s\n", m.TLSPort, o.TLS.CAFile, o.TLS.CertFile, o.TLS.KeyFile)
		if o.TLS.RequireClientCert {
			fmt.Fprintf(&conf, "require_certificate true\n")
		}
	}
	if os.Geteuid() == 0 && !strings.Contains(o.Extra, "user ") {
		// Started as root, Mosquitto 2 drops to the "mosquitto" user and could then not
		// read this test's 0700 temporary directory (persistence, certificates).
		conf.WriteString("user root\n")
	}
	conf.WriteString(o.Extra)
	cfgPath := filepath.Join(dir, "mosquitto.conf")
	if err := os.WriteFile(cfgPath, []byte(conf.String()), 0o644); err != nil {
		return nil, fmt.Errorf("write mosquitto.conf: %w", err)
	}
	m.p = &process{name: "mosquitto", bin: bin, args: []string{"-c", cfgPath}, log: filepath.Join(dir, "mosquitto.log")}
	if err := m.Restart(); err != nil {
		m.Stop()
		return nil, err
	}
	return m, nil
}

// Start (re)starts the broker on the same port with the same persistence directory.
func (m *Mosquitto) Start(t testing.TB) {
	t.Helper()
	if err := m.Restart(); err != nil {
		t.Fatalf("testenv: %v", err)
	}
}

// Restart is Start outside a test: it (re)starts the broker and waits until
// it accepts connections.
func (m *Mosquitto) Restart() error {
	if err := m.p.start(); err != nil {
		return err
	}
	ports := []int{m.Port}
	if m.TLSPort != 0 {
		ports = append(ports, m.TLSPort)
	}
	accepts := func() bool { return dials(fmt.Sprintf("127.0.0.1:%d", m.Port)) }
	if err := m.p.waitOwnListeners(ports, accepts, 15*time.Second); err != nil {
		return fmt.Errorf("mosquitto: %w", err)
	}
	return nil
}

// PID returns the broker's process id (0 when it is not running).
func (m *Mosquitto) PID() int { return m.p.pid() }

// Stop stops the broker gracefully (it saves its persistence file).
func (m *Mosquitto) Stop() { m.p.stop(syscall.SIGTERM) }

// Kill ends the broker with SIGKILL.
func (m *Mosquitto) Kill() { m.p.kill() }

// Log returns the tail of the broker's log.
func (m *Mosquitto) Log() string { return m.p.tail() }

// InfluxOptions tune the database a test starts.
type InfluxOptions struct {
	// Database is created at start (default "lake").
	Database string
	// Auth turns authentication on with an admin user Username/Password.
	Auth               bool
	Username, Password string
}

// Influx is a running InfluxDB 1.8 server with Flux and the v2 compatibility API enabled.
type Influx struct {
	Port     int
	URL      string // http://127.0.0.1:PORT
	Database string
	Bucket   string // Database + "/autogen", the v2 bucket name
	Token    string // "user:password", or ":" without authentication
	Dir      string
	rpcPort  int // backup/restore listener, bound too
	p        *process
	opts     InfluxOptions
}

// InfluxdPath returns the influxd binary deploy/test.sh builds into .cache/bin, or one on PATH.
func InfluxdPath(t testing.TB) string {
	t.Helper()
	p, err := influxdPath()
	if err != nil {
		t.Fatalf("testenv: %v", err)
	}
	return p
}

func influxdPath() (string, error) {
	var cands []string
	if root, err := RepoRoot(); err == nil {
		cands = append(cands, filepath.Join(root, ".cache", "bin", "influxd"))
	}
	return findBinary("influxd", "HOLOMIX_INFLUXD", cands,
		"GOBIN=$PWD/.cache/bin go install github.com/influxdata/influxdb/cmd/influxd@v1.8.10 (deploy/test.sh does this)")
}

// StartInflux starts InfluxDB 1.8 and returns once /ping answers and the database exists.
func StartInflux(t testing.TB, o InfluxOptions) *Influx {
	t.Helper()
	in, err := newInflux(t.TempDir(), o)
	if in != nil {
		t.Cleanup(in.Stop)
	}
	if err != nil {
		t.Fatalf("testenv: %v", err)
	}
	return in
}

// StartInfluxDir is StartInflux outside a test (benchmark and fault
// drivers): configuration, data and log live in dir, which must exist. The
// returned cleanup stops the server.
func StartInfluxDir(dir string, o InfluxOptions) (*Influx, func(), error) {
	in, err := newInflux(dir, o)
	if err != nil {
		if in != nil {
			in.Stop()
		}
		return nil, nil, fmt.Errorf("testenv: %w", err)
	}
	return in, in.Stop, nil
}

// newInflux starts the server; on an error after the process started it
// returns the Influx too, so that the caller can stop it.
func newInflux(dir string, o InfluxOptions) (*Influx, error) {
	bin, err := influxdPath()
	if err != nil {
		return nil, err
	}
	if o.Database == "" {
		o.Database = "lake"
	}
	return startInflux(bin, dir, o, func(dir string, httpPort, rpcPort int) (string, error) {
		return fmt.Sprintf(`reporting-disabled = true
bind-address = "127.0.0.1:%d"
[meta]
  dir = "%s/meta"
[data]
  dir = "%s/data"
  wal-dir = "%s/wal"
  query-log-enabled = false
  cache-snapshot-write-cold-duration = "10s"
[monitor]
  store-enabled = false
[http]
  enabled = true
  bind-address = "127.0.0.1:%d"
  auth-enabled = %t
  log-enabled = false
  flux-enabled = true
  max-body-size = 0
[logging]
  level = "warn"
`, rpcPort, dir, dir, dir, httpPort, o.Auth), nil
	}, true)
}

// InfluxConfig writes an influxd configuration for the data directory and
// the two loopback ports given (HTTP; backup/restore RPC).
type InfluxConfig func(dir string, httpPort, rpcPort int) (string, error)

// StartInfluxConfig starts influxd with a configuration of the caller's and
// does nothing else (no user, no database): for tests of a shipped
// configuration file. It returns once the server itself answers /ping.
func StartInfluxConfig(t testing.TB, mk InfluxConfig) *Influx {
	t.Helper()
	bin, err := influxdPath()
	if err != nil {
		t.Fatalf("testenv: %v", err)
	}
	in, err := startInflux(bin, t.TempDir(), InfluxOptions{}, mk, false)
	if in != nil {
		t.Cleanup(in.Stop)
	}
	if err != nil {
		t.Fatalf("testenv: %v", err)
	}
	return in
}

// startInflux starts influxd on fresh ports, again on other ones when
// another process took them first; with setup it creates the admin user
// (o.Auth) and the database.
func startInflux(bin, dir string, o InfluxOptions, mk InfluxConfig, setup bool) (*Influx, error) {
	return onFreshPorts(func() (*Influx, error) { return tryInflux(bin, dir, o, mk, setup) })
}

func tryInflux(bin, dir string, o InfluxOptions, mk InfluxConfig, setup bool) (*Influx, error) {
	port, err := freePort()
	if err != nil {
		return nil, err
	}
	in := &Influx{Port: port, Dir: dir, Database: o.Database, Bucket: o.Database + "/autogen", Token: ":", opts: o}
	in.URL = fmt.Sprintf("http://127.0.0.1:%d", in.Port)
	if o.Auth {
		in.Token = o.Username + ":" + o.Password
	}
	for in.rpcPort == 0 || in.rpcPort == in.Port {
		if in.rpcPort, err = freePort(); err != nil {
			return nil, err
		}
	}
	conf, err := mk(dir, in.Port, in.rpcPort)
	if err != nil {
		return nil, err
	}
	cfgPath := filepath.Join(dir, "influxdb.conf")
	if err := os.WriteFile(cfgPath, []byte(conf), 0o644); err != nil {
		return nil, fmt.Errorf("write influxdb.conf: %w", err)
	}
	in.p = &process{name: "influxd", bin: bin, args: []string{"run", "-config", cfgPath}, log: filepath.Join(dir, "influxd.log")}
	if err := in.Restart(); err != nil {
		in.Stop()
		return nil, err
	}
	if !setup {
		return in, nil
	}
	if o.Auth {
		// The first user may be created without credentials while none exists.
		if err := in.query("", fmt.Sprintf("CREATE USER %q WITH PASSWORD '%s' WITH ALL PRIVILEGES", o.Username, o.Password)); err != nil {
			return in, fmt.Errorf("create admin user: %w", err)
		}
	}
	if err := in.CreateDatabase(o.Database); err != nil {
		return in, fmt.Errorf("%w\n%s", err, in.p.tail())
	}
	return in, nil
}

// CreateDatabase creates a database (no error when it exists).
func (in *Influx) CreateDatabase(name string) error {
	if err := in.query(in.Token, "CREATE DATABASE "+strconv.Quote(name)); err != nil {
		return fmt.Errorf("create database: %w", err)
	}
	return nil
}

// Start (re)starts the server on the same port and data directory and waits for /ping.
func (in *Influx) Start(t testing.TB) {
	t.Helper()
	if err := in.Restart(); err != nil {
		t.Fatalf("testenv: %v", err)
	}
}

// Restart is Start outside a test: it (re)starts the server and waits up to
// 60 s for /ping.
func (in *Influx) Restart() error {
	if err := in.p.start(); err != nil {
		return err
	}
	return in.p.waitOwnListeners([]int{in.Port, in.rpcPort}, func() bool { return Pings(in.URL) }, 60*time.Second)
}

// Pings reports whether an InfluxDB answers GET /ping with 204 at base.
func Pings(base string) bool {
	resp, err := http.Get(base + "/ping")
	if err != nil {
		return false
	}
	resp.Body.Close()
	return resp.StatusCode == http.StatusNoContent
}

// PID returns the server's process id (0 when it is not running).
func (in *Influx) PID() int { return in.p.pid() }

// Stop stops the server gracefully.
func (in *Influx) Stop() { in.p.stop(syscall.SIGTERM) }

// Kill ends the server with SIGKILL.
func (in *Influx) Kill() { in.p.kill() }

// Log returns the tail of the server's log.
func (in *Influx) Log() string { return in.p.tail() }

func (in *Influx) query(token, q string) error {
	_, err := in.InfluxQL(context.Background(), token, q)
	return err
}

// InfluxQL runs a statement against /query (1.x API) and returns the raw JSON answer.
func (in *Influx) InfluxQL(ctx context.Context, token, q string) ([]byte, error) {
	form := url.Values{"q": {q}, "db": {in.Database}}
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, in.URL+"/query", strings.NewReader(form.Encode()))
	if err != nil {
		return nil, err
	}
	req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
	if token != "" && token != ":" {
		u, p, _ := strings.Cut(token, ":")
		req.SetBasicAuth(u, p)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		return nil, fmt.Errorf("influxql %q: %w", q, err)
	}
	defer resp.Body.Close()
	var buf bytes.Buffer
	_, _ = buf.ReadFrom(resp.Body)
	if resp.StatusCode/100 != 2 || bytes.Contains(buf.Bytes(), []byte(`"error"`)) {
		return buf.Bytes(), fmt.Errorf("influxql %q: HTTP %d: %s", q, resp.StatusCode, buf.String())
	}
	return buf.Bytes(), nil
}
