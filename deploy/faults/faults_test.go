package main

import (
	"bytes"
	"context"
	"testing"
)

// TestFaultSuiteReduced runs every fault scenario in the reduced mode
// (10-second outages) against a real Mosquitto and InfluxDB 1.8: no reading
// may be lost or duplicated, every alert must arrive exactly once per
// episode. deploy/faults.sh runs the full mode (minute-long outages).
func TestFaultSuiteReduced(t *testing.T) {
	var log bytes.Buffer
	s := &Suite{Mode: Reduced, Out: t.TempDir(), Log: &log}
	if err := s.Start(context.Background()); err != nil {
		t.Fatal(err)
	}
	defer s.Stop()
	rs := s.Run(context.Background(), nil)
	t.Logf("\n%s", Table(Reduced, rs))
	if Failed(rs) || len(rs) != len(Scenarios()) {
		t.Errorf("fault suite failed; log:\n%s", log.String())
	}
}
