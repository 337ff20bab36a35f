package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"path/filepath"
	"strings"
	"text/tabwriter"
	"time"

	"holomix/alert"
	"holomix/config"
)

const alertsUsage = `usage: holomix alerts list  -c FILE
       holomix alerts retry -c FILE ALERT_ID
       holomix alerts test  -c FILE RECEIVER

Inspect and repair alert deliveries in the outbox (storage.dir/outbox.db).

  list    print pending and failed deliveries
  retry   move the failed deliveries of an alert back to pending and try them now
  test    send a signed test alert to a receiver and print its HTTP status

The running daemon holds the outbox: stop it first, or use the status page.`

// alertsLockWait is how long the tool waits for the outbox lock.
const alertsLockWait = 500 * time.Millisecond

func runAlerts(ctx context.Context, e *env, args []string) int {
	fs := flag.NewFlagSet("alerts", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	cfgPath := fs.String("c", "", "configuration file (required)")
	fs.StringVar(cfgPath, "config", "", "same as -c")
	fs.Usage = func() {
		fmt.Fprintln(e.stderr, alertsUsage)
		fs.PrintDefaults()
	}
	// Flags may come before or after the action and its argument.
	var pos []string
	rest := args
	for {
		if err := fs.Parse(rest); err != nil {
			if errors.Is(err, flag.ErrHelp) {
				return 0
			}
			return 2
		}
		if fs.NArg() == 0 {
			break
		}
		pos = append(pos, fs.Arg(0))
		rest = fs.Args()[1:]
	}
	if len(pos) == 0 {
		fs.Usage()
		return 2
	}
	action, pos := pos[0], pos[1:]
	want := map[string]int{"list": 0, "retry": 1, "test": 1}
	n, ok := want[action]
	if !ok {
		fmt.Fprintf(e.stderr, "holomix alerts: unknown action %q (want list, retry or test)\n", action)
		return 2
	}
	if len(pos) != n {
		fmt.Fprintf(e.stderr, "holomix alerts %s: want %d argument(s), got %d\n\n", action, n, len(pos))
		fs.Usage()
		return 2
	}
	if *cfgPath == "" {
		fmt.Fprintf(e.stderr, "holomix alerts %s: -c FILE is required\n", action)
		return 2
	}
	cfg, err := config.LoadWith(*cfgPath, config.Options{Getenv: e.getenv})
	if err != nil {
		var probs config.Problems
		if errors.As(err, &probs) {
			fmt.Fprintf(e.stderr, "%s: %d problem(s)\n", *cfgPath, len(probs))
			for _, p := range probs {
				fmt.Fprintf(e.stderr, "  %s\n", p)
			}
		} else {
			fmt.Fprintf(e.stderr, "%s: %v\n", *cfgPath, err)
		}
		return 2
	}
	o, err := alert.ConfigOptions(cfg)
	if err != nil {
		fmt.Fprintf(e.stderr, "holomix alerts: %v\n", err)
		return 2
	}
	o.LockTimeout = alertsLockWait
	o.Logger = slog.New(slog.NewTextHandler(e.stderr, &slog.HandlerOptions{Level: slog.LevelWarn}))
	d, err := alert.Open(o)
	if errors.Is(err, alert.ErrLocked) {
		fmt.Fprintf(e.stderr, "holomix alerts: the daemon is running; stop it or use the status page (%s is locked)\n",
			filepath.Join(o.Dir, alert.OutboxFile))
		return 1
	}
	if err != nil {
		fmt.Fprintf(e.stderr, "holomix alerts: %v\n", err)
		return 1
	}
	defer func() {
		if err := d.Close(); err != nil {
			fmt.Fprintf(e.stderr, "holomix alerts: %v\n", err)
		}
	}()
	switch action {
	case "list":
		return alertsList(e, d)
	case "retry":
		return alertsRetry(ctx, e, d, pos[0])
	default:
		return alertsTest(ctx, e, d, pos[0])
	}
}

func alertsList(e *env, d *alert.Dispatcher) int {
	pending, err := d.Pending()
	if err != nil {
		fmt.Fprintf(e.stderr, "holomix alerts list: %v\n", err)
		return 1
	}
	failed, err := d.Failed()
	if err != nil {
		fmt.Fprintf(e.stderr, "holomix alerts list: %v\n", err)
		return 1
	}
	printDeliveries(e.stdout, "pending", pending)
	fmt.Fprintln(e.stdout)
	printDeliveries(e.stdout, "failed", failed)
	return 0
}

func printDeliveries(w io.Writer, what string, ds []alert.Delivery) {
	if len(ds) == 0 {
		fmt.Fprintf(w, "no %s deliveries\n", what)
		return
	}
	fmt.Fprintf(w, "%s deliveries: %d\n", what, len(ds))
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "ID\tRECEIVER\tSITE\tKIND\tSTATUS\tATTEMPTS\tNEXT TRY\tLAST RESULT")
	for _, x := range ds {
		next := "-"
		if x.State == alert.StatePending {
			next = x.NextTry.UTC().Format("2006-01-02 15:04:05Z")
		}
		kind := x.Kind
		if x.Subject != "" {
			kind += " (" + x.Subject + ")"
		}
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%s\t%d\t%s\t%s\n", x.AlertID, x.Receiver, x.SiteID, kind, x.Status, x.Attempts, next, lastResult(x))
	}
	tw.Flush()
}

// lastResult is the last attempt's outcome on one line.
func lastResult(x alert.Delivery) string {
	var s string
	switch {
	case x.Attempts == 0:
		return "not tried yet"
	case x.LastStatus != 0:
		s = fmt.Sprintf("HTTP %d %s", x.LastStatus, http.StatusText(x.LastStatus))
		if ex := oneLine(x.Excerpt, 60); ex != "" {
			s += ": " + ex
		}
	default:
		s = oneLine(x.LastError, 80)
	}
	return s
}

func oneLine(s string, max int) string {
	s = strings.Join(strings.Fields(s), " ")
	if r := []rune(s); len(r) > max {
		s = string(r[:max-1]) + "…"
	}
	return s
}

func alertsRetry(ctx context.Context, e *env, d *alert.Dispatcher, id string) int {
	if err := d.Retry(id); err != nil {
		fmt.Fprintf(e.stderr, "holomix alerts retry: %v\n", err)
		return 1
	}
	fmt.Fprintf(e.stdout, "%s: failed deliveries moved back to pending; trying now\n", id)
	res, err := d.DeliverNow(ctx, id)
	code := 0
	for _, x := range res {
		switch x.State {
		case alert.StateDelivered:
			fmt.Fprintf(e.stdout, "  %s: delivered\n", x.Receiver)
		case alert.StatePending:
			fmt.Fprintf(e.stdout, "  %s: %s; stays pending, the daemon retries it from %s\n",
				x.Receiver, lastResult(x), x.NextTry.UTC().Format("2006-01-02 15:04:05Z"))
			code = 1
		default:
			fmt.Fprintf(e.stdout, "  %s: failed again: %s\n", x.Receiver, lastResult(x))
			code = 1
		}
	}
	if err != nil {
		fmt.Fprintf(e.stderr, "holomix alerts retry: %v\n", err)
		return 1
	}
	return code
}

func alertsTest(ctx context.Context, e *env, d *alert.Dispatcher, receiver string) int {
	status, err := d.SendTest(ctx, receiver)
	switch {
	case err != nil && status != 0:
		fmt.Fprintf(e.stdout, "%s: HTTP %d %s\n", receiver, status, http.StatusText(status))
		fmt.Fprintf(e.stderr, "holomix alerts test: %v\n", err)
		return 1
	case err != nil:
		fmt.Fprintf(e.stderr, "holomix alerts test: %v\n", err)
		return 1
	case status == 0:
		fmt.Fprintf(e.stdout, "%s: written to the log\n", receiver)
	default:
		fmt.Fprintf(e.stdout, "%s: HTTP %d %s\n", receiver, status, http.StatusText(status))
	}
	return 0
}
