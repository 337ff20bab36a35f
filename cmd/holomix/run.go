package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"strings"

	"holomix/config"
	live "holomix/internal/daemon"
)

const runUsage = `usage: holomix run -c FILE

Run the daemon: subscribe to the buoys' MQTT topics, spool every reading
durably, store it in InfluxDB, follow each lake's water column and send
alerts. SIGTERM or SIGINT drains (the batch in flight is committed and
acknowledged, detection state is saved) and exits 0.`

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
	log, err := newLogger(e.stderr, cfg.Log)
	if err != nil {
		fmt.Fprintf(e.stderr, "holomix run: %v\n", err)
		return 2
	}
	for _, w := range cfg.Warnings() {
		log.Warn("configuration", "warning", w)
	}
	log.Info("starting", "version", version, "config", *path, "storage_dir", cfg.Storage.Dir)
	if err := live.Run(ctx, live.Options{Config: cfg, Logger: log}); err != nil {
		log.Error("daemon failed", "err", err)
		return 1
	}
	return 0
}

// newLogger builds the structured logger of config.Log: text or json, at
// the given level.
func newLogger(w io.Writer, c config.Log) (*slog.Logger, error) {
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
	o := &slog.HandlerOptions{Level: lvl}
	switch strings.ToLower(c.Format) {
	case "", "text":
		return slog.New(slog.NewTextHandler(w, o)), nil
	case "json":
		return slog.New(slog.NewJSONHandler(w, o)), nil
	}
	return nil, fmt.Errorf("log.format %q: want text or json", c.Format)
}
