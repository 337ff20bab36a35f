package ingest

import (
	"context"
	"errors"
	"fmt"
	"io"
	"syscall"
	"testing"
)

// TestRetryAndDiskFull: ENOSPC and EDQUOT, also wrapped, are a full disk
// (write(2): the errors a full file system or quota gives); other errors
// are not; the log line comes on the first failure and every 20th; a
// cancelled context ends the wait at once.
func TestRetryAndDiskFull(t *testing.T) {
	for _, err := range []error{syscall.ENOSPC, syscall.EDQUOT, fmt.Errorf("spool: commit: %w", syscall.ENOSPC)} {
		if !DiskFull(err) {
			t.Errorf("DiskFull(%v) = false", err)
		}
	}
	for _, err := range []error{nil, io.EOF, syscall.EIO, errors.New("no space left on device")} {
		if DiskFull(err) {
			t.Errorf("DiskFull(%v) = true", err)
		}
	}
	var r Retry
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	var logged []int
	for i := 0; i < 45; i++ {
		if r.LogNow() {
			logged = append(logged, r.Attempt())
		}
		if r.Wait(ctx) {
			t.Fatal("Wait returned true with the context cancelled")
		}
	}
	if fmt.Sprint(logged) != "[1 21 41]" {
		t.Fatalf("logged attempts %v, want [1 21 41]", logged)
	}
	r.Reset()
	if r.Attempt() != 1 || !r.LogNow() {
		t.Fatal("Reset did not start a new run")
	}
}
