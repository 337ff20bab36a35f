package testenv

import (
	"bufio"
	"encoding/json"
	"strings"
	"time"
)

// StoppedTook returns how long the daemon's own shutdown took, as it logged
// it in its last JSON "stopped" line (slog writes a duration as integer
// nanoseconds), and whether there was such a line. Timing a SIGTERM from the
// outside adds signal delivery, process teardown and the test's own
// scheduling, which on a loaded machine under the race detector can be
// seconds; this is the figure the daemon's shutdown budget governs.
func StoppedTook(log string) (time.Duration, bool) {
	took, found := time.Duration(0), false
	sc := bufio.NewScanner(strings.NewReader(log))
	sc.Buffer(make([]byte, 64*1024), 4*1024*1024)
	for sc.Scan() {
		line := sc.Bytes()
		if !strings.Contains(string(line), `"msg":"stopped"`) {
			continue
		}
		var l struct {
			Msg  string `json:"msg"`
			Took int64  `json:"took"`
		}
		if json.Unmarshal(line, &l) == nil && l.Msg == "stopped" {
			took, found = time.Duration(l.Took), true
		}
	}
	return took, found
}
