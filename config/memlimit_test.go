package config

import (
	"strings"
	"testing"
)

// TestMemoryLimit: storage.memory_limit defaults to 112MiB, an explicit 0
// means no limit, sizes parse with units, and a limit too small to run is
// refused with its line.
func TestMemoryLimit(t *testing.T) {
	base := "mqtt:\n  subscriptions:\n    - topic: lakes/+/temp\n      template: lakes/{site}/temp\nstorage:\n  dir: /tmp/holomix-test\n"
	for _, c := range []struct {
		line string
		want ByteSize
	}{
		{"", DefaultMemoryLimit},
		{"  memory_limit: 0\n", 0},
		{"  memory_limit: 200MiB\n", 200 << 20},
		{"  memory_limit: 64MB\n", 64e6},
	} {
		cfg, err := Parse([]byte(base+c.line), Options{Getenv: noenv})
		if err != nil {
			t.Fatalf("%q: %v", c.line, err)
		}
		if cfg.Storage.MemoryLimit != c.want {
			t.Errorf("%q: memory limit %d, want %d", c.line, cfg.Storage.MemoryLimit, c.want)
		}
	}
	_, err := Parse([]byte(base+"  memory_limit: 1MiB\n"), Options{Getenv: noenv})
	if err == nil || !strings.Contains(err.Error(), "memory_limit") || !strings.Contains(err.Error(), "line 7") {
		t.Fatalf("1MiB limit: %v", err)
	}
	if DefaultMemoryLimit != 112<<20 {
		t.Errorf("default %d", DefaultMemoryLimit)
	}
}
