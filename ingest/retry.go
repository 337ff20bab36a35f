package ingest

import (
	"context"
	"errors"
	"syscall"
	"time"
)

// DiskFull reports whether err is the storage disk refusing a write for
// lack of space (ENOSPC) or of quota (EDQUOT): a condition to wait out, not
// a failure.
func DiskFull(err error) bool {
	return errors.Is(err, syscall.ENOSPC) || errors.Is(err, syscall.EDQUOT)
}

// Retry paces the retries of a write to local storage: pauses of 100 ms
// doubling to 5 s, and a log line on the first failure and every 20th after
// it. The zero value is ready; one Retry serves one run of failures.
type Retry struct{ n int }

// Attempt is the number of the failed attempt being handled (from 1).
func (r *Retry) Attempt() int { return r.n + 1 }

// LogNow reports whether this failure should be logged.
func (r *Retry) LogNow() bool { return r.n%20 == 0 }

// Wait pauses before the next attempt; false when ctx ended first.
func (r *Retry) Wait(ctx context.Context) bool {
	t := time.NewTimer(min(100*time.Millisecond<<min(r.n, 6), 5*time.Second))
	defer t.Stop()
	r.n++
	select {
	case <-ctx.Done():
		return false
	case <-t.C:
		return true
	}
}

// Reset starts a new run of failures.
func (r *Retry) Reset() { r.n = 0 }
