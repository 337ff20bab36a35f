package config

import (
	"fmt"
	"strings"
	"testing"
)

func instance(t *testing.T, name, clientID, dir string, topics []string, sites ...string) Instance {
	t.Helper()
	var b strings.Builder
	fmt.Fprintf(&b, "mqtt:\n  client_id: %s\n  subscriptions:\n", clientID)
	for _, tp := range topics {
		fmt.Fprintf(&b, "    - topic: %s\n      template: buoys/{site}/chain\n", tp)
	}
	fmt.Fprintf(&b, "storage:\n  dir: %s\nsites:\n", dir)
	for _, s := range sites {
		fmt.Fprintf(&b, "  - id: %s\n    max_depth_m: 10\n", s)
	}
	cfg, err := Parse([]byte(b.String()), Options{Getenv: noenv})
	if err != nil {
		t.Fatalf("%s: %v\n%s", name, err, b.String())
	}
	return Instance{Name: name, Config: cfg}
}

func TestPartitionClean(t *testing.T) {
	a := instance(t, "a.yaml", "holomix-a", "/var/lib/holomix-a", []string{"buoys/larchmere/chain", "buoys/fenwater/chain"}, "larchmere", "fenwater")
	b := instance(t, "b.yaml", "holomix-b", "/var/lib/holomix-b", []string{"buoys/gorsemoor/chain", "buoys/aldwick/chain"}, "gorsemoor", "aldwick")
	if w := PartitionWarnings([]Instance{a, b}); len(w) != 0 {
		t.Fatalf("clean partition warned: %q", w)
	}
}

func TestPartitionClashes(t *testing.T) {
	a := instance(t, "a.yaml", "holomix", "/var/lib/holomix", []string{"buoys/+/chain"}, "larchmere", "fenwater")
	b := instance(t, "b.yaml", "holomix", "/var/lib/holomix/", []string{"buoys/gorsemoor/chain"}, "gorsemoor", "fenwater")
	c := instance(t, "c.yaml", "holomix-c", "/srv/c", []string{"lakes/#"}, "aldwick")
	w := PartitionWarnings([]Instance{a, b, c})
	want := []string{
		`site "fenwater" is configured in both a.yaml and b.yaml`,
		`topic filter "buoys/+/chain" (a.yaml mqtt.subscriptions[0]) overlaps "buoys/gorsemoor/chain" (b.yaml mqtt.subscriptions[0])`,
		`mqtt.client_id "holomix" is used by both a.yaml and b.yaml`,
		`storage.dir /var/lib/holomix is used by both a.yaml and b.yaml`,
	}
	if len(w) != len(want) {
		t.Fatalf("got %d warnings, want %d: %q", len(w), len(want), w)
	}
	for i := range want {
		if !strings.HasPrefix(w[i], want[i]) {
			t.Errorf("warning %d = %q, want prefix %q", i, w[i], want[i])
		}
	}
	for _, x := range w {
		if strings.Contains(x, "c.yaml") {
			t.Errorf("c.yaml is disjoint but appears in %q", x)
		}
	}
}
