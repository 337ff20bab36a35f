// Command bench measures holomix under load on this machine (started by
// deploy/bench.sh): it starts its own Mosquitto and InfluxDB 1.8 on loopback
// ports and compares, interleaved A B A B over several rounds,
//
//	A  a bare pipeline (paho at QoS 1 → encoding/json → influxdb-client-go),
//	B  `holomix run` with the whole path (quality control, durable spool,
//	   profile assembly, detection, derived series, alert outbox with a
//	   local webhook receiver),
//
// fed the same pre-generated messages by the same publisher. Method: the
// messages are published while the consumer is offline (its persistent
// session holds them at the broker), then the consumer starts and the clock
// runs until an InfluxDB count query confirms every reading; the publisher
// thus does not compete for the CPU during the measurement. It also measures
// publish-to-webhook alert latency at half the sustainable load, the peak
// RSS of the daemon with 1,000 sites × 30 depths and (through
// deploy/bench-replay.sh) replay throughput, and prints a markdown table
// with the machine description. Raw outputs go to bench-out/.
package main

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net/http"
	"os"
	"os/exec"
	"os/signal"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"time"

	"holomix/deploy/internal/rig"
	"holomix/internal/testenv"
)

type options struct {
	out         string
	rounds      int
	single      int // readings per round, one reading per message
	profile     int // readings per round, 24-depth profiles
	inflights   []int
	latencyFor  time.Duration
	rssSites    int
	rssDepths   int
	rssSteps    int
	replay      bool
	parts       map[string]bool
	latencyRate float64 // msgs/s when the throughput part is skipped
	batch       int     // influx.batch_size of B (0: the default, 5000)
	inFlight    int     // influx.writes_in_flight of B (0: the default, 2)
}

func main() {
	var o options
	var inflights, parts string
	flag.StringVar(&o.out, "out", "", "directory for raw outputs (default bench-out/DATE-TIME under the repository)")
	flag.IntVar(&o.rounds, "rounds", 3, "A/B rounds per workload and broker setting")
	flag.IntVar(&o.single, "single", 240000, "readings per round with one reading per message (100 sites × 24 depths; 0 skips this workload)")
	flag.IntVar(&o.profile, "profile", 960000, "readings per round with one 24-depth profile per message (100 sites; 0 skips this workload)")
	flag.StringVar(&inflights, "inflight", "20,1000", "broker max_inflight_messages settings to run (20 is Mosquitto's default, 1000 what deploy/mosquitto.conf recommends)")
	flag.DurationVar(&o.latencyFor, "latency-for", 45*time.Second, "how long to publish during the alert-latency measurement")
	flag.Float64Var(&o.latencyRate, "latency-rate", 0, "messages/s for the latency measurement (0: half the measured B profile rate)")
	flag.IntVar(&o.rssSites, "rss-sites", 1000, "sites for the memory measurement")
	flag.IntVar(&o.rssDepths, "rss-depths", 30, "depths per site for the memory measurement")
	flag.IntVar(&o.rssSteps, "rss-steps", 24, "profiles per site for the memory measurement")
	flag.IntVar(&o.batch, "batch", 0, "influx.batch_size for holomix (0: its default, 5000); also the bare pipeline's batch size when set")
	flag.IntVar(&o.inFlight, "writes-in-flight", 0, "influx.writes_in_flight for holomix (0: its default, 2)")
	flag.StringVar(&parts, "parts", "throughput,latency,rss,pprof,replay", "parts to run (pprof: CPU profiles of B in-process)")
	flag.Parse()
	o.parts = map[string]bool{}
	for _, p := range strings.Split(parts, ",") {
		o.parts[strings.TrimSpace(p)] = true
	}
	for _, s := range strings.Split(inflights, ",") {
		n, err := strconv.Atoi(strings.TrimSpace(s))
		if err != nil || n < 1 {
			fmt.Fprintf(os.Stderr, "bench: -inflight %q: want numbers ≥ 1\n", inflights)
			os.Exit(2)
		}
		o.inflights = append(o.inflights, n)
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	if err := run(ctx, o); err != nil {
		fmt.Fprintf(os.Stderr, "bench: %v\n", err)
		os.Exit(1)
	}
}

// bench holds what every part shares.
type bench struct {
	o       options
	out     string
	bin     string
	in      *testenv.Influx
	hook    *rig.Hook
	secret  string
	seq     int
	results *os.File
	log     *slog.Logger
	report  report
}

// result is one measured run (one line of runs.jsonl).
type result struct {
	Pipeline    string             `json:"pipeline"` // A, B or C (count-only subscriber)
	Workload    string             `json:"workload"`
	Inflight    int                `json:"max_inflight_messages"`
	Round       int                `json:"round"`
	Messages    int                `json:"messages"`
	Readings    int                `json:"readings"`
	Seconds     float64            `json:"seconds"`
	Rate        float64            `json:"readings_per_s"`
	MsgRate     float64            `json:"messages_per_s"`
	PublishRate float64            `json:"prequeue_publish_msgs_per_s"`
	Extra       map[string]float64 `json:"extra,omitempty"`
}

func (b *bench) record(r result) {
	b.recordReport(r)
	_ = json.NewEncoder(b.results).Encode(r)
	b.log.Info("run", "pipeline", r.Pipeline, "workload", r.Workload, "inflight", r.Inflight, "round", r.Round,
		"readings", r.Readings, "seconds", fmt.Sprintf("%.2f", r.Seconds), "readings_per_s", fmt.Sprintf("%.0f", r.Rate))
}

func run(ctx context.Context, o options) error {
	root, err := testenv.RepoRoot()
	if err != nil {
		return err
	}
	out := o.out
	if out == "" {
		out = filepath.Join(root, "bench-out", time.Now().UTC().Format("20060102-150405"))
	}
	if err := os.MkdirAll(filepath.Join(out, "runs"), 0o755); err != nil {
		return err
	}
	logf, err := os.Create(filepath.Join(out, "bench.log"))
	if err != nil {
		return err
	}
	defer logf.Close()
	b := &bench{o: o, out: out, log: slog.New(slog.NewTextHandler(io.MultiWriter(os.Stderr, logf), nil))}
	b.report.started = time.Now()
	b.report.batch = 5000
	if o.batch > 0 {
		b.report.batch = o.batch
	}
	b.report.machine = describeMachine(root)
	b.report.commands = append(b.report.commands, "deploy/bench.sh "+strings.Join(os.Args[1:], " "))
	b.log.Info("machine", "description", b.report.machine.oneLine())
	if b.results, err = os.Create(filepath.Join(out, "runs.jsonl")); err != nil {
		return err
	}
	defer b.results.Close()

	b.log.Info("building holomix")
	if b.bin, err = rig.BuildHolomix(ctx, out); err != nil {
		return err
	}
	b.in, err = startInflux(filepath.Join(out, "influxd"))
	if err != nil {
		return err
	}
	defer b.in.Stop()
	if b.secret, err = rig.NewSecret(); err != nil {
		return err
	}
	if b.hook, err = rig.NewHook(b.secret); err != nil {
		return err
	}
	defer b.hook.Close()

	var errs []error
	if o.parts["throughput"] {
		if err := b.throughput(ctx); err != nil {
			errs = append(errs, fmt.Errorf("throughput: %w", err))
		}
	}
	if o.parts["latency"] && ctx.Err() == nil {
		if err := b.latency(ctx); err != nil {
			errs = append(errs, fmt.Errorf("latency: %w", err))
		}
	}
	if o.parts["rss"] && ctx.Err() == nil {
		if err := b.memory(ctx); err != nil {
			errs = append(errs, fmt.Errorf("memory: %w", err))
		}
	}
	if o.parts["pprof"] && ctx.Err() == nil {
		t0 := time.Now().UTC().Add(-60 * 24 * time.Hour).Truncate(24 * time.Hour)
		for _, w := range []workload{makeWorkload(false, o.single, t0), makeWorkload(true, o.profile, t0)} {
			if w.readings == 0 {
				continue
			}
			if err := b.cpuProfile(ctx, w, 1000); err != nil {
				errs = append(errs, fmt.Errorf("cpu profile %s: %w", w.name, err))
			}
		}
	}
	if o.parts["replay"] && ctx.Err() == nil {
		if err := b.replay(ctx, root); err != nil {
			errs = append(errs, fmt.Errorf("replay: %w", err))
		}
	}
	b.report.machine.loadEnd = loadAvg()
	b.report.took = time.Since(b.report.started)
	text := b.report.markdown()
	fmt.Println(text)
	if err := os.WriteFile(filepath.Join(out, "results.md"), []byte(text), 0o644); err != nil {
		errs = append(errs, err)
	}
	fmt.Printf("raw outputs: %s\n", out)
	return errors.Join(errs...)
}

func startInflux(dir string) (*testenv.Influx, error) {
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return nil, err
	}
	in, _, err := testenv.StartInfluxDir(dir, testenv.InfluxOptions{Database: "bench"})
	return in, err
}

// startBroker starts Mosquitto with deploy/mosquitto.conf's flow-control
// settings (queues of 1,000,000 messages, no byte limits, autosave every
// 60 s) and the given max_inflight_messages (20: the broker's default, not
// written to the file).
func (b *bench) startBroker(inflight int) (*testenv.Mosquitto, error) {
	dir := filepath.Join(b.out, fmt.Sprintf("mosquitto-inflight%d", inflight))
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return nil, err
	}
	o := testenv.MosquittoOptions{MaxQueued: 1000000,
		Extra: "max_inflight_bytes 0\nmax_queued_bytes 0\nautosave_interval 60\n" + testenv.MosquittoUserLine()}
	if inflight != 20 {
		o.MaxInflight = inflight
	}
	mq, _, err := testenv.StartMosquittoDir(dir, o)
	return mq, err
}

// workload is one kind of traffic.
type workload struct {
	name     string // json or json-profile
	format   string
	filter   string
	template string
	stream   rig.Stream
	msgs     []rig.Msg
	readings int
}

// makeWorkload pre-generates about n readings of 100 sites × 24 depths.
// Five sites carry intake jumps every 15 steps, so the alert path works too.
func makeWorkload(profile bool, n int, t0 time.Time) workload {
	s := rig.Stream{Prefix: "bench", Sites: 100, SitePrefix: "lake", Depths: rig.Depths(24, 0.5, 1), T0: t0,
		Stratified: true, IntakeDepth: 5, TriggerEvery: 15, TriggerSites: 5}
	perStep := s.Sites * len(s.Depths)
	steps := (n + perStep - 1) / perStep
	w := workload{stream: s, readings: steps * perStep}
	for k := 0; k < steps; k++ {
		if profile {
			w.msgs = append(w.msgs, s.ProfilesStep(k)...)
		} else {
			w.msgs = append(w.msgs, s.ReadingsStep(k)...)
		}
	}
	if profile {
		w.name, w.format, w.filter, w.template = "json-profile", "json-profile", "bench/+/profile", "bench/{site}/profile"
	} else {
		w.name, w.format, w.filter, w.template = "json", "json", "bench/+/temp", "bench/{site}/temp"
	}
	return w
}

// prequeue publishes msgs (window 1000) and returns the publish rate.
func prequeue(ctx context.Context, broker string, id string, msgs []rig.Msg) (float64, error) {
	p, err := rig.NewPublisher(broker, id)
	if err != nil {
		return 0, err
	}
	defer p.Close()
	start := time.Now()
	pctx, cancel := context.WithTimeout(ctx, 5*time.Minute)
	defer cancel()
	if err := p.Publish(pctx, msgs, rig.PublishOptions{Window: 1000}); err != nil {
		return 0, fmt.Errorf("publish: %d of %d acknowledged: %w", p.Acked.Load(), len(msgs), err)
	}
	return float64(len(msgs)) / time.Since(start).Seconds(), nil
}

func (b *bench) throughput(ctx context.Context) error {
	t0 := time.Now().UTC().Add(-60 * 24 * time.Hour).Truncate(24 * time.Hour)
	var works []workload
	for _, w := range []workload{makeWorkload(false, b.o.single, t0), makeWorkload(true, b.o.profile, t0)} {
		if w.readings > 0 { // -single 0 or -profile 0 skips that workload
			works = append(works, w)
		}
	}
	// The database alone: the same readings as line protocol, no broker.
	for _, w := range works {
		lines := lineProtocol(w)
		batch := 5000
		if b.o.batch > 0 {
			batch = b.o.batch
		}
		for r := 1; r <= b.o.rounds; r++ {
			db, err := b.newDB("d")
			if err != nil {
				return err
			}
			start := time.Now()
			if err := directWrite(ctx, b.in.URL, db+"/autogen", lines, batch); err != nil {
				return fmt.Errorf("direct write: %w", err)
			}
			end, _, err := rig.WaitCount(ctx, b.in.URL, db, w.readings, 20*time.Millisecond)
			b.dropDB(db)
			if err != nil {
				return err
			}
			secs := end.Sub(start).Seconds()
			b.record(result{Pipeline: "D", Workload: w.name, Round: r, Readings: w.readings, Seconds: secs, Rate: float64(w.readings) / secs})
		}
	}
	for _, inflight := range b.o.inflights {
		mq, err := b.startBroker(inflight)
		if err != nil {
			return err
		}
		err = func() error {
			defer mq.Stop()
			for _, w := range works {
				b.seq++
				cid := fmt.Sprintf("bench-count-%d", b.seq)
				rate, err := countOnly(ctx, mq.URL, cid, w.filter, len(w.msgs), func() error {
					_, err := prequeue(ctx, mq.URL, "bench-pub", w.msgs)
					return err
				})
				if err != nil {
					return err
				}
				_ = rig.ClearSession(mq.URL, cid)
				b.record(result{Pipeline: "C", Workload: w.name, Inflight: inflight, Messages: len(w.msgs), Readings: w.readings,
					MsgRate: rate, Rate: rate * float64(w.readings) / float64(len(w.msgs)), Seconds: float64(len(w.msgs)) / rate})
				for r := 1; r <= b.o.rounds; r++ {
					ra, err := b.runA(ctx, mq, w, inflight, r)
					if err != nil {
						return fmt.Errorf("A %s inflight %d round %d: %w", w.name, inflight, r, err)
					}
					b.record(ra)
					rb, err := b.runB(ctx, mq, w, inflight, r)
					if err != nil {
						return fmt.Errorf("B %s inflight %d round %d: %w", w.name, inflight, r, err)
					}
					b.record(rb)
				}
			}
			return nil
		}()
		if err != nil {
			return err
		}
	}
	return nil
}

// waitStored waits until progress() reaches want (cheap, in-process or
// /metrics), then confirms with InfluxDB count queries; it returns the time
// the count first showed every reading.
func (b *bench) waitStored(ctx context.Context, db string, want int, progress func() float64) (time.Time, error) {
	ctx, cancel := context.WithTimeout(ctx, 10*time.Minute)
	defer cancel()
	for progress() < float64(want) {
		if ctx.Err() != nil {
			return time.Time{}, fmt.Errorf("%v of %d readings handled: %w", progress(), want, ctx.Err())
		}
		time.Sleep(20 * time.Millisecond)
	}
	at, _, err := rig.WaitCount(ctx, b.in.URL, db, want, 20*time.Millisecond)
	return at, err
}

func (b *bench) newDB(prefix string) (string, error) {
	b.seq++
	db := fmt.Sprintf("%s%d", prefix, b.seq)
	return db, b.in.CreateDatabase(db)
}

func (b *bench) dropDB(db string) {
	_, _ = rig.InfluxQL(context.Background(), b.in.URL, db, "DROP DATABASE "+strconv.Quote(db))
}

func (b *bench) runA(ctx context.Context, mq *testenv.Mosquitto, w workload, inflight, round int) (result, error) {
	db, err := b.newDB("a")
	if err != nil {
		return result{}, err
	}
	defer b.dropDB(db)
	p := &bare{broker: mq.URL, clientID: "bench-bare-" + db, filter: w.filter, profile: w.format == "json-profile",
		influxURL: b.in.URL, bucket: db + "/autogen", batch: b.o.batch}
	if err := p.createSession(); err != nil {
		return result{}, err
	}
	defer func() { _ = rig.ClearSession(mq.URL, p.clientID) }()
	pubRate, err := prequeue(ctx, mq.URL, "bench-pub", w.msgs)
	if err != nil {
		return result{}, err
	}
	start := time.Now()
	if err := p.start(); err != nil {
		return result{}, err
	}
	defer p.stop()
	end, err := b.waitStored(ctx, db, w.readings, func() float64 { return float64(p.handled.Load()) })
	if err != nil {
		return result{}, err
	}
	secs := end.Sub(start).Seconds()
	return result{Pipeline: "A", Workload: w.name, Inflight: inflight, Round: round, Messages: len(w.msgs), Readings: w.readings,
		Seconds: secs, Rate: float64(w.readings) / secs, MsgRate: float64(len(w.msgs)) / secs, PublishRate: pubRate,
		Extra: map[string]float64{"decode_errors": float64(p.bad.Load()), "write_errors": float64(p.werrs.Load())}}, nil
}

// daemonFor prepares a daemon for db with w's sites and subscription.
func (b *bench) daemonFor(mq *testenv.Mosquitto, name, db string, w workload) (*rig.Daemon, error) {
	dir := filepath.Join(b.out, "runs", name)
	// A run starts from an empty storage directory (an -out reused from an
	// earlier run would otherwise restore its state and its alert episodes).
	if err := os.RemoveAll(dir); err != nil {
		return nil, err
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return nil, err
	}
	port, err := freePort()
	if err != nil {
		return nil, err
	}
	cfg := rig.DaemonConfig{Broker: mq.URL, ClientID: "holomix-bench-" + db,
		Subscriptions: []rig.Subscription{{Topic: w.filter, Format: w.format, Template: w.template}},
		InfluxURL:     b.in.URL, Bucket: db + "/autogen", InfluxBatchSize: b.o.batch, InfluxInFlight: b.o.inFlight, Dir: filepath.Join(dir, "data"), Sites: rig.SitesOf(w.stream),
		HookURL: b.hook.URL(), HookSecretEnv: "HOLOMIX_BENCH_HOOK_SECRET", HTTPListen: fmt.Sprintf("127.0.0.1:%d", port)}
	path := filepath.Join(dir, "holomix.yaml")
	if err := os.WriteFile(path, []byte(cfg.YAML()), 0o600); err != nil {
		return nil, err
	}
	l, err := rig.NewLog(filepath.Join(dir, "daemon.log"))
	if err != nil {
		return nil, err
	}
	return &rig.Daemon{Bin: b.bin, Config: path, HTTPAddr: cfg.HTTPListen, Log: l,
		Env: []string{"HOLOMIX_BENCH_HOOK_SECRET=" + b.secret}}, nil
}

func (b *bench) runB(ctx context.Context, mq *testenv.Mosquitto, w workload, inflight, round int) (result, error) {
	db, err := b.newDB("b")
	if err != nil {
		return result{}, err
	}
	defer b.dropDB(db)
	d, err := b.daemonFor(mq, fmt.Sprintf("%s-B-%s-inflight%d-round%d", db, w.name, inflight, round), db, w)
	if err != nil {
		return result{}, err
	}
	defer d.Log.Close()
	defer func() { _ = rig.ClearSession(mq.URL, "holomix-bench-"+db) }()
	// Create the persistent session, then stop: the broker queues for it.
	if err := d.Start(); err != nil {
		return result{}, err
	}
	if code, _, err := d.Term(10 * time.Second); err != nil || code != 0 {
		return result{}, fmt.Errorf("first stop: exit %d: %v", code, err)
	}
	pubRate, err := prequeue(ctx, mq.URL, "bench-pub", w.msgs)
	if err != nil {
		return result{}, err
	}
	start := time.Now()
	if err := d.Spawn(); err != nil {
		return result{}, err
	}
	defer d.Kill()
	end, err := b.waitStored(ctx, db, w.readings, func() float64 { return d.Metric("holomix_readings_stored_total") })
	if err != nil {
		return result{}, fmt.Errorf("%w\n%s", err, d.Log.Tail(2000))
	}
	secs := end.Sub(start).Seconds()
	m, _ := d.Metrics()
	rss, hwm, _ := rig.ProcMemory(d.PID())
	extra := map[string]float64{"rss_mib": rss, "hwm_mib": hwm,
		"duplicates": m["holomix_readings_duplicate_total"], "rejected_bad_json": m[`holomix_messages_rejected_total{reason="bad_json"}`]}
	if n := m["holomix_spool_commit_duration_seconds_count"]; n > 0 {
		extra["commits"] = n
		extra["commit_avg_ms"] = 1000 * m["holomix_spool_commit_duration_seconds_sum"] / n
		extra["readings_per_commit"] = m["holomix_spool_commit_readings_sum"] / m["holomix_spool_commit_readings_count"]
	}
	if n := m["holomix_influx_write_duration_seconds_count"]; n > 0 {
		extra["influx_writes"] = n
		extra["influx_write_avg_ms"] = 1000 * m["holomix_influx_write_duration_seconds_sum"] / n
	}
	extra["cpu_seconds"] = m["process_cpu_seconds_total"]
	code, took, err := d.Term(10 * time.Second)
	if err != nil || code != 0 {
		return result{}, fmt.Errorf("stop: exit %d after %v: %v", code, took, err)
	}
	return result{Pipeline: "B", Workload: w.name, Inflight: inflight, Round: round, Messages: len(w.msgs), Readings: w.readings,
		Seconds: secs, Rate: float64(w.readings) / secs, MsgRate: float64(len(w.msgs)) / secs, PublishRate: pubRate, Extra: extra}, nil
}

// latency publishes json-profile messages at a steady rate (half the
// sustainable B rate) to a running daemon and measures, for every
// intake_change firing, the time from the publish of the profile that
// triggers it to the webhook's arrival at the receiver.
func (b *bench) latency(ctx context.Context) error {
	rate := b.o.latencyRate
	if rate <= 0 {
		if med := b.report.median("B", "json-profile", 1000); med > 0 {
			rate = med / 24 / 2
		} else {
			rate = 2000
		}
	}
	mq, err := b.startBroker(1000)
	if err != nil {
		return err
	}
	defer mq.Stop()
	t0 := time.Now().UTC().Add(-30 * 24 * time.Hour).Truncate(24 * time.Hour)
	n := int(rate * b.o.latencyFor.Seconds())
	w := makeWorkload(true, n*24, t0)
	db, err := b.newDB("lat")
	if err != nil {
		return err
	}
	defer b.dropDB(db)
	d, err := b.daemonFor(mq, db+"-latency", db, w)
	if err != nil {
		return err
	}
	defer d.Log.Close()
	defer func() { _ = rig.ClearSession(mq.URL, "holomix-bench-"+db) }()
	s := w.stream
	sent := make([]atomic.Int64, len(w.msgs))
	var mu sync.Mutex
	var lat []time.Duration
	site := map[string]int{}
	for i := 0; i < s.Sites; i++ {
		site[s.SiteID(i)] = i
	}
	b.hook.OnDelivered(func(dl rig.Delivery) {
		if dl.Kind != "intake_change" || dl.Status != "firing" {
			return
		}
		i, ok := site[dl.Site]
		k := int(dl.EventTime.Sub(s.T0) / (10 * time.Minute))
		if !ok || k < 0 || k*s.Sites+i >= len(sent) {
			return
		}
		at := sent[k*s.Sites+i].Load()
		if at == 0 {
			return
		}
		mu.Lock()
		lat = append(lat, dl.At.Sub(time.Unix(0, at)))
		mu.Unlock()
	})
	defer b.hook.OnDelivered(nil)
	if err := d.Start(); err != nil {
		return err
	}
	defer d.Kill()
	p, err := rig.NewPublisher(mq.URL, "bench-latency-pub")
	if err != nil {
		return err
	}
	defer p.Close()
	probeStop := make(chan struct{})
	probeDone := make(chan []time.Duration, 1)
	go func() { probeDone <- fsyncProbe(filepath.Join(b.out, "runs", db+"-latency", "fsync-probe"), probeStop) }()
	start := time.Now()
	pctx, cancel := context.WithTimeout(ctx, b.o.latencyFor+2*time.Minute)
	defer cancel()
	if err := p.Publish(pctx, w.msgs, rig.PublishOptions{Window: 1000, Rate: rate,
		OnSend: func(i int, at time.Time) { sent[i].Store(at.UnixNano()) }}); err != nil {
		return fmt.Errorf("publish: %w", err)
	}
	pubSecs := time.Since(start).Seconds()
	close(probeStop)
	probe := <-probeDone
	steps := len(w.msgs) / s.Sites
	var firings []rig.ExpectedAlert
	for _, a := range s.ExpectedAlerts(steps) {
		if a.Status == "firing" {
			firings = append(firings, a)
		}
	}
	deadline := time.Now().Add(60 * time.Second)
	for {
		mu.Lock()
		got := len(lat)
		mu.Unlock()
		if got >= len(firings) || time.Now().After(deadline) {
			break
		}
		time.Sleep(50 * time.Millisecond)
	}
	if _, err := b.waitStored(ctx, db, w.readings, func() float64 { return d.Metric("holomix_readings_stored_total") }); err != nil {
		return err
	}
	m, _ := d.Metrics()
	if raw, err := scrapeRaw("http://" + d.HTTPAddr + "/metrics"); err == nil {
		_ = os.WriteFile(filepath.Join(b.out, "latency-metrics.txt"), raw, 0o644)
	}
	if code, took, err := d.Term(10 * time.Second); err != nil || code != 0 {
		return fmt.Errorf("stop: exit %d after %v: %v", code, took, err)
	}
	mu.Lock()
	samples := append([]time.Duration(nil), lat...)
	mu.Unlock()
	sort.Slice(samples, func(i, j int) bool { return samples[i] < samples[j] })
	lr := latencyResult{rateMsgs: rate, rateReadings: rate * 24, seconds: pubSecs, expected: len(firings), samples: samples,
		achieved: float64(len(w.msgs)) / pubSecs}
	lr.probe = probe
	// Where a slow alert can have waited: spool commits and detection
	// checkpoints over 128 ms, outbox-to-receiver deliveries over 100 ms.
	for _, h := range []struct{ label, name, le string }{
		{"spool commits > 128 ms", "holomix_spool_commit_duration_seconds", "0.128"},
		{"checkpoints > 128 ms", "holomix_checkpoint_duration_seconds", "0.128"},
		{"outbox → receiver > 100 ms", "holomix_alert_delivery_latency_seconds", "0.1"},
		{"database writes > 128 ms", "holomix_influx_write_duration_seconds", "0.128"},
	} {
		a, t := slow(m, h.name, h.le)
		lr.slow = append(lr.slow, fmt.Sprintf("%s: %.0f of %.0f", h.label, a, t))
	}
	b.report.latency = &lr
	raw, _ := json.Marshal(map[string]any{"rate_msgs_per_s": rate, "achieved_msgs_per_s": lr.achieved, "expected_firings": len(firings),
		"latencies_ms": durationsMS(samples)})
	_ = os.WriteFile(filepath.Join(b.out, "latency.json"), raw, 0o644)
	b.log.Info("latency", "rate_msgs_per_s", fmt.Sprintf("%.0f", rate), "samples", len(samples), "expected", len(firings),
		"p50", pct(samples, 0.50), "p99", pct(samples, 0.99))
	if len(samples) < len(firings) {
		return fmt.Errorf("%d of %d intake_change firings arrived at the receiver", len(samples), len(firings))
	}
	return nil
}

func durationsMS(ds []time.Duration) []float64 {
	out := make([]float64, len(ds))
	for i, d := range ds {
		out[i] = float64(d.Microseconds()) / 1000
	}
	return out
}

// pct returns the q-quantile (nearest rank) of sorted samples.
func pct(sorted []time.Duration, q float64) time.Duration {
	if len(sorted) == 0 {
		return 0
	}
	i := int(math.Ceil(q*float64(len(sorted)))) - 1
	return sorted[min(max(i, 0), len(sorted)-1)]
}

// memory drains rssSites × rssDepths profiles through the daemon and reads
// its peak resident set size (VmHWM).
func (b *bench) memory(ctx context.Context) error {
	mq, err := b.startBroker(1000)
	if err != nil {
		return err
	}
	defer mq.Stop()
	t0 := time.Now().UTC().Add(-30 * 24 * time.Hour).Truncate(24 * time.Hour)
	s := rig.Stream{Prefix: "bench", Sites: b.o.rssSites, SitePrefix: "lake", Depths: rig.Depths(b.o.rssDepths, 0.5, 1), T0: t0,
		Stratified: true, IntakeDepth: 5, TriggerEvery: 15, TriggerSites: 10}
	w := workload{name: "json-profile", format: "json-profile", filter: "bench/+/profile", template: "bench/{site}/profile", stream: s}
	for k := 0; k < b.o.rssSteps; k++ {
		w.msgs = append(w.msgs, s.ProfilesStep(k)...)
	}
	w.readings = len(w.msgs) * len(s.Depths)
	db, err := b.newDB("rss")
	if err != nil {
		return err
	}
	defer b.dropDB(db)
	d, err := b.daemonFor(mq, db+"-memory", db, w)
	if err != nil {
		return err
	}
	defer d.Log.Close()
	defer func() { _ = rig.ClearSession(mq.URL, "holomix-bench-"+db) }()
	if err := d.Start(); err != nil {
		return err
	}
	if code, _, err := d.Term(10 * time.Second); err != nil || code != 0 {
		return fmt.Errorf("first stop: exit %d: %v", code, err)
	}
	if _, err := prequeue(ctx, mq.URL, "bench-pub", w.msgs); err != nil {
		return err
	}
	start := time.Now()
	if err := d.Spawn(); err != nil {
		return err
	}
	defer d.Kill()
	var peak, peakAnon, fileAtPeak float64
	stopSample := make(chan struct{})
	sampled := make(chan struct{})
	go func() { // VmHWM is the kernel's own peak; the samples split it into anonymous and file-backed memory
		defer close(sampled)
		for {
			select {
			case <-stopSample:
				return
			case <-time.After(100 * time.Millisecond):
				if pm, err := rig.ProcMem(d.PID()); err == nil {
					peak = max(peak, pm.HWM)
					if pm.Anon > peakAnon {
						peakAnon, fileAtPeak = pm.Anon, pm.File
					}
				}
			}
		}
	}()
	end, err := b.waitStored(ctx, db, w.readings, func() float64 { return d.Metric("holomix_readings_stored_total") })
	if err != nil {
		close(stopSample)
		<-sampled
		return err
	}
	// Let at least one checkpoint of the full state happen (every 5 s).
	ck := d.Metric("holomix_checkpoints_total")
	for wait := time.Now().Add(30 * time.Second); d.Metric("holomix_checkpoints_total") < ck+2 && time.Now().Before(wait); {
		time.Sleep(100 * time.Millisecond)
	}
	close(stopSample)
	<-sampled
	pm, err := rig.ProcMem(d.PID())
	if err != nil {
		return err
	}
	m, _ := d.Metrics()
	mr := memoryResult{sites: s.Sites, depths: len(s.Depths), readings: w.readings, rss: pm.RSS, hwm: max(pm.HWM, peak),
		anonPeak: peakAnon, fileAtAnonPeak: fileAtPeak, anonEnd: pm.Anon, fileEnd: pm.File, goLimit: m["go_gc_gomemlimit_bytes"] / (1 << 20),
		seconds: end.Sub(start).Seconds(), heapMiB: m["go_memstats_heap_inuse_bytes"] / (1 << 20),
		checkpointMS: 1000 * m["holomix_checkpoint_duration_seconds_sum"] / math.Max(1, m["holomix_checkpoint_duration_seconds_count"])}
	b.report.memory = &mr
	if code, took, err := d.Term(10 * time.Second); err != nil || code != 0 {
		return fmt.Errorf("stop: exit %d after %v: %v", code, took, err)
	}
	b.log.Info("memory", "sites", mr.sites, "depths", mr.depths, "readings", mr.readings, "vmhwm_mib", fmt.Sprintf("%.1f", mr.hwm))
	return nil
}

// replay runs deploy/bench-replay.sh and keeps its output.
func (b *bench) replay(ctx context.Context, root string) error {
	cmd := exec.CommandContext(ctx, filepath.Join(root, "deploy", "bench-replay.sh"))
	cmd.Dir = root
	outb, err := cmd.CombinedOutput()
	_ = os.WriteFile(filepath.Join(b.out, "replay.txt"), outb, 0o644)
	if err != nil {
		return fmt.Errorf("deploy/bench-replay.sh: %w\n%s", err, outb)
	}
	b.report.replay = strings.TrimSpace(string(outb))
	b.report.commands = append(b.report.commands, "deploy/bench-replay.sh (called by bench)")
	return nil
}

func freePort() (int, error) { return rig.FreePort() }

func scrapeRaw(url string) ([]byte, error) {
	resp, err := http.Get(url)
	if err != nil {
		return nil, err
	}
	defer resp.Body.Close()
	return io.ReadAll(resp.Body)
}

// slow counts the observations of a histogram above the bucket bound le
// (labels other than le summed): above, total.
func slow(m map[string]float64, name, le string) (float64, float64) {
	var above, total float64
	for k, v := range m {
		if !strings.HasPrefix(k, name+"_bucket{") {
			continue
		}
		if strings.Contains(k, `le="+Inf"`) {
			total += v
		}
		if strings.Contains(k, `le="`+le+`"`) {
			above -= v
		}
	}
	return above + total, total
}

// fsyncProbe writes 4 KiB and fsyncs it every 50 ms in path's directory (the
// disk the daemon's spool and InfluxDB share) until stop closes, and returns
// the sorted durations of the write+fsync: the disk's own latency under the
// load, independent of holomix.
func fsyncProbe(path string, stop <-chan struct{}) []time.Duration {
	f, err := os.OpenFile(path, os.O_CREATE|os.O_WRONLY|os.O_TRUNC, 0o644)
	if err != nil {
		return nil
	}
	defer os.Remove(path)
	defer f.Close()
	buf := make([]byte, 4096)
	var out []time.Duration
	for i := 0; ; i++ {
		select {
		case <-stop:
			sort.Slice(out, func(i, j int) bool { return out[i] < out[j] })
			return out
		case <-time.After(50 * time.Millisecond):
		}
		t := time.Now()
		if _, err := f.WriteAt(buf, int64(i%256)*4096); err != nil {
			continue
		}
		if err := f.Sync(); err != nil {
			continue
		}
		out = append(out, time.Since(t))
	}
}
