package main

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"runtime/pprof"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"holomix/config"
	"holomix/deploy/internal/rig"
	live "holomix/internal/daemon"
)

// cpuProfile drains one B round in-process (internal/daemon.Run, which is
// all `holomix run` executes after loading its file) under the CPU profiler
// of runtime/pprof, and writes the profile and its top functions to the
// output directory. The messages are queued at the broker before the
// profile starts, so the profile holds the daemon's work (plus this
// process's polling of /metrics and InfluxDB, a few per cent).
func (b *bench) cpuProfile(ctx context.Context, w workload, inflight int) error {
	mq, err := b.startBroker(inflight)
	if err != nil {
		return err
	}
	defer mq.Stop()
	db, err := b.newDB("prof")
	if err != nil {
		return err
	}
	defer b.dropDB(db)
	name := fmt.Sprintf("%s-profile-%s-inflight%d", db, w.name, inflight)
	d, err := b.daemonFor(mq, name, db, w) // only for its configuration file
	if err != nil {
		return err
	}
	d.Log.Close()
	cfg, err := config.LoadWith(d.Config, config.Options{Getenv: func(k string) string {
		if k == "HOLOMIX_BENCH_HOOK_SECRET" {
			return b.secret
		}
		return os.Getenv(k)
	}})
	if err != nil {
		return err
	}
	// The memory limit is meant for a process of the daemon's own; this one
	// also holds the benchmark's messages, so the run in it gets the limit
	// on top of what this process holds already (else the collector would
	// run without pause and the profile would show little but it).
	if cfg.Storage.MemoryLimit > 0 {
		runtime.GC()
		var ms runtime.MemStats
		runtime.ReadMemStats(&ms)
		cfg.Storage.MemoryLimit += config.ByteSize(ms.Sys - ms.HeapReleased)
	}
	logf, err := os.Create(filepath.Join(b.out, "runs", name, "daemon.log"))
	if err != nil {
		return err
	}
	defer logf.Close()
	logger := slog.New(slog.NewJSONHandler(logf, nil))
	clientID := cfg.MQTT.ClientID
	defer func() { _ = rig.ClearSession(mq.URL, clientID) }()

	var reg *prometheus.Registry
	// start runs the daemon in this process until the returned stop is
	// called; it returns once the daemon is ready (or failed to start).
	start := func() (stop func() error, err error) {
		reg = prometheus.NewRegistry()
		rctx, cancel := context.WithCancel(ctx)
		ready := make(chan struct{})
		done := make(chan error, 1)
		go func() {
			done <- live.Run(rctx, live.Options{Config: cfg, Logger: logger, Registry: reg, OnReady: func(live.Info) { close(ready) }})
		}()
		select {
		case <-ready:
			return func() error { cancel(); return <-done }, nil
		case err := <-done:
			cancel()
			return nil, err
		}
	}
	// Create the session.
	stop, err := start()
	if err != nil {
		return err
	}
	time.Sleep(time.Second) // subscribed
	if err := stop(); err != nil {
		return err
	}
	if _, err := prequeue(ctx, mq.URL, "bench-pub", w.msgs); err != nil {
		return err
	}
	profPath := filepath.Join(b.out, fmt.Sprintf("cpu-%s-inflight%d.pprof", w.name, inflight))
	f, err := os.Create(profPath)
	if err != nil {
		return err
	}
	defer f.Close()
	if err := pprof.StartCPUProfile(f); err != nil {
		return err
	}
	began := time.Now()
	stop, err = start()
	if err != nil {
		pprof.StopCPUProfile()
		return err
	}
	end, werr := b.waitStored(ctx, db, w.readings, func() float64 { return counter(reg, "holomix_readings_stored_total") })
	pprof.StopCPUProfile()
	if err := errors.Join(werr, stop()); err != nil {
		return err
	}
	secs := end.Sub(began).Seconds()
	top, err := exec.Command("go", "tool", "pprof", "-top", "-nodecount=40", profPath).CombinedOutput()
	if err != nil {
		return fmt.Errorf("go tool pprof: %w\n%s", err, top)
	}
	cum, _ := exec.Command("go", "tool", "pprof", "-top", "-cum", "-nodecount=60", profPath).CombinedOutput()
	txt := fmt.Sprintf("in-process B, %s, max_inflight %d: %d readings in %.2f s = %.0f readings/s under the profiler\n\n%s\n\n-- cumulative --\n%s",
		w.name, inflight, w.readings, secs, float64(w.readings)/secs, top, cum)
	_ = os.WriteFile(profPath+".txt", []byte(txt), 0o644)
	b.report.profiles = append(b.report.profiles, profPath+".txt")
	b.log.Info("cpu profile", "file", profPath, "readings_per_s", fmt.Sprintf("%.0f", float64(w.readings)/secs))
	return nil
}

// counter returns the value of a counter in reg (0 when absent).
func counter(reg *prometheus.Registry, name string) float64 {
	mfs, err := reg.Gather()
	if err != nil {
		return 0
	}
	for _, mf := range mfs {
		if mf.GetName() == name && len(mf.GetMetric()) > 0 {
			return mf.GetMetric()[0].GetCounter().GetValue()
		}
	}
	return 0
}
