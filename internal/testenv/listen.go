package testenv

import (
	"bufio"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"
)

// ListensOn reports whether process pid holds a listening TCP socket on
// 127.0.0.1:port (or on every address). It reads /proc/net/tcp for the
// socket's inode and the process's /proc/PID/fd links for that inode, so it
// tells the server a test started from another one that took the same port.
// Tests in several packages pick free ports at the same moment; a port free
// when FreePort looked can be bound by someone else before the server
// starts, and then a readiness probe would reach the wrong server.
func ListensOn(pid, port int) bool {
	inodes, err := listeningInodes(port)
	if err != nil || len(inodes) == 0 {
		return false
	}
	fds, err := os.ReadDir(filepath.Join("/proc", strconv.Itoa(pid), "fd"))
	if err != nil {
		return false
	}
	for _, fd := range fds {
		link, err := os.Readlink(filepath.Join("/proc", strconv.Itoa(pid), "fd", fd.Name()))
		if err != nil {
			continue
		}
		if ino, ok := strings.CutPrefix(link, "socket:["); ok && inodes[strings.TrimSuffix(ino, "]")] {
			return true
		}
	}
	return false
}

// listeningInodes returns the inodes of IPv4 TCP sockets in LISTEN state on
// 127.0.0.1:port or 0.0.0.0:port.
func listeningInodes(port int) (map[string]bool, error) {
	f, err := os.Open("/proc/net/tcp")
	if err != nil {
		return nil, fmt.Errorf("read listening sockets: %w", err)
	}
	defer f.Close()
	want := map[string]bool{
		fmt.Sprintf("0100007F:%04X", port): true, // 127.0.0.1, little-endian hex
		fmt.Sprintf("00000000:%04X", port): true,
	}
	inodes := map[string]bool{}
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		// sl local_address rem_address st tx:rx tr:when retrnsmt uid timeout inode
		fields := strings.Fields(sc.Text())
		if len(fields) < 10 || !want[fields[1]] || fields[3] != "0A" { // 0A: TCP_LISTEN
			continue
		}
		inodes[fields[9]] = true
	}
	return inodes, sc.Err()
}

// errPortTaken: the server exited because another process holds its port.
var errPortTaken = errors.New("port taken by another process")

// portAttempts bounds how often a server is started on fresh ports after
// another process took the one picked for it.
const portAttempts = 5

// onFreshPorts runs try (which picks fresh ports and starts a server) again
// while it fails with errPortTaken, at most portAttempts times.
func onFreshPorts[T any](try func() (T, error)) (T, error) {
	for attempt := 1; ; attempt++ {
		v, err := try()
		if err == nil || !errors.Is(err, errPortTaken) || attempt == portAttempts {
			return v, err
		}
	}
}

// waitOwnListeners waits until the process listens on every port itself and
// ready (if not nil) answers true. A process that exits meanwhile is an
// error; errPortTaken when its log says a port was in use, so that the
// caller can start it again on fresh ports.
func (p *process) waitOwnListeners(ports []int, ready func() bool, d time.Duration) error {
	p.mu.Lock()
	cmd, done := p.cmd, p.done
	p.mu.Unlock()
	if cmd == nil {
		return fmt.Errorf("%s is not running", p.name)
	}
	deadline := time.Now().Add(d)
	for {
		select {
		case <-done:
			tail := p.tail()
			if strings.Contains(tail, "address already in use") || strings.Contains(tail, "Address already in use") {
				return fmt.Errorf("%s exited: %w\n%s", p.name, errPortTaken, tail)
			}
			return fmt.Errorf("%s exited before it was ready\n%s", p.name, tail)
		default:
		}
		own := true
		for _, port := range ports {
			if !ListensOn(cmd.Process.Pid, port) {
				own = false
				break
			}
		}
		if own && (ready == nil || ready()) {
			return nil
		}
		if time.Now().After(deadline) {
			return fmt.Errorf("%s not listening on %v after %s\n%s", p.name, ports, d, p.tail())
		}
		time.Sleep(25 * time.Millisecond)
	}
}
