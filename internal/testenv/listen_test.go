package testenv

import (
	"fmt"
	"net"
	"os"
	"strings"
	"testing"
)

// TestListensOn: the test process's own listener is found; a port nobody
// listens on and another process's pid are not.
func TestListensOn(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	port := ln.Addr().(*net.TCPAddr).Port
	if !ListensOn(os.Getpid(), port) {
		t.Fatalf("ListensOn(self, %d) = false while listening", port)
	}
	if ListensOn(1, port) {
		t.Fatalf("ListensOn(1, %d) = true: pid 1 does not hold this test's socket", port)
	}
	ln.Close()
	if ListensOn(os.Getpid(), port) {
		t.Fatalf("ListensOn(self, %d) = true after close", port)
	}
}

// TestInfluxPortTakenRetries: when the port picked for influxd is taken by
// another process before it binds (here: this test holds it), the server
// exits, and the helper starts it again on fresh ports instead of probing
// whatever answers on the taken one.
func TestInfluxPortTakenRetries(t *testing.T) {
	held, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer held.Close()
	heldPort := held.Addr().(*net.TCPAddr).Port
	attempts := 0
	in := StartInfluxConfig(t, func(dir string, httpPort, rpcPort int) (string, error) {
		attempts++
		if attempts == 1 {
			httpPort = heldPort // someone else got there first
		}
		return fmt.Sprintf("reporting-disabled = true\nbind-address = \"127.0.0.1:%d\"\n[meta]\n  dir = \"%s/meta\"\n[data]\n  dir = \"%s/data\"\n  wal-dir = \"%s/wal\"\n[http]\n  bind-address = \"127.0.0.1:%d\"\n[logging]\n  level = \"warn\"\n",
			rpcPort, dir, dir, dir, httpPort), nil
	})
	if attempts != 2 {
		t.Fatalf("config written %d times, want 2 (one refused port, one fresh)", attempts)
	}
	if in.Port == heldPort || !ListensOn(in.p.pid(), in.Port) || !Pings(in.URL) {
		t.Fatalf("influxd not serving on its own port %d (held %d)\n%s", in.Port, heldPort, in.Log())
	}
	if !strings.Contains(in.Log(), "address already in use") {
		t.Fatalf("first attempt's bind failure not in the log:\n%s", in.Log())
	}
}
