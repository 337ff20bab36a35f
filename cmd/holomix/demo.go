package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"log/slog"
	"time"

	"holomix/internal/demo"
)

const demoUsage = `usage: holomix demo [options]

Run a simulated autumn-to-spring season of three invented lakes end to end
on this machine: an embedded MQTT broker on loopback, the lake simulator
publishing to it, the daemon subscribing, spooling, detecting and alerting,
and a webhook receiver that verifies each alert's signature and prints it.
Open the status page it prints while it runs. Nothing is needed beyond this
binary; nothing listens beyond 127.0.0.1. Ctrl-C stops it cleanly.

By default the season (15 September to 15 May) takes about 3 minutes.`

// demoTokenEnv holds the InfluxDB token when --influx-token is not given.
const demoTokenEnv = "HOLOMIX_DEMO_INFLUX_TOKEN"

func runDemo(ctx context.Context, e *env, args []string) int {
	fs := flag.NewFlagSet("demo", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	speed := fs.Float64("speed", 0, "model seconds per wall second (default: the season in about 3 minutes, or in --for)")
	dur := fs.Duration("for", 0, "wall time to run; without --speed the season is compressed to fit (e.g. 60s)")
	seed := fs.Int64("seed", 1, "seed of the simulated weather and sensor noise")
	listen := fs.String("listen", demo.DefaultListen, "status page address (loopback; port 0 picks a free one)")
	dir := fs.String("dir", "", "keep the daemon's storage in this new or empty directory (default: a temporary one)")
	format := fs.String("format", "json-profile", "buoy payload: json-profile (one message per profile) or json (one per reading)")
	influxURL := fs.String("influx-url", "", "store readings in this InfluxDB (default: none, readings stay spooled)")
	influxBucket := fs.String("influx-bucket", "", "InfluxDB bucket (\"database/retention\" on 1.8; default lake/autogen)")
	influxToken := fs.String("influx-token", "", "InfluxDB token (\"user:password\" on 1.8 with authentication); a command line is visible\nto other users: prefer the environment variable "+demoTokenEnv)
	logLevel := fs.String("log-level", "warn", "daemon log level on stderr: debug, info, warn or error")
	fs.Usage = func() {
		fmt.Fprintln(e.stderr, demoUsage)
		fmt.Fprintln(e.stderr, "\noptions:")
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return 0
		}
		return 2
	}
	if fs.NArg() != 0 {
		fs.Usage()
		return 2
	}
	if *speed < 0 || *dur < 0 {
		fmt.Fprintln(e.stderr, "holomix demo: --speed and --for must not be negative")
		return 2
	}
	var lvl slog.Level
	if err := lvl.UnmarshalText([]byte(*logLevel)); err != nil {
		fmt.Fprintf(e.stderr, "holomix demo: --log-level %q: want debug, info, warn or error\n", *logLevel)
		return 2
	}
	if *influxToken == "" && *influxURL != "" {
		*influxToken = e.getenv(demoTokenEnv)
	}
	o := demo.Options{
		Speed: *speed, For: *dur, Seed: *seed, Listen: *listen, Dir: *dir, Format: *format,
		InfluxURL: *influxURL, InfluxBucket: *influxBucket, InfluxToken: *influxToken,
		Out:    e.stdout,
		Logger: slog.New(slog.NewTextHandler(e.stderr, &slog.HandlerOptions{Level: lvl})),
	}
	start := time.Now()
	if err := demo.Run(ctx, o); err != nil {
		if errors.Is(err, demo.ErrOptions) {
			fmt.Fprintf(e.stderr, "holomix %v\n", err)
			return 2
		}
		fmt.Fprintf(e.stderr, "holomix %v (after %s)\n", err, time.Since(start).Round(time.Millisecond))
		return 1
	}
	return 0
}
