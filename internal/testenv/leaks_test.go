package testenv

import (
	"testing"
	"time"

	"go.uber.org/goleak"
)

// A goroutine that ends within the grace period is not a leak; one that
// outlives it is reported.
func TestFindLeaksWaitsForLateGoroutines(t *testing.T) {
	before := goleak.IgnoreCurrent() // whatever earlier tests left running
	done := make(chan struct{})
	go func() { time.Sleep(800 * time.Millisecond); close(done) }()
	if err := findLeaks(5*time.Second, before); err != nil {
		t.Fatalf("a goroutine ending after 0.8 s was reported: %v", err)
	}
	<-done

	stop := make(chan struct{})
	go func() { <-stop }()
	err := findLeaks(300*time.Millisecond, before)
	close(stop)
	if err == nil {
		t.Fatal("a goroutine still running was not reported")
	}
}
