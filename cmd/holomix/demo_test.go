package main

import (
	"bytes"
	"context"
	"strings"
	"testing"
)

func runDemoCmd(t *testing.T, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	var out, errb bytes.Buffer
	e := &env{stdin: strings.NewReader(""), stdout: &out, stderr: &errb, getenv: func(string) string { return "" }}
	code = dispatch(context.Background(), e, append([]string{"demo"}, args...))
	return code, out.String(), errb.String()
}

// TestDemoCommandShortRun: `holomix demo` through the command dispatcher,
// three wall seconds at a high speed: exit 0, the status page address and
// the summary are printed.
func TestDemoCommandShortRun(t *testing.T) {
	code, out, errs := runDemoCmd(t, "--speed", "2000000", "--for", "3s", "--seed", "3", "--dir", t.TempDir()+"/store")
	if code != 0 {
		t.Fatalf("exit %d\nstdout:\n%s\nstderr:\n%s", code, out, errs)
	}
	for _, want := range []string{"status page: http://127.0.0.1:", "seed 3", "2000000× real time", "summary: time was up (--for)", "readings   published"} {
		if !strings.Contains(out, want) {
			t.Errorf("stdout lacks %q:\n%s", want, out)
		}
	}
}

// TestDemoCommandUsageErrors: bad options exit 2 with a message, before
// anything starts; -h exits 0 with the usage.
func TestDemoCommandUsageErrors(t *testing.T) {
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"--format", "xml"}, "format"},
		{[]string{"--listen", "0.0.0.0:8080"}, "loopback"},
		{[]string{"--speed", "-3"}, "negative"},
		{[]string{"--log-level", "loud"}, "--log-level"},
		{[]string{"--influx-token", "u:p"}, "URL"},
		{[]string{"extra"}, "usage: holomix demo"},
	} {
		code, _, errs := runDemoCmd(t, c.args...)
		if code != 2 || !strings.Contains(errs, c.want) {
			t.Errorf("demo %v: exit %d, stderr %q; want 2 and %q", c.args, code, errs, c.want)
		}
	}
	code, _, errs := runDemoCmd(t, "-h")
	if code != 0 || !strings.Contains(errs, "usage: holomix demo") || !strings.Contains(errs, "--for") {
		t.Errorf("demo -h: exit %d, stderr %q", code, errs)
	}
}
