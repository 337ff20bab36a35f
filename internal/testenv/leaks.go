package testenv

import (
	"fmt"
	"os"
	"testing"
	"time"

	"go.uber.org/goleak"
)

// leakGrace is how long goroutines may take to finish after the last test.
// goleak's own VerifyTestMain retries for well under a second, which a
// connection or timer goroutine ending late on a loaded machine under the
// race detector can outlast; a real leak stays and still fails.
const leakGrace = 10 * time.Second

// MainNoLeaks runs the package's tests (a TestMain body) and, when they
// pass, fails the run if any goroutine is still running leakGrace later.
func MainNoLeaks(m *testing.M, opts ...goleak.Option) {
	code := m.Run()
	if code == 0 {
		if err := findLeaks(leakGrace, opts...); err != nil {
			fmt.Fprintf(os.Stderr, "goleak: goroutines still running %v after the tests passed: %v\n", leakGrace, err)
			code = 1
		}
	}
	os.Exit(code)
}

// findLeaks polls goleak.Find until it reports nothing or grace passes.
func findLeaks(grace time.Duration, opts ...goleak.Option) error {
	deadline := time.Now().Add(grace)
	for {
		err := goleak.Find(opts...)
		if err == nil || time.Now().After(deadline) {
			return err
		}
		time.Sleep(100 * time.Millisecond)
	}
}
