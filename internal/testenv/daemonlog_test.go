package testenv

import (
	"bytes"
	"log/slog"
	"testing"
	"time"
)

// The line StoppedTook reads is the one slog's JSON handler writes for a
// time.Duration attribute (integer nanoseconds); the last such line counts.
func TestStoppedTook(t *testing.T) {
	var buf bytes.Buffer
	log := slog.New(slog.NewJSONHandler(&buf, nil))
	if _, ok := StoppedTook(buf.String()); ok {
		t.Fatal("found a stopped line in an empty log")
	}
	log.Info("stopped", "how", "signal", "took", 2100*time.Millisecond)
	log.Info("readings", "took", 9*time.Second)
	log.Info("stopped", "how", "signal", "took", 1234*time.Millisecond)
	got, ok := StoppedTook("not json\n" + buf.String())
	if !ok || got != 1234*time.Millisecond {
		t.Fatalf("StoppedTook = %v, %v; want 1.234s, true", got, ok)
	}
}
