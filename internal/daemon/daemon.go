// Package daemon wires the live pipeline of `holomix run`:
//
//	MQTT (ingest.Subscriber) → ingest.Committer → spool.db → ingest.Writer → InfluxDB
//	                                                 └→ feeder → internal/engine → alert outbox, status page,
//	                                                                               derived points (spool → InfluxDB)
//
// and its operational surface (/healthz, /readyz, /metrics, the status page).
//
// Exactly-once detection across crashes: the feeder hands committed readings
// to the engine in sequence order; every CheckpointInterval (and at shutdown)
// the engine snapshot, the quality-control and duplicate memory and the
// sequence numbers they include are saved in state.db in one bbolt
// transaction; the spool deletes a reading only when it is in the database
// AND below the saved checkpoint. On start the snapshot is restored and the
// spooled readings after it are fed again (alert submission is idempotent by
// alert id, derived points overwrite themselves in InfluxDB).
package daemon

import (
	"bytes"
	"compress/flate"
	"context"
	"crypto/tls"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"iter"
	"log/slog"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"runtime/debug"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/influxdata/influxdb-client-go/v2/api/write"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	bolt "go.etcd.io/bbolt"

	"holomix/alert"
	"holomix/config"
	"holomix/detect"
	"holomix/ingest"
	"holomix/internal/engine"
	"holomix/internal/httpauth"
	"holomix/internal/mmtrim"
	"holomix/internal/status"
)

// Defaults of Options.
const (
	DefaultCheckpointInterval = 5 * time.Second
	// shutdownBudget is the time Run takes at most to drain after ctx ends.
	shutdownBudget = 5 * time.Second
	// trimEvery is the period of trimLoop.
	trimEvery = 250 * time.Millisecond
	// gcPercentUnderLimit is the collector's growth factor while a memory
	// limit is in force (applyMemoryLimit).
	gcPercentUnderLimit = 400
	// maxCheckpointStretch bounds the stretched checkpoint interval (feedLoop).
	maxCheckpointStretch = time.Minute
	feedChunk            = 4096
	// redeliveryWindow is the number of recent timestamps per sensor that
	// quality control and the exact-duplicate memory keep.
	redeliveryWindow = 16
)

// Options configure Run.
type Options struct {
	// Config is the loaded configuration (config.Load: defaults applied,
	// secrets resolved). Required.
	Config *config.Config
	// Logger receives structured logs (nil: discarded).
	Logger *slog.Logger
	// Registry receives every metric (nil: a new registry; the global default
	// registry is never used).
	Registry *prometheus.Registry
	// Extra, when set, is mounted at "/" instead of the status page.
	Extra http.Handler
	// Status, when set, is the status page's store (the daemon feeds it every
	// column and event); nil: the daemon makes one from the configured sites.
	Status *status.Store
	// StatusPage tunes the status page (title, refresh); its Logger defaults
	// to the daemon's.
	StatusPage status.Options
	// Air, when set, delivers air temperatures (°C) to the sites' detectors
	// (frazil risk), like the sites' air_topic subscriptions. Not spooled:
	// an air temperature only informs a risk heuristic.
	Air <-chan AirTemp
	// Listener, when set, serves HTTP instead of listening on Config.HTTP.Listen.
	Listener net.Listener
	// CheckpointInterval is how often detection state is saved (<= 0: 5 s).
	CheckpointInterval time.Duration
	// OnReady is called once storage is open, the HTTP server listens and the
	// subscriber started connecting (tests, service notification).
	OnReady func(Info)
	// Reload delivers new configurations (loaded and validated by the caller,
	// e.g. on SIGHUP). The daemon applies what config.Changes marks live
	// (detector thresholds and hold times, alert receivers and status_url,
	// log level) and logs every other change as needing a restart.
	Reload <-chan *config.Config
	// LogLevel, when set, is the level variable of Logger's handler: a reload
	// changing log.level sets it.
	LogLevel *slog.LevelVar
	// Tap, when set, also receives every column and event that detection
	// derives, just before the status page and the alert outbox do, on the
	// detection goroutine: it must not block, and a Profile's slices are
	// reused after the call (the demo follows data time with it).
	Tap engine.Sink
}

// AirTemp is one air temperature for a site (°C, UTC).
type AirTemp struct {
	Site string
	Time time.Time
	C    float64
}

// Info describes a running daemon.
type Info struct {
	HTTPAddr string // address the HTTP server listens on
}

// Health is the daemon's state as the status page and /readyz see it.
type Health struct {
	BrokerConnected bool
	BrokerError     string
	SpoolOK         bool
	SpoolError      string
	BackPressure    bool
	SpoolPending    int64         // readings not yet in the database
	SpoolOldest     time.Duration // age of the oldest of them
	SpoolBytes      int64
	SpoolMaxBytes   int64
	DeadLetters     int64
	DBConfigured    bool
	DBReachable     bool
	DBError         string
	AcksPending     int
	Pending, Failed int // alert deliveries
}

type daemon struct {
	o        Options
	cfg      *config.Config
	log      *slog.Logger
	reg      *prometheus.Registry
	m        *ingest.Metrics
	dm       *daemonMetrics
	dir      string
	spool    *ingest.Spool
	state    *bolt.DB
	com      *ingest.Committer
	sub      *ingest.Subscriber
	wr       *ingest.Writer // nil without a database URL
	eng      *engine.Engine
	sink     *engineSink
	alMu     sync.RWMutex // guards al against the health readers during a reload
	al       *alert.Dispatcher
	alCancel context.CancelFunc
	alDone   chan error
	store    *status.Store
	ownStore bool // the daemon made store and feeds its alert log
	ckInt    time.Duration

	feedWake chan struct{}
	air      chan AirTemp // air temperatures from air_topic subscriptions
	fed      uint64       // last sequence handed to the engine (feeder goroutine)
	saved    struct{ eng, qc uint64 }
	// savedBytes is the size of what the last checkpoint wrote.
	savedBytes int
	// ckFull makes the next checkpoint rewrite every site's state (at
	// start, after a failed checkpoint and after a detection reload)
	// instead of only the sites that changed since the last one.
	ckFull bool
	// ckBusy: a checkpoint write is in flight (startCheckpoint); its result
	// arrives on ckDone. ckTook is what the last checkpoint took.
	ckBusy bool
	ckDone chan ckResult
	ckTook time.Duration
	ckZ    *flate.Writer // reused by deflate (feed goroutine)

	hmu      sync.Mutex // guards the cached delivery counts and spool probe
	hAt      time.Time
	hPending int
	hFailed  int
	probeAt  time.Time
	probeErr error
}

type daemonMetrics struct {
	checkpoints      prometheus.Counter
	checkpointErrors prometheus.Counter
	checkpointDur    prometheus.Histogram
	checkpointBytes  prometheus.Gauge
	fed              prometheus.Counter
	late             prometheus.Counter
	lateRedelivered  prometheus.Counter
	submitErrors     prometheus.Counter
	httpRejected     *prometheus.CounterVec
	airUsed          prometheus.Counter
	airDropped       prometheus.Counter
}

func newDaemonMetrics(reg prometheus.Registerer) *daemonMetrics {
	m := &daemonMetrics{
		checkpoints: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_checkpoints_total", Help: "Detection checkpoints saved to state.db."}),
		checkpointErrors: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_checkpoint_errors_total", Help: "Detection checkpoints that failed."}),
		checkpointDur: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "holomix_checkpoint_duration_seconds", Help: "Time to snapshot and save detection state.",
			Buckets: prometheus.ExponentialBuckets(0.001, 2, 14)}),
		checkpointBytes: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "holomix_checkpoint_written_bytes", Help: "Encoded state the last checkpoint wrote (the sites changed since the one before)."}),
		fed: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_readings_detected_total", Help: "Spooled readings handed to detection."}),
		late: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_readings_late_total", Help: "Readings that arrived after their profile was closed (re-stored flagged QCLate)."}),
		lateRedelivered: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_readings_redelivered_after_detection_total", Help: "Broker redeliveries of readings whose profile was already detected (ignored by detection, not re-flagged)."}),
		submitErrors: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_alert_submit_errors_total", Help: "Events the alert outbox refused or failed to store."}),
		httpRejected: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "holomix_http_auth_rejected_total", Help: "HTTP requests refused for missing or wrong credentials."}, []string{"reason"}),
	}
	air := prometheus.NewCounterVec(prometheus.CounterOpts{
		Name: "holomix_air_temperatures_total", Help: "Air temperatures from air_topic subscriptions: passed to detection (used) or dropped because detection lagged (dropped). Not stored in InfluxDB."}, []string{"outcome"})
	m.airUsed, m.airDropped = air.WithLabelValues("used"), air.WithLabelValues("dropped")
	reg.MustRegister(m.checkpoints, m.checkpointErrors, m.checkpointDur, m.checkpointBytes, m.fed, m.late, m.lateRedelivered, m.submitErrors, m.httpRejected, air)
	return m
}

// Run runs the daemon until ctx ends, then drains within 5 s: it stops taking
// messages, commits and acknowledges the batch in flight, disconnects, feeds
// detection, saves a checkpoint, flushes what the database accepts, closes the
// database client and returns nil. An error means start-up failed or a
// component failed fatally.
//
// Unless the GOMEMLIMIT environment variable is set, Run sets the Go
// runtime's soft memory limit to storage.memory_limit (0: none) for its
// duration.
func Run(ctx context.Context, o Options) error {
	if o.Config != nil {
		restore := applyMemoryLimit(int64(o.Config.Storage.MemoryLimit), o.Logger)
		defer restore()
	}
	d, err := open(o)
	if err != nil {
		return err
	}
	return d.run(ctx)
}

// applyMemoryLimit sets the runtime's soft memory limit to limit bytes
// (<= 0: none) unless GOMEMLIMIT is set, logs the limit in force, and
// returns a function that puts the previous limit back.
func applyMemoryLimit(limit int64, log *slog.Logger) (restore func()) {
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	if env, ok := os.LookupEnv("GOMEMLIMIT"); ok && env != "" {
		log.Info("memory limit", "limit_bytes", debug.SetMemoryLimit(-1), "from", "GOMEMLIMIT")
		return func() {}
	}
	if limit <= 0 {
		log.Info("memory limit", "limit", "none", "from", "storage.memory_limit")
		return func() {}
	}
	prev := debug.SetMemoryLimit(limit)
	// With a limit in force the collector may let the heap grow further
	// between cycles (GOGC 400: up to 5× the live heap) and spend far less
	// CPU, since the limit, not the growth factor, bounds memory; the Go GC
	// guide (go.dev/doc/gc-guide, "Memory limit") describes this pairing.
	// An explicit GOGC environment variable wins.
	prevGC, gc := -1, "GOGC"
	if env, ok := os.LookupEnv("GOGC"); !ok || env == "" {
		prevGC, gc = debug.SetGCPercent(gcPercentUnderLimit), strconv.Itoa(gcPercentUnderLimit)
	}
	log.Info("memory limit", "limit_bytes", limit, "limit_mib", limit>>20, "from", "storage.memory_limit", "gc_percent", gc)
	return func() {
		debug.SetMemoryLimit(prev)
		if prevGC >= 0 {
			debug.SetGCPercent(prevGC)
		}
	}
}

func open(o Options) (d *daemon, err error) {
	if o.Config == nil {
		return nil, errors.New("daemon: no configuration")
	}
	if o.Logger == nil {
		o.Logger = slog.New(slog.DiscardHandler)
	}
	if o.Registry == nil {
		o.Registry = prometheus.NewRegistry()
	}
	if o.CheckpointInterval <= 0 {
		o.CheckpointInterval = DefaultCheckpointInterval
	}
	cfg := o.Config
	d = &daemon{o: o, cfg: cfg, log: o.Logger, reg: o.Registry, ckInt: o.CheckpointInterval, feedWake: make(chan struct{}, 1), ckFull: true,
		ckDone: make(chan ckResult, 1)}
	d.dir = cfg.Storage.Dir
	if d.dir == "" {
		return nil, errors.New("daemon: storage.dir is empty")
	}
	if err := os.MkdirAll(d.dir, 0o750); err != nil {
		return nil, fmt.Errorf("daemon: storage directory: %w", err)
	}
	var closers []func()
	defer func() {
		if err != nil {
			for i := len(closers) - 1; i >= 0; i-- {
				closers[i]()
			}
		}
	}()

	for _, c := range []prometheus.Collector{collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{})} {
		// A registry handed in may carry them already.
		if err := d.reg.Register(c); err != nil && !errors.As(err, new(prometheus.AlreadyRegisteredError)) {
			return nil, fmt.Errorf("daemon: metrics: %w", err)
		}
	}
	d.m = ingest.NewMetrics(d.reg)
	d.dm = newDaemonMetrics(d.reg)

	d.spool, err = ingest.OpenSpool(filepath.Join(d.dir, "spool.db"), ingest.SpoolOptions{
		MaxBytes: int64(cfg.Storage.SpoolMaxBytes), DeadLetterMax: cfg.Storage.DeadLetterMax, Metrics: d.m})
	if err != nil {
		return nil, err
	}
	closers = append(closers, func() { d.spool.Close() })
	if err := ingest.RegisterSpool(d.reg, d.spool); err != nil {
		return nil, fmt.Errorf("daemon: spool metrics: %w", err)
	}
	d.state, err = bolt.Open(filepath.Join(d.dir, "state.db"), 0o640, &bolt.Options{Timeout: 2 * time.Second,
		InitialMmapSize: 256 << 20}) // address space: no remap as checkpoints grow
	if err != nil {
		return nil, fmt.Errorf("daemon: open state.db: %w", err)
	}
	closers = append(closers, func() { d.state.Close() })

	// Detection and what hangs off it.
	d.store = o.Status
	if d.store == nil && o.Extra == nil {
		metas := make([]status.SiteMeta, 0, len(cfg.Sites))
		for _, s := range cfg.Sites {
			metas = append(metas, status.SiteMeta{ID: s.ID, Name: s.Name, MaxDepth: s.MaxDepth, Intakes: s.Intakes, Depths: s.Depths})
		}
		d.store = status.NewStore(metas, 0)
		d.ownStore = true
	}
	d.air = make(chan AirTemp, 256)
	if d.al, err = d.openAlerts(cfg); err != nil {
		return nil, err
	}
	closers = append(closers, func() { d.al.Close() })
	d.sink = &engineSink{d: d}
	d.eng, err = engine.New(cfg, d.sink)
	if err != nil {
		return nil, err
	}

	// Ingestion.
	qcc := ingest.QCConfigFrom(cfg)
	// Redelivered messages are the newest of each sensor (those in flight
	// when the connection or the process went away), so a short duplicate
	// memory recognises them; it keeps the checkpoint small (quality control
	// saves every remembered timestamp) for installations with many sensors.
	qcc.DuplicateWindow = redeliveryWindow
	d.com = ingest.NewCommitter(ingest.CommitterOptions{
		Spool: d.spool, QC: ingest.NewQualityControl(qcc), DuplicateWindow: qcc.DuplicateWindow,
		Interval: cfg.Ingest.CommitInterval.D(), MaxReadings: cfg.Ingest.CommitMax,
		Resolve: siteResolver(cfg), Logger: d.log.With("component", "spool"), Metrics: d.m,
		OnCommit: d.committed,
	})
	if err := d.restore(); err != nil {
		return nil, err
	}
	airTopics := map[string]string{}
	for _, s := range cfg.Sites {
		if s.AirTopic != "" {
			airTopics[s.AirTopic] = s.ID
		}
	}
	d.sub, err = ingest.NewSubscriber(ingest.SubscriberOptions{MQTT: cfg.MQTT, MaxPayload: cfg.Ingest.MaxPayloadBytes,
		Sink: d.com, Logger: d.log.With("component", "mqtt"), Metrics: d.m,
		AirTopics: airTopics, OnAir: d.onAir})
	if err != nil {
		return nil, err
	}
	if cfg.Influx.URL != "" {
		var tc *tls.Config
		if cfg.Influx.TLS.IsSet() || strings.HasPrefix(strings.ToLower(cfg.Influx.URL), "https:") {
			if tc, err = cfg.Influx.TLS.ClientConfig(); err != nil {
				return nil, fmt.Errorf("daemon: influx tls: %w", err)
			}
		}
		d.wr, err = ingest.NewWriter(ingest.WriterOptions{Spool: d.spool, URL: cfg.Influx.URL, Org: cfg.Influx.Org,
			Bucket: cfg.Influx.Bucket, Token: cfg.Influx.Token.Get(), TLS: tc, Timeout: cfg.Influx.Timeout.D(),
			BatchSize: cfg.Influx.BatchSize, InFlight: cfg.Influx.WritesInFlight, Logger: d.log.With("component", "influx"), Metrics: d.m})
		if err != nil {
			return nil, err
		}
	} else {
		d.log.Warn("no influx.url: readings stay in the spool until it fills, then messages are no longer acknowledged")
	}
	return d, nil
}

// openAlerts opens the alert outbox (storage.dir/outbox.db) for cfg.
func (d *daemon) openAlerts(cfg *config.Config) (*alert.Dispatcher, error) {
	ao, err := alert.ConfigOptions(cfg)
	if err != nil {
		return nil, fmt.Errorf("daemon: %w", err)
	}
	ao.Logger, ao.Registerer = d.log.With("component", "alert"), d.reg
	if store := d.store; store != nil && d.ownStore {
		// The status page's alert log: every delivery that ended, per receiver.
		ao.OnOutcome = func(o alert.Outcome) {
			if o.State == alert.StatePending {
				return
			}
			store.ObserveAlert(status.AlertLine{Time: o.EventTime, Site: o.SiteID, Kind: o.Kind, Status: o.Status,
				Receiver: o.Receiver, Summary: o.Summary, Delivered: o.State == alert.StateDelivered, Error: o.Error})
		}
	}
	al, err := alert.Open(ao)
	if err != nil {
		return nil, fmt.Errorf("daemon: alert outbox: %w", err)
	}
	return al, nil
}

func (d *daemon) startAlerts() {
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	al := d.dispatcher()
	go func() { done <- al.Run(ctx) }()
	d.alCancel, d.alDone = cancel, done
}

func (d *daemon) stopAlerts() {
	d.alCancel()
	if err := <-d.alDone; err != nil {
		d.log.Warn("alert dispatcher stopped with an error", "err", err)
	}
}

func (d *daemon) dispatcher() *alert.Dispatcher {
	d.alMu.RLock()
	defer d.alMu.RUnlock()
	return d.al
}

// reload applies the live changes of nc (on the feeder goroutine, which owns
// the engine and submits to the dispatcher) and logs the others.
func (d *daemon) reload(nc *config.Config) {
	changes := config.Changes(d.cfg, nc)
	if len(changes) == 0 {
		d.log.Info("configuration reloaded: no changes")
		return
	}
	merged := *d.cfg
	var applied, restart []string
	var detectChanged, alertsChanged bool
	for _, c := range changes {
		switch {
		case !c.Live:
			restart = append(restart, c.Path+" "+c.What)
		case strings.HasPrefix(c.Path, "detect."):
			detectChanged = true
		case strings.HasPrefix(c.Path, "alerts."):
			alertsChanged = true
		case c.Path == "log.level":
			if d.o.LogLevel == nil {
				restart = append(restart, c.Path+" "+c.What)
				continue
			}
			var lv slog.Level
			if err := lv.UnmarshalText([]byte(nc.Log.Level)); err != nil {
				d.log.Error("configuration reload: log level not applied", "level", nc.Log.Level, "err", err)
				continue
			}
			d.o.LogLevel.Set(lv)
			merged.Log.Level = nc.Log.Level
			applied = append(applied, c.Path)
		default:
			restart = append(restart, c.Path+" "+c.What)
		}
	}
	if detectChanged {
		merged.Detect = nc.Detect
		if err := d.swapEngine(&merged); err != nil {
			d.log.Error("configuration reload: detector settings not applied", "err", err)
			merged.Detect = d.cfg.Detect
		} else {
			applied = append(applied, "detect")
		}
	}
	if alertsChanged {
		merged.Alerts = nc.Alerts
		if err := d.swapAlerts(&merged); err != nil {
			d.log.Error("configuration reload: alert settings not applied", "err", err)
			merged.Alerts = d.cfg.Alerts
		} else {
			applied = append(applied, "alerts")
		}
	}
	d.cfg = &merged
	d.log.Info("configuration reloaded", "applied", applied, "needs_restart", restart)
	if len(restart) > 0 {
		d.log.Warn("some changes take effect only after a restart", "changes", restart)
	}
}

// swapEngine rebuilds detection with cfg's thresholds and the current state.
func (d *daemon) swapEngine(cfg *config.Config) error {
	snap, err := d.eng.Snapshot()
	if err != nil {
		return err
	}
	ne, err := engine.New(cfg, d.sink)
	if err != nil {
		return err
	}
	if err := ne.Restore(snap); err != nil {
		return err
	}
	d.eng = ne
	d.ckFull = true
	return nil
}

// swapAlerts reopens the outbox with cfg's receivers (the old dispatcher is
// closed first: they share outbox.db). On failure the old settings return.
func (d *daemon) swapAlerts(cfg *config.Config) error {
	d.stopAlerts()
	old := d.dispatcher()
	if err := old.Close(); err != nil {
		d.log.Warn("closing the alert outbox for a reload", "err", err)
	}
	al, err := d.openAlerts(cfg)
	if err != nil {
		var err2 error
		if al, err2 = d.openAlerts(d.cfg); err2 != nil {
			return fmt.Errorf("%w; reopening the previous settings failed too: %v", err, err2)
		}
	}
	d.alMu.Lock()
	d.al = al
	d.alMu.Unlock()
	d.startAlerts()
	return err
}

// restore loads the last checkpoint and replays what was spooled after it.
// It reads the per-site format (checkpointFormat) and, once after an
// upgrade, the single-document format of earlier versions; the first
// checkpoint after start rewrites everything in the per-site format and
// removes the old keys.
func (d *daemon) restore() error {
	var hasEng bool
	var replayed int
	err := d.state.View(func(tx *bolt.Tx) error {
		b := tx.Bucket(bktCheckpoint)
		if b == nil {
			return nil
		}
		d.saved.eng, d.saved.qc = u64(b.Get(keyEngineSeq)), u64(b.Get(keyQCSeq))
		f := u64(b.Get(keyFormat))
		switch {
		case b.Get(keyFormat) == nil:
			return d.restoreLegacy(b, &hasEng, &replayed)
		case f != checkpointFormat && f != checkpointFormatPlain:
			return fmt.Errorf("checkpoint format %d, this version reads %d, %d and the earlier single-document one", f, checkpointFormat, checkpointFormatPlain)
		}
		var zerr error // the first chunk that did not decompress
		chunks := func(name []byte) iter.Seq2[string, []byte] {
			if f == checkpointFormatPlain {
				return chunksOf(b, name)
			}
			return func(yield func(string, []byte) bool) {
				for site, z := range chunksOf(b, name) {
					c, err := inflate(z)
					if err != nil {
						zerr = fmt.Errorf("state of site %q in %s: %w", site, name, err)
						return
					}
					if !yield(site, c) {
						return
					}
				}
			}
		}
		if head := b.Get(keyEngineHead); head != nil {
			hasEng = true
			err := d.eng.RestoreChunks(head, chunks(bktEngineSites))
			if err = errors.Join(zerr, err); err != nil {
				return fmt.Errorf("%w (move state.db away to start detection afresh)", err)
			}
		}
		var err error
		replayed, err = d.com.RestoreChunks(chunks(bktQCSites), chunks(bktDupSites), d.saved.qc)
		if err = errors.Join(zerr, err); err != nil {
			return fmt.Errorf("restore quality control: %w", err)
		}
		return nil
	})
	if err == nil && !hasEng {
		// No checkpoint yet: quality control still replays the spool.
		replayed, err = d.com.Restore(nil, nil, d.saved.qc)
		if err != nil {
			err = fmt.Errorf("restore quality control: %w", err)
		}
	}
	if err != nil {
		return fmt.Errorf("daemon: read checkpoint: %w", err)
	}
	d.fed = d.saved.eng
	if hasEng {
		if err := d.spool.SetCheckpoint(min(d.saved.eng, d.saved.qc)); err != nil {
			return err
		}
	}
	st, _ := d.spool.Stats()
	d.log.Info("state restored", "checkpoint_seq", d.saved.eng, "qc_seq", d.saved.qc, "qc_replayed", replayed,
		"spool_last_seq", st.LastSeq, "spool_pending", st.Pending, "to_detect", st.LastSeq-min(st.LastSeq, d.fed))
	return nil
}

// restoreLegacy reads a checkpoint of the single-document format (engine,
// qc and dups keys).
func (d *daemon) restoreLegacy(b *bolt.Bucket, hasEng *bool, replayed *int) error {
	engState := b.Get(keyEngine)
	if engState == nil {
		return nil
	}
	*hasEng = true
	if err := d.eng.Restore(engState); err != nil {
		return fmt.Errorf("%w (move state.db away to start detection afresh)", err)
	}
	n, err := d.com.Restore(b.Get(keyQC), b.Get(keyDups), d.saved.qc)
	if err != nil {
		return fmt.Errorf("restore quality control: %w", err)
	}
	*replayed = n
	d.log.Info("checkpoint of the single-document format read; the next checkpoint rewrites it per site")
	return nil
}

// chunksOf yields the (site, chunk) pairs of the nested bucket name of b
// (nothing when it does not exist). The chunks are valid during the
// transaction only.
func chunksOf(b *bolt.Bucket, name []byte) iter.Seq2[string, []byte] {
	return func(yield func(string, []byte) bool) {
		nb := b.Bucket(name)
		if nb == nil {
			return
		}
		c := nb.Cursor()
		for k, v := c.First(); k != nil; k, v = c.Next() {
			if v == nil {
				continue // a nested bucket: not written by this version
			}
			if !yield(string(k), v) {
				return
			}
		}
	}
}

// onAir passes an air temperature from an air_topic subscription to the
// feeder goroutine (dropped with a warning and a count when the feeder lags
// far behind: 256 air temperatures waiting).
func (d *daemon) onAir(site string, t time.Time, c float64) {
	select {
	case d.air <- AirTemp{Site: site, Time: t, C: c}:
		d.dm.airUsed.Inc()
	default:
		d.dm.airDropped.Inc()
		d.log.Warn("air temperature dropped: detection is busy", "site", site)
	}
}

func (d *daemon) committed(uint64) {
	select {
	case d.feedWake <- struct{}{}:
	default:
	}
	if d.wr != nil {
		d.wr.Notify()
	}
}

func (d *daemon) run(ctx context.Context) error {
	// HTTP first: /healthz answers while the broker is still unreachable.
	ln := d.o.Listener
	if ln == nil {
		var err error
		if ln, err = net.Listen("tcp", d.cfg.HTTP.Listen); err != nil {
			d.closeAll()
			return fmt.Errorf("daemon: http listen %s: %w", d.cfg.HTTP.Listen, err)
		}
	}
	srv := &http.Server{Handler: d.handler(), ReadHeaderTimeout: 10 * time.Second, ErrorLog: slog.NewLogLogger(d.log.Handler(), slog.LevelWarn)}
	httpDone := make(chan error, 1)
	go func() { httpDone <- srv.Serve(ln) }()
	d.log.Info("http listening", "addr", ln.Addr().String())

	comCtx, comCancel := context.WithCancel(context.Background())
	comDone := make(chan error, 1)
	go func() { comDone <- d.com.Run(comCtx) }()
	feedCtx, feedCancel := context.WithCancel(context.Background())
	feedDone := make(chan error, 1)
	go func() { feedDone <- d.feedLoop(feedCtx) }()
	wrCtx, wrCancel := context.WithCancel(context.Background())
	wrDone := make(chan error, 1)
	go func() {
		if d.wr == nil {
			<-wrCtx.Done()
			wrDone <- nil
			return
		}
		wrDone <- d.wr.Run(wrCtx)
	}()
	d.startAlerts()
	trimCtx, trimCancel := context.WithCancel(context.Background())
	trimDone := make(chan struct{})
	go func() { defer close(trimDone); d.trimLoop(trimCtx) }()
	subCtx, subCancel := context.WithCancel(context.Background())
	d.sub.Start(subCtx)
	if d.o.OnReady != nil {
		d.o.OnReady(Info{HTTPAddr: ln.Addr().String()})
	}

	var runErr error
	select {
	case <-ctx.Done():
	case err := <-comDone:
		comDone <- err
		runErr = fmt.Errorf("daemon: spool committer stopped: %w", err)
	case err := <-feedDone:
		feedDone <- err
		runErr = fmt.Errorf("daemon: detection feed stopped: %w", err)
	case err := <-wrDone:
		wrDone <- err
		runErr = fmt.Errorf("daemon: database writer stopped: %v", err)
	case err := <-httpDone:
		httpDone <- err
		runErr = fmt.Errorf("daemon: http server stopped: %w", err)
	}
	if runErr != nil {
		d.log.Error("stopping after a failure", "err", runErr)
	} else {
		d.log.Info("stopping: draining")
	}
	start := time.Now()
	deadline := start.Add(shutdownBudget - 250*time.Millisecond)
	trimCancel()
	<-trimDone

	// 1. Stop taking messages; commit and acknowledge what is in flight; disconnect.
	d.sub.StopIntake()
	comCancel()
	if err := <-comDone; err != nil && runErr == nil {
		runErr = fmt.Errorf("daemon: spool committer: %w", err)
	}
	subCancel()
	d.sub.Disconnect(200 * time.Millisecond)
	// 2. Feed detection what was committed and save the checkpoint.
	feedCancel()
	if err := <-feedDone; err != nil && runErr == nil {
		runErr = err
	}
	// 3. Write what the database takes in the time left.
	wrCancel()
	if err := <-wrDone; err != nil && runErr == nil {
		runErr = err
	}
	if d.wr != nil {
		if ok, _, _, _ := d.wr.Reachable(); ok {
			fctx, cancel := context.WithDeadline(context.Background(), deadline.Add(-time.Second))
			if err := d.wr.Flush(fctx); err != nil && fctx.Err() == nil {
				d.log.Warn("final flush incomplete; the rest stays spooled", "err", err)
			}
			cancel()
		}
	}
	// 4. Alerts, HTTP, files.
	d.stopAlerts()
	hctx, cancel := context.WithDeadline(context.Background(), deadline)
	_ = srv.Shutdown(hctx)
	cancel()
	d.closeAll()
	st := "clean"
	if runErr != nil {
		st = "after failure"
	}
	d.log.Info("stopped", "how", st, "took", time.Since(start).Round(time.Millisecond))
	return runErr
}

// trimLoop keeps the pages of the spool, state and outbox files that the
// daemon has read out of its resident set, every trimEvery (see mmtrim: the
// page cache keeps them, the resident set size stays that of the daemon's
// own memory).
func (d *daemon) trimLoop(ctx context.Context) {
	t := time.NewTicker(trimEvery)
	defer t.Stop()
	logged := false
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		errs := []error{d.spool.TrimResident(), mmtrim.Trim(d.state)}
		if disp := d.dispatcher(); disp != nil {
			errs = append(errs, disp.TrimResident())
		}
		if err := errors.Join(errs...); err != nil && !logged {
			logged = true // once: trimming is an economy, not a duty
			d.log.Warn("dropping mapped file pages from memory failed", "err", err)
		}
	}
}

func (d *daemon) closeAll() {
	if d.wr != nil {
		d.wr.Close()
	}
	if err := d.dispatcher().Close(); err != nil {
		d.log.Warn("closing the alert outbox", "err", err)
	}
	if err := d.state.Close(); err != nil {
		d.log.Warn("closing state.db", "err", err)
	}
	if err := d.spool.Close(); err != nil {
		d.log.Warn("closing the spool", "err", err)
	}
}

// feedLoop hands committed readings to detection and checkpoints. The
// checkpoint interval stretches to 20 times the last checkpoint's duration
// when that is longer (large installations), so saving state never takes more
// than about 5 % of the time, but to at most maxCheckpointStretch: a
// checkpoint that waited for the committer (whose commits a full disk keeps
// failing) must not postpone the next one for long, since the spool deletes
// readings only below a checkpoint and stays full without one. The state is
// encoded here and written by another goroutine (startCheckpoint), so a slow
// fsync of state.db delays no detection and no alert.
func (d *daemon) feedLoop(ctx context.Context) error {
	d.sink.ctx = ctx
	defer d.waitCheckpoint()
	ext, reload := d.o.Air, d.o.Reload
	timer := time.NewTimer(d.ckInt)
	defer timer.Stop()
	for {
		if err := d.feedAll(ctx); err != nil {
			return err
		}
		select {
		case <-ctx.Done():
			if err := d.feedAll(ctx); err != nil {
				return err
			}
			d.checkpoint()
			return nil
		case <-d.feedWake:
		case r := <-d.ckDone:
			d.applyCheckpoint(r)
		case nc, ok := <-reload:
			if ok {
				if err := d.feedAll(ctx); err != nil {
					return err
				}
				d.reload(nc)
			} else {
				reload = nil
			}
		case a := <-d.air:
			d.eng.AddAir(a.Site, a.Time, a.C)
		case a, ok := <-ext:
			if ok {
				d.eng.AddAir(a.Site, a.Time, a.C)
			} else {
				ext = nil
			}
		case <-timer.C:
			if err := d.feedAll(ctx); err != nil {
				return err
			}
			d.startCheckpoint()
			timer.Reset(max(d.ckInt, min(20*d.ckTook, maxCheckpointStretch)))
		}
	}
}

// feedAll feeds every committed reading after d.fed and spools the derived
// points, so that they are durable before any checkpoint includes them.
func (d *daemon) feedAll(ctx context.Context) error {
	var sink ingest.ReadingSink = d.eng
	var buf []ingest.Entry
	for {
		var err error
		buf, err = d.spool.ReadReadings(d.fed, feedChunk, buf[:0])
		if err != nil {
			return fmt.Errorf("daemon: feed: %w", err)
		}
		if len(buf) == 0 {
			return nil
		}
		for i := range buf {
			e := &buf[i]
			if sink.Add(e.Reading) {
				if e.Redelivered {
					// A broker redelivery of a reading detected before (beyond
					// the duplicate memory): not late, and its stored flags stand.
					d.dm.lateRedelivered.Inc()
					d.fed = e.Seq
					continue
				}
				// Its profile was already detected: store it again flagged late
				// (same series and time: the flagged copy replaces the first).
				r := e.Reading
				r.QC |= ingest.QCLate
				l := ingest.AppendLineProtocol(nil, &r)
				d.sink.lines = append(d.sink.lines, l[:len(l)-1])
				d.dm.late.Inc()
			}
			d.fed = e.Seq
		}
		if err := d.sink.err; err != nil {
			return fmt.Errorf("daemon: alert outbox: %w", err)
		}
		if len(d.sink.lines) > 0 {
			if err := d.spoolDerived(ctx); err != nil {
				return err
			}
		}
		// Counted once the readings' derived points are in the spool.
		d.dm.fed.Add(float64(len(buf)))
	}
}

// spoolDerived appends the derived points of what was fed. A full storage
// disk (ENOSPC, EDQUOT) is retried until space returns or the feed stops, as
// the committer retries its commits: detection waits, nothing is dropped, and
// since no checkpoint passes these readings until their points are spooled,
// a restart derives the points again. Other errors stop the daemon.
func (d *daemon) spoolDerived(ctx context.Context) error {
	var retry ingest.Retry
	for {
		err := d.spool.AppendLinesAfter(d.fed, d.sink.lines)
		if err == nil {
			clear(d.sink.lines)
			d.sink.lines = d.sink.lines[:0]
			return nil
		}
		if !ingest.DiskFull(err) {
			return fmt.Errorf("daemon: spool derived points: %w", err)
		}
		if retry.LogNow() {
			d.log.Error("storage disk full: detection waits until its derived points can be spooled", "err", err, "points", len(d.sink.lines), "attempt", retry.Attempt())
		}
		if !retry.Wait(ctx) {
			return fmt.Errorf("daemon: spool derived points: %w", err)
		}
	}
}

// state.db layout: the bucket "checkpoint" holds the sequence numbers, the
// format, the time of the save and the engine's head (counters), and three
// nested buckets the per-site state, one key per site id: the engine's
// (detector and profile assembly), quality control's and the duplicate
// memory's. Earlier versions kept each of the three in one document under
// the keys engine, qc and dups (read by restoreLegacy).
var (
	bktCheckpoint  = []byte("checkpoint")
	keyEngine      = []byte("engine") // single-document format
	keyEngineSeq   = []byte("engine_seq")
	keyQC          = []byte("qc")   // single-document format
	keyDups        = []byte("dups") // single-document format
	keyQCSeq       = []byte("qc_seq")
	keySaved       = []byte("saved_at")
	keyFormat      = []byte("format")
	keyEngineHead  = []byte("engine_head")
	bktEngineSites = []byte("engine_sites")
	bktQCSites     = []byte("qc_sites")
	bktDupSites    = []byte("dup_sites")
)

// checkpointFormat is the value of the format key: per-site state, each
// chunk compressed (deflate). Format 2, the same uncompressed, is still
// read; the first checkpoint after start rewrites every chunk.
const (
	checkpointFormat      = 3
	checkpointFormatPlain = 2
)

// checkpoint saves the engine's state (at d.fed) and the QC and duplicate
// memory (at their own, later or equal, sequence) in one transaction, then
// lets the spool delete below the smaller of the two, and returns what it
// took. Only the sites whose state changed since the last checkpoint are
// written (every site after start or a failure), each encoded on its own.
// It runs on the feed goroutine and waits for the write; feedLoop uses
// startCheckpoint, which leaves the write to another goroutine.
func (d *daemon) checkpoint() time.Duration {
	d.waitCheckpoint()
	job, err := d.encodeCheckpoint()
	if job == nil {
		if err != nil {
			d.applyCheckpoint(ckResult{err: err, took: 0})
		}
		return 0
	}
	r := d.writeCheckpoint(job)
	d.applyCheckpoint(r)
	return r.took
}

// startCheckpoint encodes a checkpoint on the feed goroutine and writes it
// on another, so that detection (and the alerts it raises) does not wait
// for the state file's write and fsync. At most one write is in flight: a
// tick that finds one still running does nothing.
func (d *daemon) startCheckpoint() {
	if d.ckBusy {
		return
	}
	job, err := d.encodeCheckpoint()
	if job == nil {
		if err != nil {
			d.applyCheckpoint(ckResult{err: err})
		}
		return
	}
	d.ckBusy = true
	go func() { d.ckDone <- d.writeCheckpoint(job) }()
}

// waitCheckpoint applies the write in flight, if any (feed goroutine).
func (d *daemon) waitCheckpoint() {
	if d.ckBusy {
		d.applyCheckpoint(<-d.ckDone)
	}
}

// ckJob is a checkpoint encoded on the feed goroutine: per-site chunks of
// the engine, the QC memory and the duplicate memory (in the nested buckets
// of ckBuckets' order), the engine's head, and the sequences they stand at.
type ckJob struct {
	full      bool
	chunks    [3][]ckChunk
	head      []byte
	fed, qseq uint64
	bytes     int
	start     time.Time
}

type ckChunk struct {
	site  string
	chunk []byte
}

type ckResult struct {
	job  *ckJob
	err  error
	took time.Duration
}

var ckBuckets = [3][]byte{bktEngineSites, bktQCSites, bktDupSites}

// encodeCheckpoint collects what changed since the last checkpoint (nil, nil:
// nothing did). The change records are reset: if the write fails, the next
// checkpoint rewrites everything (applyCheckpoint sets ckFull).
func (d *daemon) encodeCheckpoint() (*ckJob, error) {
	qcSeq := d.com.LastSeq()
	if d.fed == d.saved.eng && qcSeq == d.saved.qc {
		return nil, nil
	}
	job := &ckJob{full: d.ckFull, fed: d.fed, start: time.Now()}
	d.ckFull = false // this job rewrites everything if needed; a failure sets it again
	collect := func(i int) ingest.ChunkFunc {
		return func(site string, chunk []byte) error {
			z, err := d.deflate(chunk) // a copy: the caller reuses chunk
			if err != nil {
				return fmt.Errorf("checkpoint: compress the state of site %q: %w", site, err)
			}
			job.bytes += len(z)
			job.chunks[i] = append(job.chunks[i], ckChunk{site, z})
			return nil
		}
	}
	head, err := d.eng.WriteStateChunks(job.full, collect(0))
	if err != nil {
		return nil, err
	}
	job.head = head
	if job.qseq, err = d.com.WriteState(job.full, collect(1), collect(2)); err != nil {
		return nil, err
	}
	if job.qseq < job.fed {
		return nil, fmt.Errorf("quality-control memory at %d is behind detection at %d", job.qseq, job.fed)
	}
	return job, nil
}

// deflate compresses one state chunk (compress/flate, RFC 1951, fastest
// level). Detector state is JSON and compresses several times over: the
// checkpoint writes, fsyncs and maps that much less.
func (d *daemon) deflate(chunk []byte) ([]byte, error) {
	var out bytes.Buffer
	out.Grow(len(chunk)/3 + 64)
	if d.ckZ == nil {
		z, err := flate.NewWriter(&out, flate.BestSpeed)
		if err != nil {
			return nil, err
		}
		d.ckZ = z
	} else {
		d.ckZ.Reset(&out)
	}
	if _, err := d.ckZ.Write(chunk); err != nil {
		return nil, err
	}
	if err := d.ckZ.Close(); err != nil {
		return nil, err
	}
	return out.Bytes(), nil
}

// inflate reverses deflate.
func inflate(z []byte) ([]byte, error) {
	r := flate.NewReader(bytes.NewReader(z))
	defer r.Close()
	out, err := io.ReadAll(r)
	if err != nil {
		return nil, fmt.Errorf("decompress: %w", err)
	}
	return out, nil
}

// writeCheckpoint stores job in state.db in one transaction and moves the
// spool's checkpoint (any goroutine; state.db and the spool are safe for
// concurrent use).
func (d *daemon) writeCheckpoint(job *ckJob) ckResult {
	err := d.state.Update(func(tx *bolt.Tx) error {
		b, err := tx.CreateBucketIfNotExists(bktCheckpoint)
		if err != nil {
			return err
		}
		for i, name := range ckBuckets {
			if job.full && b.Bucket(name) != nil {
				// Rewritten whole: drop sites that are gone.
				if err := b.DeleteBucket(name); err != nil {
					return err
				}
			}
			nb, err := b.CreateBucketIfNotExists(name)
			if err != nil {
				return err
			}
			for _, c := range job.chunks[i] {
				if err := nb.Put([]byte(c.site), c.chunk); err != nil {
					return err
				}
			}
		}
		for _, k := range [][]byte{keyEngine, keyQC, keyDups} {
			if err := b.Delete(k); err != nil {
				return err
			}
		}
		for _, kv := range [][2][]byte{{keyEngineHead, job.head}, {keyEngineSeq, be64(job.fed)}, {keyQCSeq, be64(job.qseq)},
			{keyFormat, be64(checkpointFormat)}, {keySaved, be64(uint64(time.Now().UnixNano()))}} {
			if err := b.Put(kv[0], kv[1]); err != nil {
				return err
			}
		}
		return nil
	})
	if err != nil {
		err = fmt.Errorf("state.db: %w", err)
	} else {
		err = d.spool.SetCheckpoint(min(job.fed, job.qseq))
		// The state file's pages this write touched need not stay resident.
		_ = mmtrim.Trim(d.state)
	}
	return ckResult{job: job, err: err, took: time.Since(job.start)}
}

// applyCheckpoint records the outcome of a checkpoint (feed goroutine).
func (d *daemon) applyCheckpoint(r ckResult) {
	d.ckBusy = false
	if r.err != nil {
		// The change records were reset: the next checkpoint writes everything.
		d.ckFull = true
		d.dm.checkpointErrors.Inc()
		d.log.Error("checkpoint failed; the previous one stays valid", "err", r.err)
		return
	}
	job := r.job
	d.saved.eng, d.saved.qc = job.fed, job.qseq
	d.savedBytes = job.bytes
	d.ckTook = r.took
	d.dm.checkpoints.Inc()
	d.dm.checkpointDur.Observe(r.took.Seconds())
	d.dm.checkpointBytes.Set(float64(d.savedBytes))
	d.log.Debug("checkpoint saved", "seq", job.fed, "qc_seq", job.qseq, "took", r.took, "bytes", job.bytes,
		"chunks", len(job.chunks[0])+len(job.chunks[1])+len(job.chunks[2]), "full", job.full)
}

// engineSink receives what detection derives (on the feeder goroutine).
type engineSink struct {
	d     *daemon
	lines [][]byte
	// ctx is the feed's context (set by feedLoop). An event the alert outbox
	// cannot store for a full disk is retried until it can or ctx ends; err
	// then holds the failure and the feed stops without a checkpoint past
	// the event, so that the next start raises it again.
	ctx context.Context
	err error
}

func lineOf(p *write.Point) []byte {
	return []byte(strings.TrimRight(write.PointToLineProtocol(p, time.Nanosecond), "\n"))
}

func (s *engineSink) Column(c detect.Column, p detect.Profile) {
	if s.d.o.Tap != nil {
		s.d.o.Tap.Column(c, p)
	}
	s.lines = append(s.lines, engine.AppendColumnLine(nil, c))
	if s.d.store != nil {
		s.d.store.ObserveColumn(c, p)
	}
}

func (s *engineSink) Event(e detect.Event) {
	if s.d.o.Tap != nil {
		s.d.o.Tap.Event(e)
	}
	if l := lineOf(engine.EventPoint(e)); len(l) > 0 {
		s.lines = append(s.lines, l)
	}
	if s.d.store != nil {
		s.d.store.ObserveEvent(e)
	}
	s.d.log.Info("event", "site", e.Site, "kind", string(e.Kind), "status", string(e.Status), "time", e.Time, "summary", e.Summary)
	if err := s.submit(e); err != nil {
		s.d.dm.submitErrors.Inc()
		s.d.log.Error("alert outbox refused an event", "site", e.Site, "kind", string(e.Kind), "err", err)
	}
}

// submit hands an event to the alert outbox. A full storage disk (ENOSPC,
// EDQUOT) is waited out with back-off: dropping the event would lose its
// alert for good, since detection has moved past it. If the feed stops
// meanwhile, s.err keeps the failure (see engineSink.ctx).
func (s *engineSink) submit(e detect.Event) error {
	ctx := s.ctx
	if ctx == nil {
		ctx = context.Background()
	}
	var retry ingest.Retry
	for {
		err := s.d.dispatcher().Submit(e)
		if err == nil || !ingest.DiskFull(err) {
			return err
		}
		if retry.LogNow() {
			s.d.log.Error("storage disk full: detection waits until the alert outbox can store the event",
				"site", e.Site, "kind", string(e.Kind), "err", err, "attempt", retry.Attempt())
		}
		if !retry.Wait(ctx) {
			s.err = err
			return nil
		}
	}
}

// siteResolver maps a site as named by a payload or topic to the configured
// id: an exact id, else a configured name or id in any letter case (ids win
// over names), else the name unchanged (the same rule as engine.Resolve, as
// a pure function the committer goroutine may call).
func siteResolver(cfg *config.Config) func(string) string {
	ids := make(map[string]bool, len(cfg.Sites))
	names := make(map[string]string, 2*len(cfg.Sites))
	for _, s := range cfg.Sites {
		ids[s.ID] = true
		if s.Name != "" {
			if _, taken := names[strings.ToLower(s.Name)]; !taken {
				names[strings.ToLower(s.Name)] = s.ID
			}
		}
	}
	for _, s := range cfg.Sites {
		names[strings.ToLower(s.ID)] = s.ID
	}
	return func(raw string) string {
		if ids[raw] {
			return raw
		}
		if id, ok := names[strings.ToLower(strings.TrimSpace(raw))]; ok {
			return id
		}
		return raw
	}
}

// Health returns the daemon's state (safe from any goroutine).
func (d *daemon) health() Health {
	h := Health{BrokerConnected: d.sub.Connected(), DBConfigured: d.wr != nil, AcksPending: d.com.Pending(), BackPressure: d.com.BackPressure()}
	if err := d.sub.LastError(); err != nil && !h.BrokerConnected {
		h.BrokerError = err.Error()
	}
	if h.BrokerConnected {
		select {
		case <-d.sub.Subscribed():
		default:
			h.BrokerConnected, h.BrokerError = false, "connected, not yet subscribed"
		}
	}
	st, err := d.spool.Stats()
	h.SpoolPending, h.SpoolOldest, h.SpoolBytes, h.SpoolMaxBytes, h.DeadLetters = st.Pending, st.OldestPending, st.Bytes, st.MaxBytes, st.DeadLetters
	cerr, lastOK := d.com.CommitError()
	if cerr == nil && time.Since(lastOK) > 30*time.Second {
		// Idle: prove the spool still takes a write (at most every 30 s).
		d.hmu.Lock()
		if time.Since(d.probeAt) > 30*time.Second {
			d.probeAt, d.probeErr = time.Now(), d.spool.Writable()
		}
		cerr = d.probeErr
		d.hmu.Unlock()
	}
	switch {
	case err != nil:
		h.SpoolError = err.Error()
	case cerr != nil:
		h.SpoolError = cerr.Error()
	case h.BackPressure:
		h.SpoolError = "full: messages are not acknowledged until the database catches up"
	default:
		h.SpoolOK = true
	}
	if d.wr != nil {
		ok, known, lerr, _ := d.wr.Reachable()
		h.DBReachable = ok
		if !ok && lerr != nil {
			h.DBError = lerr.Error()
		} else if !known {
			h.DBError = "not contacted yet"
		}
	}
	d.hmu.Lock()
	if time.Since(d.hAt) > 5*time.Second {
		al := d.dispatcher()
		if p, err := al.Pending(); err == nil {
			d.hPending = len(p)
		}
		if f, err := al.Failed(); err == nil {
			d.hFailed = len(f)
		}
		d.hAt = time.Now()
	}
	h.Pending, h.Failed = d.hPending, d.hFailed
	d.hmu.Unlock()
	return h
}

func (d *daemon) statusHealth() status.Health {
	h := d.health()
	extra := map[string]string{"acks pending": fmt.Sprint(h.AcksPending), "dead letters": fmt.Sprint(h.DeadLetters)}
	if h.BackPressure {
		extra["back-pressure"] = "spool full: messages not acknowledged"
	}
	return status.Health{BrokerConnected: h.BrokerConnected, SpoolDepth: int(h.SpoolPending), SpoolOldest: h.SpoolOldest,
		DBReachable: h.DBReachable, DBNotConfigured: !h.DBConfigured, PendingDeliveries: h.Pending, FailedDeliveries: h.Failed, Extra: extra}
}

type component struct {
	OK     bool   `json:"ok"`
	Detail string `json:"detail,omitempty"`
}

// readiness is the /readyz body.
type readiness struct {
	Ready    bool      `json:"ready"`
	Broker   component `json:"broker"`
	Spool    component `json:"spool"`
	Database component `json:"database"`
}

func (d *daemon) readiness() readiness {
	h := d.health()
	r := readiness{
		Broker: component{OK: h.BrokerConnected, Detail: h.BrokerError},
		Spool:  component{OK: h.SpoolOK, Detail: h.SpoolError},
	}
	if !h.BrokerConnected && r.Broker.Detail == "" {
		r.Broker.Detail = "not connected"
	}
	switch {
	case !h.DBConfigured:
		r.Database = component{OK: true, Detail: "not configured: readings stay spooled"}
	case h.DBReachable:
		r.Database = component{OK: true}
	default:
		// Not fatal for readiness while the spool takes the readings.
		r.Database = component{OK: h.SpoolOK, Detail: fmt.Sprintf("unreachable, spooling (%d readings waiting): %s", h.SpoolPending, h.DBError)}
	}
	r.Ready = r.Broker.OK && r.Spool.OK && r.Database.OK
	return r
}

func (d *daemon) handler() http.Handler {
	mux := http.NewServeMux()
	mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, _ *http.Request) {
		w.Header().Set("Content-Type", "text/plain; charset=utf-8")
		w.Header().Set("Cache-Control", "no-store")
		fmt.Fprintln(w, "ok")
	})
	mux.HandleFunc("GET /readyz", func(w http.ResponseWriter, _ *http.Request) {
		r := d.readiness()
		w.Header().Set("Content-Type", "application/json")
		w.Header().Set("Cache-Control", "no-store")
		if !r.Ready {
			w.WriteHeader(http.StatusServiceUnavailable)
		}
		_ = json.NewEncoder(w).Encode(r)
	})
	rejected := func(reason string) { d.dm.httpRejected.WithLabelValues(reason).Inc() }
	mux.Handle("GET /metrics", httpauth.WrapCounting(promhttp.HandlerFor(d.reg, promhttp.HandlerOpts{Registry: d.reg}), d.cfg.HTTP, rejected))
	root := d.o.Extra
	if root == nil {
		po := d.o.StatusPage
		if po.Logger == nil {
			po.Logger = d.log.With("component", "status")
		}
		root = status.Handler(d.store, d.statusHealth, po)
	}
	mux.Handle("/", httpauth.WrapCounting(root, d.cfg.HTTP, rejected))
	return mux
}

func be64(v uint64) []byte {
	var b [8]byte
	binary.BigEndian.PutUint64(b[:], v)
	return b[:]
}

func u64(b []byte) uint64 {
	if len(b) != 8 {
		return 0
	}
	return binary.BigEndian.Uint64(b)
}
