// Package demo runs a simulated autumn-to-spring season end to end on one
// machine, through the same parts a real installation uses: an embedded MQTT
// broker on loopback, the lake simulator publishing to it over a real MQTT
// connection, the daemon (subscriber → spool → detection → alert outbox →
// signed webhooks, status page, metrics) and a webhook receiver that checks
// each alert's signature and prints it. Lakes, names and weather are
// invented (see ingest/sim).
package demo

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"os"
	"sync"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"holomix/config"
	"holomix/detect"
	"holomix/ingest/sim"
	"holomix/internal/daemon"
	"holomix/internal/status"
)

// Defaults.
const (
	// DefaultWall is the wall time of a whole season when neither a speed
	// nor a duration is given.
	DefaultWall = 3 * time.Minute
	// DefaultListen lets the system choose a free loopback port for the status page.
	DefaultListen = "127.0.0.1:0"
	// drainWait bounds the wait, after the simulator stopped, for the daemon
	// to spool, detect and deliver what was published.
	drainWait = 30 * time.Second
	// webhookName and logName are the demo's alert receivers.
	webhookName = "demo-webhook"
	logName     = "demo-log"
	// staleAfter marks a site stale on the status page when the data time
	// moved on this far past its last profile (the buoys report every 10
	// minutes; the simulator's buoys fall silent now and then for 1-4 h).
	staleAfter = time.Hour
)

// SeasonEnd is the end of the simulated season that starts at start (the
// default scenario starts on 15 September): 15 May of the next year, after
// the ice has gone and the lakes have stratified again.
func SeasonEnd(start time.Time) time.Time {
	return time.Date(start.Year()+1, time.May, 15, 0, 0, 0, 0, time.UTC)
}

// Options configure Run. The zero value runs the default season (seed 0) in
// about DefaultWall with the status page on a free loopback port.
type Options struct {
	// Speed is model seconds per wall second. 0: the season is compressed
	// into For, or into DefaultWall when For is 0 too.
	Speed float64
	// For is the wall time after which the simulator stops (0: at the end of
	// the season).
	For time.Duration
	// Seed seeds the simulated weather and sensor noise.
	Seed int64
	// Listen is the status page address (loopback only; "" means DefaultListen).
	Listen string
	// Dir keeps the daemon's storage (spool, outbox, state); it must be new
	// or empty. "" uses a temporary directory removed at the end.
	Dir string
	// Format is the buoys' payload: "json-profile" (default, one message per
	// site and time on lakes/{site}/profile) or "json" (one per reading on
	// lakes/{site}/temp/{depth}).
	Format string
	// InfluxURL, when set, stores readings and derived series in InfluxDB
	// (bucket InfluxBucket, token InfluxToken); otherwise they stay spooled.
	InfluxURL, InfluxBucket, InfluxToken string
	// Out receives what a person watching reads: addresses, alerts as they
	// arrive, progress and the summary (nil: discarded).
	Out io.Writer
	// Logger receives the daemon's and the broker's logs (nil: discarded).
	Logger *slog.Logger
	// OnReady is called once everything listens and the daemon subscribed.
	OnReady func(Ready)
	// OnAlert is called for every alert the webhook receiver accepted.
	OnAlert func(Alert)
}

// Ready tells where the parts of a running demo listen.
type Ready struct {
	StatusURL  string // http://127.0.0.1:PORT/
	WebhookURL string // the demo's webhook receiver
	Broker     string // tcp://127.0.0.1:PORT
	Dir        string // storage directory
}

// Report is what happened in one run.
type Report struct {
	Seed        int64
	Format      string
	Start, End  time.Time // the season
	Reached     time.Time // model time the simulator reached
	Speed       float64   // model seconds per wall second asked for
	Wall        time.Duration
	Interrupted bool // stopped by the caller's context (Ctrl-C)

	Messages int64 // MQTT messages the simulator published
	Readings int64 // readings in them
	// From the daemon's metrics: readings decoded from MQTT, committed to the
	// spool, stored in InfluxDB, handed to detection.
	Received, Spooled, Stored, Detected int64
	Dead                                int64 // messages dead-lettered by the daemon
	BrokerDropped                       int64 // messages the broker could not deliver
	Drained                             bool  // everything published was spooled, detected and delivered before shutdown

	Profiles, EventCount int // detected profiles (columns) and events, from the status store
	// Events are the detectors' events per site, as the status API lists them
	// (the most recent 200 per site).
	Events map[string][]Event

	Alerts   []Alert // verified, de-duplicated, in arrival order
	Rejected int     // webhook requests refused (bad signature or body)
	Repeats  int     // redeliveries of a message already received
	// AlertsDelivered and AlertsFailed are the dispatcher's counts for the webhook receiver.
	AlertsDelivered, AlertsFailed, AlertsPending int64

	Truth sim.Truth
}

// Run runs the demo until the season ends, For elapses or ctx is cancelled,
// and returns nil in all three cases once everything has shut down.
func Run(ctx context.Context, o Options) error {
	_, err := RunReport(ctx, o)
	return err
}

// ErrOptions marks an error in Options (the command reports it as a usage error).
var ErrOptions = errors.New("invalid option")

// RunReport is Run returning what happened.
func RunReport(ctx context.Context, o Options) (*Report, error) {
	if o.Out == nil {
		o.Out = io.Discard
	}
	out := &lockedWriter{w: o.Out}
	if o.Logger == nil {
		o.Logger = slog.New(slog.DiscardHandler)
	}
	if o.Format == "" {
		o.Format = sim.FormatJSONProfile
	}
	if o.Format != sim.FormatJSONProfile && o.Format != sim.FormatJSON {
		return nil, fmt.Errorf("demo: %w: format %q: want %s or %s", ErrOptions, o.Format, sim.FormatJSONProfile, sim.FormatJSON)
	}
	if o.Listen == "" {
		o.Listen = DefaultListen
	}
	if err := checkLoopback(o.Listen); err != nil {
		return nil, err
	}
	if o.Speed < 0 || o.For < 0 {
		return nil, fmt.Errorf("demo: %w: speed and duration must not be negative", ErrOptions)
	}
	if o.InfluxURL == "" && (o.InfluxBucket != "" || o.InfluxToken != "") {
		return nil, fmt.Errorf("demo: %w: an InfluxDB bucket or token needs the database URL too", ErrOptions)
	}

	sc := sim.DefaultScenario(o.Seed)
	s, err := sim.NewChecked(sc)
	if err != nil {
		return nil, fmt.Errorf("demo: %w", err)
	}
	start, end := sc.Start, SeasonEnd(sc.Start)
	// Readings dated in the future would be flagged by quality control: the
	// season must lie in the past. It does (2025-26) unless the clock is off.
	if now := time.Now().UTC(); end.After(now) {
		if !start.Before(now) {
			return nil, fmt.Errorf("demo: the simulated season starts %s, after this machine's clock (%s); check the clock", start.Format("2006-01-02"), now.Format(time.RFC3339))
		}
		end = now.Truncate(time.Hour)
	}
	season := end.Sub(start)
	rep := &Report{Seed: o.Seed, Format: o.Format, Start: start, End: end, Speed: o.Speed}
	switch {
	case rep.Speed > 0:
	case o.For > 0:
		rep.Speed = season.Seconds() / o.For.Seconds()
	default:
		rep.Speed = season.Seconds() / DefaultWall.Seconds()
	}

	dir, cleanup, err := storageDir(o.Dir)
	if err != nil {
		return nil, err
	}
	defer cleanup()

	// The parts, in the order data flows back to front: webhook receiver,
	// status store, broker, daemon, simulator.
	store := status.NewStore(StatusSites(Sites(sc)), 0)
	// Freshness on the status page follows data time as detection sees it.
	clock := &dataClock{start: start}
	store.SetClock(clock.now)
	onAlert := func(a Alert) {
		p := a.Payload
		fmt.Fprintf(out, "  %s  %-10s  %-22s  %-8s  %s\n", p.EventTime.UTC().Format("2006-01-02 15:04"), p.Site.ID, p.Kind, p.Status, p.Summary)
		store.ObserveAlert(status.AlertLine{Time: p.EventTime, Site: p.Site.ID, Kind: string(p.Kind), Status: string(p.Status),
			Receiver: webhookName, Summary: p.Summary, Delivered: true})
		if o.OnAlert != nil {
			o.OnAlert(a)
		}
	}
	rcv, err := startReceiver(onAlert)
	if err != nil {
		return nil, err
	}
	defer func() {
		sctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
		defer cancel()
		_ = rcv.close(sctx)
	}()

	httpLn, err := net.Listen("tcp", o.Listen)
	if err != nil {
		return nil, fmt.Errorf("demo: status page: listen %s: %w", o.Listen, err)
	}
	statusURL := "http://" + httpLn.Addr().String() + "/"

	br, err := startBroker(quiet(o.Logger))
	if err != nil {
		httpLn.Close()
		return nil, err
	}
	defer br.close()

	cfg := daemonConfig(sc, o, dir, br.addr, httpLn.Addr().String(), rcv)

	fmt.Fprintf(out, "holomix demo: one simulated season of three invented lakes, end to end on this machine\n")
	fmt.Fprintf(out, "  season    %s → %s, seed %d, %.0f× real time (about %s)\n", start.Format("2006-01-02"), end.Format("2006-01-02"),
		o.Seed, rep.Speed, wallFor(season, rep.Speed, o.For))
	fmt.Fprintf(out, "  broker    %s (embedded, loopback)  payload %s on %s\n", cfg.MQTT.Broker, o.Format, cfg.MQTT.Subscriptions[0].Topic)
	if o.Dir == "" {
		fmt.Fprintf(out, "  storage   %s (temporary; --dir DIR keeps it)\n", dir)
	} else {
		fmt.Fprintf(out, "  storage   %s\n", dir)
	}
	if o.InfluxURL == "" {
		fmt.Fprintf(out, "  database  none: readings stay in the spool (--influx-url URL to store them)\n")
	} else {
		fmt.Fprintf(out, "  database  %s bucket %s\n", o.InfluxURL, cfg.Influx.Bucket)
	}
	fmt.Fprintf(out, "  alerts    signed webhooks to %s (verified here) and a log receiver (--log-level info shows it)\n", rcv.url)
	fmt.Fprintf(out, "status page: %s\n", statusURL)

	// The daemon.
	reg := prometheus.NewRegistry()
	air := make(chan daemon.AirTemp, 64)
	ready := make(chan struct{})
	d := startDaemon(daemon.Options{
		Config: cfg, Logger: o.Logger, Registry: reg, Listener: httpLn,
		Status:     store,
		StatusPage: status.Options{Title: "holomix demo — simulated lakes", Refresh: 5 * time.Second, StaleAfter: staleAfter},
		Air:        air,
		Tap:        clock,
		OnReady:    func(daemon.Info) { close(ready) },
	})
	defer d.stop()
	select {
	case <-ready:
	case <-d.done:
		httpLn.Close()
		return nil, fmt.Errorf("demo: the daemon did not start: %w", d.err)
	case <-ctx.Done():
		rep.Interrupted = true
		return rep, d.stop()
	}
	select {
	case <-br.subs.ready:
	case <-time.After(15 * time.Second):
		return nil, errors.Join(errors.New("demo: the daemon did not subscribe within 15 s"), d.stop())
	case <-ctx.Done():
		rep.Interrupted = true
		return rep, d.stop()
	}
	if o.OnReady != nil {
		o.OnReady(Ready{StatusURL: statusURL, WebhookURL: rcv.url, Broker: cfg.MQTT.Broker, Dir: dir})
	}

	// The simulator, until the season ends, --for elapses, ctx ends or the
	// daemon stops on its own (a failure).
	pub, err := newPublisher(ctx, br)
	if err != nil {
		return nil, errors.Join(err, d.stop())
	}
	defer pub.close()
	wallStart := time.Now()
	base, stopSim := context.WithCancel(ctx)
	defer stopSim()
	simCtx := base
	if o.For > 0 {
		var cancel context.CancelFunc
		simCtx, cancel = context.WithTimeout(base, o.For)
		defer cancel()
	}
	go func() {
		select {
		case <-d.done:
			stopSim()
		case <-simCtx.Done():
		}
	}()
	pub.before = feeder(simCtx, s, sc, air, out, start, end, wallStart)
	fmt.Fprintf(out, "alerts as the webhook receiver gets them (data time UTC, site, kind, status, summary):\n")
	simErr := s.Run(simCtx, pub, o.Format, rep.Speed, end)
	switch {
	case d.stopped():
		return nil, fmt.Errorf("demo: the daemon stopped during the season: %w", d.stop())
	case simErr == nil:
	case ctx.Err() != nil:
		rep.Interrupted = true
	case errors.Is(simErr, context.DeadlineExceeded) && simCtx.Err() != nil:
		// --for elapsed.
	default:
		return nil, errors.Join(fmt.Errorf("demo: simulator: %w", simErr), d.stop())
	}

	// Let the daemon take in, detect and deliver what was published.
	if !rep.Interrupted {
		fctx, cancel := context.WithTimeout(ctx, 10*time.Second)
		_ = pub.flush(fctx)
		cancel()
		rep.Drained = drain(ctx, reg, br, pub, o.InfluxURL != "")
		if ctx.Err() != nil {
			rep.Interrupted = true
		}
	}
	rep.Wall = time.Since(wallStart)
	// What the detectors raised, as anyone can read it from the status API.
	rep.Events, err = fetchEvents(ctx, statusURL, sc)
	if err != nil {
		fmt.Fprintf(out, "(could not read the events from the status API: %v)\n", err)
	}
	if err := d.stop(); err != nil {
		return nil, fmt.Errorf("demo: daemon: %w", err)
	}

	// What happened.
	rep.Reached = s.Now()
	rep.Truth = s.Truth()
	rep.Messages, rep.Readings = pub.messages.Load(), pub.readings.Load()
	m := gather(reg)
	rep.Received, rep.Spooled, rep.Stored, rep.Detected, rep.Dead = m.received, m.spooled, m.stored, m.detected, m.dead
	rep.AlertsDelivered, rep.AlertsFailed, rep.AlertsPending = m.delivered, m.failed, m.pending
	rep.BrokerDropped = br.dropped()
	c := store.Counters()
	rep.Profiles, rep.EventCount = c.Columns, c.Events
	rep.Alerts, rep.Rejected, rep.Repeats = rcv.received()
	writeSummary(out, rep)
	return rep, nil
}

// dataClock follows data time as detection sees it: the latest profile
// time the daemon has detected at any site (an engine.Sink on the daemon's
// Tap). On the status page a site is then fresh or stale by the data, not by
// how fast the demo runs.
type dataClock struct {
	start  time.Time
	latest atomic.Int64 // Unix ns
}

func (c *dataClock) Column(col detect.Column, _ detect.Profile) {
	t := col.Time.UnixNano()
	for {
		old := c.latest.Load()
		if t <= old || c.latest.CompareAndSwap(old, t) {
			return
		}
	}
}

func (c *dataClock) Event(detect.Event) {}

func (c *dataClock) now() time.Time {
	if n := c.latest.Load(); n != 0 {
		return time.Unix(0, n).UTC()
	}
	return c.start
}

// runningDaemon is daemon.Run on its own goroutine.
type runningDaemon struct {
	cancel context.CancelFunc
	done   chan struct{} // closed when Run returned
	err    error         // Run's result, set before done closes
}

func startDaemon(o daemon.Options) *runningDaemon {
	ctx, cancel := context.WithCancel(context.Background())
	d := &runningDaemon{cancel: cancel, done: make(chan struct{})}
	go func() {
		defer close(d.done)
		d.err = daemon.Run(ctx, o)
	}()
	return d
}

// stop asks the daemon to drain and returns Run's result (safe to repeat).
func (d *runningDaemon) stop() error {
	d.cancel()
	<-d.done
	return d.err
}

// stopped reports whether Run has returned.
func (d *runningDaemon) stopped() bool {
	select {
	case <-d.done:
		return true
	default:
		return false
	}
}

// daemonConfig builds the configuration an operator would write for the
// simulated lakes, with the demo's broker, storage, status address and
// receivers.
func daemonConfig(sc sim.Scenario, o Options, dir, brokerAddr, httpAddr string, rcv *receiver) *config.Config {
	sub := config.Subscription{Topic: "lakes/+/profile", Format: "json-profile", Template: "lakes/{site}/profile"}
	if o.Format == sim.FormatJSON {
		sub = config.Subscription{Topic: "lakes/+/temp/+", Format: "json", Template: "lakes/{site}/temp/{depth}"}
	}
	cfg := &config.Config{
		MQTT: config.MQTT{
			Broker:        "tcp://" + brokerAddr,
			ClientID:      "holomix-demo",
			QoS:           1,
			Subscriptions: []config.Subscription{sub},
		},
		Influx:  config.Influx{URL: o.InfluxURL, Bucket: o.InfluxBucket},
		Storage: config.Storage{Dir: dir},
		Sites:   Sites(sc),
		Alerts: config.Alerts{
			StatusURL: "http://" + httpAddr,
			Receivers: []config.Receiver{
				{Name: logName, Type: "log", Resolved: true},
				{Name: webhookName, Type: "webhook", URL: rcv.url, Resolved: true, Timeout: config.Duration(5 * time.Second)},
			},
		},
		HTTP: config.HTTP{Listen: httpAddr},
		Log:  config.Log{Level: "info", Format: "text"},
	}
	// The secret is generated for this run; a configuration file would name
	// a file or an environment variable holding it.
	cfg.Alerts.Receivers[1].Secret = config.Secret{Env: "HOLOMIX_DEMO_WEBHOOK_SECRET"}
	cfg.Alerts.Receivers[1].Secret.Set(rcv.secret)
	if o.InfluxToken != "" {
		cfg.Influx.Token = config.Secret{Env: "HOLOMIX_DEMO_INFLUX_TOKEN"}
		cfg.Influx.Token.Set(o.InfluxToken)
	}
	config.Defaults(cfg)
	return cfg
}

// feeder returns the hook the publisher calls before each message: hourly
// air temperatures to the daemon (frazil risk) and a progress line at the
// start of each model month.
func feeder(ctx context.Context, s *sim.Sim, sc sim.Scenario, air chan<- daemon.AirTemp, out io.Writer, start, end, wallStart time.Time) func() {
	var lastHour, lastMonth time.Time
	return func() {
		now := s.Now()
		if h := now.Truncate(time.Hour); h.After(lastHour) {
			lastHour = h
			for _, site := range sc.Sites {
				select {
				case air <- daemon.AirTemp{Site: site.ID, Time: now, C: s.AirTemp(site.ID)}:
				case <-ctx.Done():
					return
				}
			}
		}
		m := time.Date(now.Year(), now.Month(), 1, 0, 0, 0, 0, time.UTC)
		if m.After(lastMonth) {
			if !lastMonth.IsZero() {
				frac := now.Sub(start).Seconds() / end.Sub(start).Seconds()
				fmt.Fprintf(out, "── %s ── (%2.0f%% of the season, %s wall)\n", m.Format("January 2006"), 100*frac, time.Since(wallStart).Round(time.Second))
			}
			lastMonth = m
		}
	}
}

// drain waits until the daemon has taken in everything published, detected
// it, delivered the alerts and (withDB) written it to InfluxDB, or drainWait
// passes. It reports success.
func drain(ctx context.Context, reg *prometheus.Registry, br *broker, pub *publisher, withDB bool) bool {
	deadline := time.Now().Add(drainWait)
	stable := 0
	for time.Now().Before(deadline) {
		m := gather(reg)
		if m.messages >= pub.messages.Load()-br.dropped() && m.acksPending == 0 && br.backlog() == 0 &&
			m.detected >= m.spooled && m.pending == 0 && (!withDB || m.stored >= m.spooled) {
			stable++
			if stable >= 3 {
				return true
			}
		} else {
			stable = 0
		}
		select {
		case <-ctx.Done():
			return false
		case <-time.After(100 * time.Millisecond):
		}
	}
	return false
}

// storageDir returns the storage directory: dir when new or empty, else a
// temporary one, and a cleanup function removing a temporary one.
func storageDir(dir string) (string, func(), error) {
	if dir == "" {
		d, err := os.MkdirTemp("", "holomix-demo-")
		if err != nil {
			return "", nil, fmt.Errorf("demo: temporary directory: %w", err)
		}
		return d, func() { os.RemoveAll(d) }, nil
	}
	entries, err := os.ReadDir(dir)
	switch {
	case errors.Is(err, os.ErrNotExist):
		if err := os.MkdirAll(dir, 0o750); err != nil {
			return "", nil, fmt.Errorf("demo: --dir: %w", err)
		}
	case err != nil:
		return "", nil, fmt.Errorf("demo: --dir: %w", err)
	case len(entries) > 0:
		return "", nil, fmt.Errorf("demo: %w: storage directory %s is not empty: the demo plays a season from its start and needs a new or empty directory", ErrOptions, dir)
	}
	return dir, func() {}, nil
}

// checkLoopback refuses a status address outside 127.0.0.0/8 and ::1: the
// demo's page has no authentication.
func checkLoopback(addr string) error {
	host, _, err := net.SplitHostPort(addr)
	if err != nil {
		return fmt.Errorf("demo: %w: listen address %q: %w", ErrOptions, addr, err)
	}
	if host == "localhost" {
		return nil
	}
	ip := net.ParseIP(host)
	if ip == nil || !ip.IsLoopback() {
		return fmt.Errorf("demo: %w: listen address %q: the demo serves its status page on loopback only (127.0.0.1)", ErrOptions, addr)
	}
	return nil
}

// wallFor estimates the wall time of the run.
func wallFor(season time.Duration, speed float64, limit time.Duration) string {
	w := time.Duration(float64(season) / speed)
	if limit > 0 && limit < w {
		w = limit
	}
	return w.Round(time.Second).String()
}

// quiet passes on errors only: the broker reports every client that hangs
// up at shutdown as a warning.
func quiet(l *slog.Logger) *slog.Logger { return slog.New(minLevel{l.Handler(), slog.LevelError}) }

type minLevel struct {
	slog.Handler
	min slog.Level
}

func (m minLevel) Enabled(ctx context.Context, l slog.Level) bool {
	return l >= m.min && m.Handler.Enabled(ctx, l)
}

func (m minLevel) WithAttrs(as []slog.Attr) slog.Handler {
	return minLevel{m.Handler.WithAttrs(as), m.min}
}

func (m minLevel) WithGroup(name string) slog.Handler {
	return minLevel{m.Handler.WithGroup(name), m.min}
}

// lockedWriter serialises lines written from several goroutines.
type lockedWriter struct {
	mu sync.Mutex
	w  io.Writer
}

func (l *lockedWriter) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.w.Write(p)
}
