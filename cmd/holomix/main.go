// Command holomix is the lake water-column monitoring daemon and its tools.
// Each subcommand lives in its own file; main only dispatches.
package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"os/signal"
	"sort"
	"syscall"
)

// version is set at build time with -ldflags "-X main.version=…".
var version = "0.1.0-dev"

// env is what a subcommand may use of the process: streams and environment lookup.
type env struct {
	stdin  io.Reader
	stdout io.Writer
	stderr io.Writer
	getenv func(string) string
}

// command is one subcommand. run returns the process exit code:
// 0 success, 1 runtime failure, 2 usage or configuration error.
type command struct {
	summary string
	run     func(ctx context.Context, e *env, args []string) int
}

// commands lists every subcommand. Add a line here when you add a command file.
func commands() map[string]command {
	return map[string]command{
		"version":      {"print the version", runVersion},
		"alerts":       {"list, retry or test alert deliveries", runAlerts},
		"check-config": {"validate a configuration file and print a summary", runCheckConfig},
		"run":          {"run the daemon: subscribe, store, detect, alert", runDaemon},
		"replay":       {"run recorded files through the detectors and print the season", runReplay},
		"column":       {"compute column metrics and state for one profile", runColumn},
		"export":       {"export stored readings, column records or events from InfluxDB", runExport},
		"demo":         {"run a simulated season end to end on this machine", runDemo},
	}
}

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	code := dispatch(ctx, &env{stdin: os.Stdin, stdout: os.Stdout, stderr: os.Stderr, getenv: os.Getenv}, os.Args[1:])
	stop()
	os.Exit(code)
}

func dispatch(ctx context.Context, e *env, args []string) int {
	cmds := commands()
	if len(args) == 0 || args[0] == "-h" || args[0] == "--help" || args[0] == "help" {
		usage(e.stderr, cmds)
		if len(args) == 0 {
			return 2
		}
		return 0
	}
	c, ok := cmds[args[0]]
	if !ok {
		fmt.Fprintf(e.stderr, "holomix: unknown command %q\n\n", args[0])
		usage(e.stderr, cmds)
		return 2
	}
	return c.run(ctx, e, args[1:])
}

func usage(w io.Writer, cmds map[string]command) {
	fmt.Fprintln(w, "holomix: follow lake water columns through the seasons and alert on overturn, maximum density and ice")
	fmt.Fprintln(w, "\nusage: holomix COMMAND [options]\n\ncommands:")
	names := make([]string, 0, len(cmds))
	for n := range cmds {
		names = append(names, n)
	}
	sort.Strings(names)
	for _, n := range names {
		fmt.Fprintf(w, "  %-13s %s\n", n, cmds[n].summary)
	}
	fmt.Fprintln(w, "\nRun 'holomix COMMAND -h' for a command's options.")
}

func runVersion(_ context.Context, e *env, _ []string) int {
	fmt.Fprintf(e.stdout, "holomix %s\n", version)
	return 0
}
