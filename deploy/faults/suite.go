// Command faults is holomix's fault suite (deploy/faults.sh runs it in full;
// `go test ./deploy/faults/` runs it reduced): for each scenario it starts
// `holomix run` against a real Mosquitto and InfluxDB 1.8 on loopback ports
// with a Standard-Webhooks-verifying receiver, publishes a known set of
// readings at a steady rate with alert-triggering intake changes among them,
// injects a fault, recovers, and counts published / stored / lost /
// duplicated readings (distinct site, depth and time in InfluxDB) and
// expected / delivered / duplicated alerts (by episode and webhook-id). Any
// loss, duplicate or missing alert fails the suite.
package main

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"time"

	"holomix/deploy/internal/rig"
	"holomix/internal/testenv"
)

// Mode scales a run: Full is deploy/faults.sh, Reduced the go test run.
type Mode struct {
	Name           string
	Rate           float64       // one-reading messages per second
	Traffic        time.Duration // publishing time of a plain scenario
	InfluxOutage   time.Duration
	HookDown       time.Duration // webhook receiver refusing connections
	HookFail       time.Duration // then answering 500
	HookThrottle   time.Duration // then 429 with Retry-After
	SpoolFullHold  time.Duration // back-pressure held this long
	DiskFullHold   time.Duration
	DiskFullCycles int           // times the disk is filled and freed
	StoreTimeout   time.Duration // wait for every reading in InfluxDB after the traffic
	AlertTimeout   time.Duration // wait for every alert after the traffic
	Sites          int
	Depths         int
	TriggerSites   int
	SIGTERMBudget  time.Duration
	MalformedEvery int // one malformed message after every N-1 valid ones
}

// Full and Reduced are the two modes.
var (
	Full = Mode{Name: "full", Rate: 2000, Traffic: 60 * time.Second, InfluxOutage: 60 * time.Second,
		HookDown: 2 * time.Minute, HookFail: 30 * time.Second, HookThrottle: 30 * time.Second,
		SpoolFullHold: 20 * time.Second, DiskFullHold: 30 * time.Second, DiskFullCycles: 3,
		StoreTimeout: 5 * time.Minute, AlertTimeout: 8 * time.Minute,
		Sites: 20, Depths: 12, TriggerSites: 4, SIGTERMBudget: 5 * time.Second, MalformedEvery: 10}
	Reduced = Mode{Name: "reduced", Rate: 1500, Traffic: 8 * time.Second, InfluxOutage: 10 * time.Second,
		HookDown: 10 * time.Second, HookFail: 4 * time.Second, HookThrottle: 4 * time.Second,
		SpoolFullHold: 3 * time.Second, DiskFullHold: 5 * time.Second, DiskFullCycles: 1,
		StoreTimeout: 90 * time.Second, AlertTimeout: 90 * time.Second,
		Sites: 20, Depths: 12, TriggerSites: 4, SIGTERMBudget: 5 * time.Second, MalformedEvery: 10}
)

// Suite is one run of the scenarios against one broker and one database.
type Suite struct {
	Mode Mode
	Out  string // raw outputs (daemon logs, configurations, results)
	Log  io.Writer

	bin     string
	mq      *testenv.Mosquitto
	in      *testenv.Influx
	mu      sync.Mutex
	results []Result
}

// Result is one scenario's outcome (a row of the table).
type Result struct {
	N        int // scenario number
	Name     string
	Readings rig.ReadingTally
	Alerts   rig.AlertTally
	Took     time.Duration
	Notes    []string
	Failures []string
}

// OK reports whether the scenario passed.
func (r Result) OK() bool { return len(r.Failures) == 0 }

func (s *Suite) logf(format string, a ...any) {
	fmt.Fprintf(s.Log, "%s "+format+"\n", append([]any{time.Now().UTC().Format("15:04:05.000")}, a...)...)
}

// Start builds the daemon and starts the broker and the database.
func (s *Suite) Start(ctx context.Context) error {
	if s.Log == nil {
		s.Log = io.Discard
	}
	if err := os.MkdirAll(s.Out, 0o755); err != nil {
		return err
	}
	var err error
	if s.bin, err = rig.BuildHolomix(ctx, s.Out); err != nil {
		return err
	}
	mqDir, inDir := filepath.Join(s.Out, "mosquitto"), filepath.Join(s.Out, "influxd")
	for _, d := range []string{mqDir, inDir} {
		if err := os.RemoveAll(d); err != nil { // a fresh broker and database every run
			return err
		}
		if err := os.MkdirAll(d, 0o755); err != nil {
			return err
		}
	}
	// deploy/mosquitto.conf's flow control; persistence on (testenv saves every second).
	if s.mq, _, err = testenv.StartMosquittoDir(mqDir, testenv.MosquittoOptions{MaxInflight: 1000, MaxQueued: 1000000,
		Extra: "max_inflight_bytes 0\nmax_queued_bytes 0\n" + testenv.MosquittoUserLine()}); err != nil {
		return err
	}
	if s.in, _, err = testenv.StartInfluxDir(inDir, testenv.InfluxOptions{Database: "faults"}); err != nil {
		s.mq.Stop()
		return err
	}
	return nil
}

// Stop stops the broker and the database.
func (s *Suite) Stop() {
	if s.mq != nil {
		s.mq.Stop()
	}
	if s.in != nil {
		s.in.Stop()
	}
}

// Scenario is one fault.
type Scenario struct {
	Name string
	Run  func(ctx context.Context, c *Case) error
}

// Run runs the named scenarios (all when names is empty) and returns the
// results.
func (s *Suite) Run(ctx context.Context, names []string) []Result {
	want := map[string]bool{}
	for _, n := range names {
		want[n] = true
	}
	for i, sc := range Scenarios() {
		if len(want) > 0 && !want[sc.Name] && !want[fmt.Sprint(i+1)] {
			continue
		}
		if ctx.Err() != nil {
			break
		}
		s.results = append(s.results, s.runOne(ctx, i+1, sc))
	}
	return s.results
}

func (s *Suite) runOne(ctx context.Context, n int, sc Scenario) Result {
	start := time.Now()
	// A scenario that failed half-way must not leave the next without a broker or a database.
	if s.mq.PID() == 0 {
		if err := s.mq.Restart(); err != nil {
			return Result{N: n, Name: sc.Name, Failures: []string{err.Error()}}
		}
	}
	if s.in.PID() == 0 {
		if err := s.in.Restart(); err != nil {
			return Result{N: n, Name: sc.Name, Failures: []string{err.Error()}}
		}
	}
	c, err := s.newCase(n, sc.Name)
	if err != nil {
		return Result{N: n, Name: sc.Name, Failures: []string{err.Error()}}
	}
	s.logf("scenario %d %s: start", n, sc.Name)
	err = sc.Run(ctx, c)
	if err != nil {
		c.fail("%v", err)
	}
	c.finish(ctx)
	r := c.result
	r.Took = time.Since(start)
	s.logf("scenario %d %s: %s in %v (%d/%d readings, %d/%d alerts) %s", n, sc.Name, map[bool]string{true: "PASS", false: "FAIL"}[r.OK()],
		r.Took.Round(time.Second), r.Readings.Stored, r.Readings.Published, r.Alerts.Delivered, r.Alerts.Expected, strings.Join(r.Failures, "; "))
	return r
}

// Case is one scenario's running state.
type Case struct {
	s      *Suite
	n      int
	name   string
	dir    string
	db     string
	prefix string
	stream rig.Stream
	cfg    rig.DaemonConfig
	secret string
	hook   *rig.Hook
	d      *rig.Daemon
	pub    *rig.Publisher
	msgs   []rig.Msg
	steps  int
	want   map[rig.Key]float64
	alerts []rig.ExpectedAlert
	t0     time.Time
	result Result
	// points are the stored readings (after finish counted them); checks run
	// after the tallies, before the final SIGTERM.
	points  []rig.Point
	checks  []func()
	cleanup []func()
}

func (c *Case) note(format string, a ...any) {
	c.result.Notes = append(c.result.Notes, fmt.Sprintf(format, a...))
	c.s.logf("  %s: %s", c.name, fmt.Sprintf(format, a...))
}

func (c *Case) fail(format string, a ...any) {
	c.result.Failures = append(c.result.Failures, fmt.Sprintf(format, a...))
	c.s.logf("  %s: FAIL %s", c.name, fmt.Sprintf(format, a...))
}

func (s *Suite) newCase(n int, name string) (*Case, error) {
	c := &Case{s: s, n: n, name: name, prefix: fmt.Sprintf("f%d", n), db: fmt.Sprintf("f%d", n),
		dir: filepath.Join(s.Out, fmt.Sprintf("%d-%s", n, name)), want: map[rig.Key]float64{}}
	c.result.Name, c.result.N = name, n
	if err := os.RemoveAll(c.dir); err != nil {
		return nil, err
	}
	if err := os.MkdirAll(c.dir, 0o755); err != nil {
		return nil, err
	}
	if err := s.in.CreateDatabase(c.db); err != nil {
		return nil, err
	}
	m := s.Mode
	c.t0 = time.Now().UTC().Add(-40 * 24 * time.Hour).Truncate(24 * time.Hour)
	c.stream = rig.Stream{Prefix: c.prefix, Sites: m.Sites, Depths: rig.Depths(m.Depths, 1, 1), T0: c.t0,
		IntakeDepth: 5, TriggerEvery: 15, TriggerSites: m.TriggerSites}
	var err error
	if c.secret, err = rig.NewSecret(); err != nil {
		return nil, err
	}
	if c.hook, err = rig.NewHook(c.secret); err != nil {
		return nil, err
	}
	c.cleanup = append(c.cleanup, c.hook.Close)
	port, err := rig.FreePort()
	if err != nil {
		return nil, err
	}
	c.cfg = rig.DaemonConfig{Broker: s.mq.URL, ClientID: "holomix-faults-" + c.prefix,
		Subscriptions: []rig.Subscription{
			{Topic: c.prefix + "/+/temp", Format: "json", Template: c.prefix + "/{site}/temp"},
			{Topic: c.prefix + "/+/profile", Format: "json-profile", Template: c.prefix + "/{site}/profile"}},
		InfluxURL: s.in.URL, Bucket: c.db + "/autogen", Dir: filepath.Join(c.dir, "data"), Sites: rig.SitesOf(c.stream),
		HookURL: c.hook.URL(), HookSecretEnv: "HOLOMIX_FAULTS_HOOK_SECRET", HTTPListen: fmt.Sprintf("127.0.0.1:%d", port)}
	if c.pub, err = rig.NewPublisher(s.mq.URL, "faults-pub-"+c.prefix); err != nil {
		return nil, err
	}
	c.cleanup = append(c.cleanup, c.pub.Close)
	return c, nil
}

// writeConfig writes the daemon's configuration and prepares the process.
func (c *Case) writeConfig() error {
	path := filepath.Join(c.dir, "holomix.yaml")
	if err := os.WriteFile(path, []byte(c.cfg.YAML()), 0o600); err != nil {
		return err
	}
	l, err := rig.NewLog(filepath.Join(c.dir, "daemon.log"))
	if err != nil {
		return err
	}
	c.cleanup = append(c.cleanup, l.Close)
	c.d = &rig.Daemon{Bin: c.s.bin, Config: path, HTTPAddr: c.cfg.HTTPListen, Log: l,
		Env: []string{"HOLOMIX_FAULTS_HOOK_SECRET=" + c.secret}}
	return nil
}

// start writes the configuration and starts the daemon.
func (c *Case) start() error {
	if err := c.writeConfig(); err != nil {
		return err
	}
	return c.d.Start()
}

// readings builds steps of one-reading messages (the stream's readings,
// expected in InfluxDB, and its alerts).
func (c *Case) readings(steps int) []rig.Msg {
	var msgs []rig.Msg
	for k := 0; k < steps; k++ {
		msgs = append(msgs, c.stream.ReadingsStep(k)...)
		c.stream.AddReadings(c.want, k)
	}
	c.steps = steps
	c.alerts = c.stream.ExpectedAlerts(steps)
	return msgs
}

// stepsFor returns the number of steps that take d to publish at the mode's rate.
func (c *Case) stepsFor(d time.Duration) int {
	per := c.stream.Sites * len(c.stream.Depths)
	return max(1, int(c.s.Mode.Rate*d.Seconds())/per)
}

// traffic publishes msgs at rate in the background.
func (c *Case) traffic(ctx context.Context, msgs []rig.Msg, rate float64) <-chan error {
	c.msgs = msgs
	done := make(chan error, 1)
	go func() { done <- c.pub.Publish(ctx, msgs, rig.PublishOptions{Window: 200, Rate: rate}) }()
	return done
}

// waitAcked waits until the broker acknowledged at least frac of the messages.
func (c *Case) waitAcked(ctx context.Context, frac float64) error {
	want := int64(frac * float64(len(c.msgs)))
	deadline := time.Now().Add(5 * time.Minute)
	for c.pub.Acked.Load() < want {
		if time.Now().After(deadline) {
			return fmt.Errorf("only %d of %d publishes acknowledged after 5 min", c.pub.Acked.Load(), want)
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(10 * time.Millisecond):
		}
	}
	return nil
}

// waitFor polls cond every 50 ms until it holds or d passes.
func waitFor(ctx context.Context, d time.Duration, cond func() bool) bool {
	deadline := time.Now().Add(d)
	for !cond() {
		if time.Now().After(deadline) || ctx.Err() != nil {
			return false
		}
		time.Sleep(50 * time.Millisecond)
	}
	return true
}

// finish waits for the readings and the alerts, tallies them, stops the
// daemon (SIGTERM: exit 0 expected) and cleans up.
func (c *Case) finish(ctx context.Context) {
	defer func() {
		if c.d != nil && c.d.Running() {
			c.d.Kill()
		}
		for i := len(c.cleanup) - 1; i >= 0; i-- {
			c.cleanup[i]()
		}
		_ = rig.ClearSession(c.s.mq.URL, c.cfg.ClientID)
	}()
	if c.d == nil {
		return
	}
	m := c.s.Mode
	if !c.d.Running() {
		if err := c.d.Start(); err != nil {
			c.fail("restart for the final count: %v", err)
			return
		}
	}
	// Readings.
	sctx, cancel := context.WithTimeout(ctx, m.StoreTimeout)
	_, got, err := rig.WaitCount(sctx, c.s.in.URL, c.db, len(c.want), 250*time.Millisecond)
	cancel()
	if err != nil {
		c.note("after %v: %d of %d readings stored", m.StoreTimeout, got, len(c.want))
	}
	time.Sleep(500 * time.Millisecond) // a late duplicate would show now
	pts, err := rig.ReadPoints(ctx, c.s.in.URL, c.db)
	if err != nil {
		c.fail("read back: %v", err)
		return
	}
	c.points = pts
	rt := rig.TallyReadings(pts, c.want)
	c.result.Readings = rt
	if rt.Lost > 0 || rt.Duplicated > 0 || rt.WrongValue > 0 || rt.Extra > 0 {
		c.fail("readings: %d lost, %d duplicated, %d with a wrong value, %d never published", rt.Lost, rt.Duplicated, rt.WrongValue, rt.Extra)
	}
	// Alerts.
	actx, cancel := context.WithTimeout(ctx, m.AlertTimeout)
	at, err := c.hook.WaitAlerts(actx, c.alerts)
	cancel()
	if err == nil {
		time.Sleep(2 * time.Second) // a second message for an alert would show now
		at = rig.Tally(c.hook.Deliveries(), c.alerts)
	}
	c.result.Alerts = at
	c.saveDeliveries()
	if at.Delivered != at.Expected {
		c.fail("alerts: %d of %d delivered; missing e.g. %s", at.Delivered, at.Expected, first(at.Missing, 3))
	}
	if at.Duplicated > 0 {
		c.fail("alerts: %d delivered twice as different messages", at.Duplicated)
	}
	if len(at.Unexpected) > 0 {
		c.fail("alerts: %d unexpected, e.g. %s", len(at.Unexpected), first(at.Unexpected, 3))
	}
	if n := c.hook.BadSignatures(); n > 0 {
		c.fail("%d webhook requests failed Standard Webhooks verification", n)
	}
	for _, check := range c.checks {
		check()
	}
	if mm, err := c.d.Metrics(); err == nil {
		if v := mm["holomix_readings_duplicate_total"]; v > 0 {
			c.note("%.0f exact redeliveries dropped by the daemon", v)
		}
	}
	code, took, err := c.d.Term(10 * time.Second)
	if err != nil || code != 0 {
		c.fail("final SIGTERM: exit %d after %v: %v", code, took.Round(time.Millisecond), err)
	}
	if n := c.d.Log.Count(`"level":"ERROR"`); n > 0 {
		c.note("%d error lines in the daemon log", n)
	}
}

func first(s []string, n int) string {
	if len(s) > n {
		return strings.Join(s[:n], "; ") + fmt.Sprintf("; … (%d more)", len(s)-n)
	}
	return strings.Join(s, "; ")
}

// Table renders the results as a markdown table.
func Table(mode Mode, rs []Result) string {
	var b strings.Builder
	fmt.Fprintf(&b, "| # | scenario (%s mode) | published | stored | lost | dup | alerts expected | delivered | dup alerts | webhook-id repeats | took | result | notes |\n", mode.Name)
	b.WriteString("|---|---|---|---|---|---|---|---|---|---|---|---|---|\n")
	for _, r := range rs {
		res := "PASS"
		if !r.OK() {
			res = "**FAIL**: " + strings.Join(r.Failures, "; ")
		}
		notes := r.Notes
		fmt.Fprintf(&b, "| %d | %s | %d | %d | %d | %d | %d | %d | %d | %d | %v | %s | %s |\n", r.N, r.Name,
			r.Readings.Published, r.Readings.Stored, r.Readings.Lost, r.Readings.Duplicated,
			r.Alerts.Expected, r.Alerts.Delivered, r.Alerts.Duplicated, r.Alerts.Repeats, r.Took.Round(time.Second), res,
			strings.ReplaceAll(strings.Join(notes, "; "), "|", "/"))
	}
	return b.String()
}

// Failed reports whether any scenario failed.
func Failed(rs []Result) bool {
	for _, r := range rs {
		if !r.OK() {
			return true
		}
	}
	return false
}

// saveDeliveries writes every webhook request the receiver got to
// deliveries.jsonl in the scenario's directory.
func (c *Case) saveDeliveries() {
	f, err := os.Create(filepath.Join(c.dir, "deliveries.jsonl"))
	if err != nil {
		return
	}
	defer f.Close()
	enc := json.NewEncoder(f)
	for _, d := range c.hook.Deliveries() {
		_ = enc.Encode(d)
	}
}
