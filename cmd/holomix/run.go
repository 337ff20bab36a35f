package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"os"
	"os/signal"
	"strings"
	"syscall"

	"holomix/config"
	live "holomix/internal/daemon"
)

const runUsage = `usage: holomix run -c FILE

Run the daemon: subscribe to the buoys' MQTT topics, spool every reading
durably, store it in InfluxDB, follow each lake's water column and send
alerts. SIGTERM or SIGINT drains (the batch in flight is committed and
acknowledged, detection state is saved) and exits 0. SIGHUP reloads the
file: detector thresholds, alert receivers and the log level apply at once,
other changes are logged as needing a restart.

Memory: the daemon sets a soft memory limit of storage.memory_limit (default
112MiB, enough for 1,000 sites of 30 sensors; 0 means none). The GOMEMLIMIT
environment variable, when set, takes precedence.`

func runDaemon(ctx context.Context, e *env, args []string) int {
	fs := flag.NewFlagSet("run", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	path := fs.String("c", "", "configuration file (YAML)")
	fs.Usage = func() {
		fmt.Fprintln(e.stderr, runUsage)
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return 0
		}
		return 2
	}
	if *path == "" || fs.NArg() != 0 {
		fs.Usage()
		return 2
	}
	cfg, ok := loadForCheck(e, *path, config.Options{Getenv: e.getenv})
	if !ok {
		return 2
	}
	level := new(slog.LevelVar)
	log, err := newLogger(e.stderr, cfg.Log, level)
	if err != nil {
		fmt.Fprintf(e.stderr, "holomix run: %v\n", err)
		return 2
	}
	for _, w := range cfg.Warnings() {
		log.Warn("configuration", "warning", w)
	}
	log.Info("starting", "version", version, "config", *path, "storage_dir", cfg.Storage.Dir)
	// SIGHUP reloads the configuration file (systemctl reload).
	hup := make(chan os.Signal, 1)
	signal.Notify(hup, syscall.SIGHUP)
	defer signal.Stop(hup)
	reload := make(chan *config.Config)
	go func() {
		for {
			select {
			case <-ctx.Done():
				return
			case <-hup:
			}
			nc, err := config.LoadWith(*path, config.Options{Getenv: e.getenv})
			if err != nil {
				log.Error("configuration reload refused; the running configuration stays", "config", *path, "err", err)
				continue
			}
			select {
			case reload <- nc:
			case <-ctx.Done():
				return
			}
		}
	}()
	if err := live.Run(ctx, live.Options{Config: cfg, Logger: log, LogLevel: level, Reload: reload}); err != nil {
		log.Error("daemon failed", "err", err)
		return 1
	}
	return 0
}

// newLogger builds the structured logger of config.Log: text or json, at
// the configured level, which is stored in (and later read from) level.
func newLogger(w io.Writer, c config.Log, level *slog.LevelVar) (*slog.Logger, error) {
	var lvl slog.Level
	switch strings.ToLower(c.Level) {
	case "", "info":
		lvl = slog.LevelInfo
	case "debug":
		lvl = slog.LevelDebug
	case "warn", "warning":
		lvl = slog.LevelWarn
	case "error":
		lvl = slog.LevelError
	default:
		return nil, fmt.Errorf("log.level %q: want debug, info, warn or error", c.Level)
	}
	level.Set(lvl)
	o := &slog.HandlerOptions{Level: level}
	switch strings.ToLower(c.Format) {
	case "", "text":
		return slog.New(slog.NewTextHandler(w, o)), nil
	case "json":
		return slog.New(slog.NewJSONHandler(w, o)), nil
	}
	return nil, fmt.Errorf("log.format %q: want text or json", c.Format)
}
