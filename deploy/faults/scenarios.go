package main

import (
	"context"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"sort"
	"strings"
	"syscall"
	"time"

	"holomix/deploy/internal/rig"
	"holomix/internal/testenv"
)

// Scenarios returns the fault scenarios in order.
func Scenarios() []Scenario {
	return []Scenario{
		{Name: "sigkill-restart-x3", Run: sigkill},
		{Name: "influx-down", Run: influxDown},
		{Name: "influx-down-spool-limit", Run: spoolLimit},
		{Name: "broker-restart", Run: brokerRestart},
		{Name: "webhook-down-500-429", Run: webhookOutage},
		{Name: "storage-disk-full", Run: diskFull},
		{Name: "malformed-10pct", Run: malformed},
		{Name: "clock-ahead-and-late", Run: clockTrouble},
		{Name: "sigterm-under-load", Run: sigterm},
	}
}

// 1. SIGKILL under load, restart, three times in a row.
func sigkill(ctx context.Context, c *Case) error {
	if err := c.start(); err != nil {
		return err
	}
	done := c.traffic(ctx, c.readings(c.stepsFor(c.s.Mode.Traffic)), c.s.Mode.Rate)
	for _, f := range []float64{0.25, 0.5, 0.75} {
		if err := c.waitAcked(ctx, f); err != nil {
			return err
		}
		spooled := c.d.Metric("holomix_readings_spooled_total")
		c.d.Kill()
		time.Sleep(500 * time.Millisecond)
		if err := c.d.Start(); err != nil {
			return fmt.Errorf("restart after SIGKILL: %w", err)
		}
		c.note("SIGKILL at %.0f %% of the traffic (%.0f readings spooled by that process)", 100*f, spooled)
	}
	if err := <-done; err != nil {
		return err
	}
	if n := c.d.Log.Count(`"msg":"state restored"`); n != 4 {
		c.fail("%d \"state restored\" log lines, want 4 (start and three restarts)", n)
	}
	return nil
}

// 2a. InfluxDB down for InfluxOutage under load, then back.
func influxDown(ctx context.Context, c *Case) error {
	if err := c.start(); err != nil {
		return err
	}
	m := c.s.Mode
	done := c.traffic(ctx, c.readings(c.stepsFor(m.InfluxOutage+m.Traffic)), m.Rate)
	if err := c.waitAcked(ctx, 0.2); err != nil {
		return err
	}
	c.s.in.Stop()
	stopped := time.Now()
	restarted := false
	defer func() {
		if !restarted { // an early return must not leave the shared database down
			_ = c.s.in.Restart()
		}
	}()
	time.Sleep(min(3*time.Second, m.InfluxOutage/2))
	code, body, err := c.d.Readyz()
	db, _ := body["database"].(map[string]any)
	detail := fmt.Sprint(db["detail"])
	if err != nil || code != 200 || !strings.Contains(detail, "spooling") {
		c.fail("/readyz with the database down: %d %v (want 200 and the database \"spooling\")", code, body)
	}
	time.Sleep(time.Until(stopped.Add(m.InfluxOutage)))
	pending := c.d.Metric("holomix_spool_readings")
	restarted = true
	if err := c.s.in.Restart(); err != nil {
		return err
	}
	c.note("database down %v; %.0f readings spooled when it came back", m.InfluxOutage, pending)
	if pending <= 0 {
		c.fail("nothing was waiting in the spool after a %v outage", m.InfluxOutage)
	}
	return <-done
}

// 2b. InfluxDB down long enough to fill the spool's size limit: profiles
// are published chunk by chunk until back-pressure has held for
// SpoolFullHold (the broker keeps taking them meanwhile), then the database
// comes back.
func spoolLimit(ctx context.Context, c *Case) error {
	c.cfg.SpoolMaxBytes = "1MiB" // the smallest the configuration accepts
	c.s.in.Stop()
	restarted := false
	defer func() {
		if !restarted {
			_ = c.s.in.Restart()
		}
	}()
	if err := c.start(); err != nil {
		return err
	}
	const chunk = 10 // steps: 10 profiles a site, 12 readings each
	var since time.Time
	var spooledAt float64
	limit := time.Now().Add(3 * time.Minute)
	for k := 0; since.IsZero() || time.Since(since) < c.s.Mode.SpoolFullHold; k += chunk {
		if time.Now().After(limit) {
			return fmt.Errorf("back-pressure not active after %d readings", len(c.want))
		}
		var msgs []rig.Msg
		for j := k; j < k+chunk; j++ {
			msgs = append(msgs, c.stream.ProfilesStep(j)...)
			c.stream.AddReadings(c.want, j)
		}
		c.steps = k + chunk
		if err := <-c.traffic(ctx, msgs, 1000); err != nil {
			return err
		}
		if since.IsZero() && c.d.Metric("holomix_backpressure_active") == 1 {
			since, spooledAt = time.Now(), c.d.Metric("holomix_readings_spooled_total")
			// The gauge is set just before the line is logged, and the line
			// still has to cross the daemon's stdout pipe.
			if !waitFor(ctx, 10*time.Second, func() bool { return c.d.Log.Count("spool full: messages are not acknowledged") > 0 }) {
				c.fail("no \"spool full: messages are not acknowledged\" log line")
			}
			if code, body, _ := c.d.Readyz(); code != 503 {
				c.fail("/readyz under back-pressure: %d %v (want 503)", code, body)
			}
		}
	}
	c.alerts = c.stream.ExpectedAlerts(c.steps)
	spooled := c.d.Metric("holomix_readings_spooled_total")
	acks := c.d.Metric("holomix_mqtt_acks_pending")
	c.note("back-pressure held %v while %d readings were published: spooled %.0f → %.0f, %.0f messages unacknowledged, the broker kept the rest",
		time.Since(since).Round(time.Second), len(c.want), spooledAt, spooled, acks)
	if spooled != spooledAt {
		c.fail("readings were spooled under back-pressure (%.0f → %.0f)", spooledAt, spooled)
	}
	restarted = true
	if err := c.s.in.Restart(); err != nil {
		return err
	}
	c.checks = append(c.checks, func() {
		if c.d.Metric("holomix_backpressure_active") != 0 {
			c.fail("back-pressure still active after the database came back")
		}
		if c.d.Log.Count("spool has room again") == 0 {
			c.fail("no \"spool has room again\" log line")
		}
	})
	return nil
}

// 3. Mosquitto restarted under load (persistence on).
func brokerRestart(ctx context.Context, c *Case) error {
	if err := c.start(); err != nil {
		return err
	}
	done := c.traffic(ctx, c.readings(c.stepsFor(c.s.Mode.Traffic)), c.s.Mode.Rate)
	if err := c.waitAcked(ctx, 0.4); err != nil {
		return err
	}
	c.s.mq.Stop()
	time.Sleep(time.Second)
	if err := c.s.mq.Restart(); err != nil {
		return err
	}
	if err := <-done; err != nil {
		return err
	}
	retried := c.pub.Tries.Load() - int64(len(c.msgs))
	c.note("broker stopped (SIGTERM) at 40 %% and restarted after 1 s; publisher resent %d messages", retried)
	c.checks = append(c.checks, func() {
		if n := c.d.Metric("holomix_mqtt_reconnects_total"); n < 1 {
			c.fail("no reconnect counted")
		}
	})
	return nil
}

// 4. The webhook receiver down, then 500, then 429 with Retry-After, then well.
func webhookOutage(ctx context.Context, c *Case) error {
	m := c.s.Mode
	const retryAfter = 3
	c.hook.Down()
	if err := c.start(); err != nil {
		return err
	}
	done := c.traffic(ctx, c.readings(c.stepsFor(m.HookDown+m.HookFail+m.HookThrottle+m.Traffic/2)), m.Rate)
	start := time.Now()
	sleepUntil := func(t time.Time) {
		select {
		case <-ctx.Done():
		case <-time.After(time.Until(t)):
		}
	}
	sleepUntil(start.Add(m.HookDown))
	c.hook.SetMode(rig.HookFail, 0)
	if err := c.hook.Up(); err != nil {
		return err
	}
	sleepUntil(start.Add(m.HookDown + m.HookFail))
	c.hook.SetMode(rig.HookThrottle, retryAfter)
	sleepUntil(start.Add(m.HookDown + m.HookFail + m.HookThrottle))
	c.hook.SetMode(rig.HookOK, 0)
	c.note("receiver refused connections %v, answered 500 for %v, 429 (Retry-After: %d) for %v", m.HookDown, m.HookFail, retryAfter, m.HookThrottle)
	if err := <-done; err != nil {
		return err
	}
	c.checks = append(c.checks, func() {
		at := c.result.Alerts
		c.note("%d refused answers (%d of them 429); shortest wait after a 429: %v", at.Refused, at.Throttled, at.MinRetryAfterGap.Round(time.Millisecond))
		if at.Throttled == 0 || at.Refused == at.Throttled {
			c.fail("the receiver's 500 and 429 phases saw no attempts (%d refused, %d throttled)", at.Refused, at.Throttled)
		}
		if at.Throttled > 0 && at.MinRetryAfterGap < retryAfter*time.Second {
			c.fail("a message was retried %v after a 429 with Retry-After: %d", at.MinRetryAfterGap, retryAfter)
		}
		if n := c.d.Metric(`holomix_alert_retries_total{receiver="hook"}`); n == 0 {
			c.fail("no retries counted")
		}
	})
	return nil
}

// 5. The storage directory's disk full: a 32 MiB tmpfs filled by another
// file under load, then freed. Without the permission to mount, the
// spool's own size limit stands in (and the output says so).
func diskFull(ctx context.Context, c *Case) error {
	dir := c.cfg.Dir
	if err := os.MkdirAll(dir, 0o750); err != nil {
		return err
	}
	out, err := exec.Command("mount", "-t", "tmpfs", "-o", "size=32m", "tmpfs", dir).CombinedOutput()
	if err != nil {
		c.note("tmpfs mount not possible (%v: %s): fell back to the spool's size limit with the database down", err, strings.TrimSpace(string(out)))
		return spoolLimit(ctx, c)
	}
	c.cleanup = append(c.cleanup, func() {
		if out, err := exec.Command("umount", dir).CombinedOutput(); err != nil {
			c.s.logf("umount %s: %v %s", dir, err, out)
		}
	})
	// As an operator must, keep the spool's own limit well below the disk:
	// a spool that fills its disk by itself cannot even delete (bbolt needs
	// free pages to write the deletion), whereas a disk filled by something
	// else recovers when that space is freed.
	c.cfg.SpoolMaxBytes = "4MiB"
	c.note("storage.dir on a 32 MiB tmpfs, storage.spool_max_bytes 4MiB")
	if err := c.start(); err != nil {
		return err
	}
	m := c.s.Mode
	cycles := max(1, m.DiskFullCycles)
	done := c.traffic(ctx, c.readings(c.stepsFor(time.Duration(cycles)*(m.DiskFullHold+5*time.Second)+m.Traffic)), m.Rate)
	ballast := filepath.Join(dir, "ballast")
	for cy := 0; cy < cycles; cy++ {
		if err := c.waitAcked(ctx, float64(cy+1)/float64(cycles+2)); err != nil {
			return err
		}
		// Either the disk refuses a commit, or (when the ballast left more
		// room than the spool's own limit) the spool fills up to that limit
		// first: both stop acknowledging with an error line.
		stopped := func() int {
			return c.d.Log.Count("spool commit failed") + c.d.Log.Count("spool full: messages are not acknowledged")
		}
		before := stopped()
		n, err := fill(ballast)
		if !errors.Is(err, syscall.ENOSPC) {
			return fmt.Errorf("filling the disk: %v", err)
		}
		full := time.Now()
		if !waitFor(ctx, 30*time.Second, func() bool { return stopped() > before }) {
			c.fail("no \"spool commit failed\" or \"spool full\" log line within 30 s of the disk filling up")
		}
		code, body, _ := c.d.Readyz()
		sp, _ := body["spool"].(map[string]any)
		c.note("disk filled (%d KiB ballast); /readyz %d, spool: %v", n>>10, code, sp["detail"])
		if code != 503 {
			c.fail("/readyz with the disk full: %d (want 503)", code)
		}
		time.Sleep(time.Until(full.Add(m.DiskFullHold)))
		if err := os.Remove(ballast); err != nil {
			return err
		}
		c.note("space freed after %v", time.Since(full).Round(time.Second))
	}
	if err := <-done; err != nil {
		return err
	}
	// Which parts of the daemon met the full disk and waited (each logs once per wait).
	var waited []string
	for _, w := range []struct{ what, line string }{
		{"group commit", "spool commit failed"},
		{"spool limit", "spool full: messages are not acknowledged"},
		{"derived points", "detection waits until its derived points can be spooled"},
		{"alert outbox", "detection waits until the alert outbox can store the event"},
		{"database writer", "the database writer waits for space"},
		{"checkpoint", "checkpoint failed"},
	} {
		if n := c.d.Log.Count(w.line); n > 0 {
			waited = append(waited, fmt.Sprintf("%s %d", w.what, n))
		}
	}
	c.note("waits logged: %s", strings.Join(waited, ", "))
	return nil
}

// fill writes path until the file system is full and returns the bytes written.
func fill(path string) (int64, error) {
	f, err := os.Create(path)
	if err != nil {
		return 0, err
	}
	defer f.Close()
	buf := make([]byte, 64<<10)
	var n int64
	for {
		k, err := f.Write(buf)
		n += int64(k)
		if err != nil {
			if err2 := f.Sync(); err2 != nil && !errors.Is(err, syscall.ENOSPC) {
				return n, err2
			}
			return n, err
		}
	}
}

// badPayloads are malformed or oversized payloads with the rejection
// reason the decoders give them (max_payload_bytes is 4096).
var badPayloads = []struct{ reason, payload string }{
	{"bad_json", `{"time":"2026-01-01T00:00:00Z","depth_m":3,"temp_c":`},
	{"too_large", `{"time":"2026-01-01T00:00:00Z","depth_m":3,"temp_c":4.1,"pad":"` + strings.Repeat("x", 6000) + `"}`},
	{"empty", ``},
	{"invalid_utf8", "{\"time\":\"2026-01-01T00:00:00Z\",\"depth_m\":3,\"temp_c\":4.1,\"sensor\":\"\xff\xfe\"}"},
	{"too_deep", strings.Repeat("[", 200) + strings.Repeat("]", 200)},
	{"bad_shape", `[1,2,3]`},
	{"bad_number", `{"time":"2026-01-01T00:00:00Z","depth_m":3,"temp_c":"warm"}`},
	{"non_finite", `{"time":"2026-01-01T00:00:00Z","depth_m":3,"temp_c":1e999}`},
	{"negative_depth", `{"time":"2026-01-01T00:00:00Z","depth_m":-3,"temp_c":4.1}`},
	{"missing_field", `{"time":"2026-01-01T00:00:00Z","depth_m":3}`},
	{"bad_time", `{"time":"yesterday noon","depth_m":3,"temp_c":4.1}`},
	{"bad_unit", `{"time":"2026-01-01T00:00:00Z","depth_m":3,"temp_c":4.1,"unit":"furlongs"}`},
	{"bad_depth", `{"time":"2026-01-01T00:00:00Z","depth_m":300000,"temp_c":4.1}`},
	{"too_large", strings.Repeat(" ", 200<<10)}, // 200 KiB of nothing
}

// 6. Malformed and oversized payloads at 10 % of the messages.
func malformed(ctx context.Context, c *Case) error {
	c.cfg.MaxPayloadBytes = 4096
	if err := c.start(); err != nil {
		return err
	}
	valid := c.readings(c.stepsFor(c.s.Mode.Traffic))
	every := c.s.Mode.MalformedEvery
	injected := map[string]int{}
	var msgs []rig.Msg
	bad := 0
	for i, m := range valid {
		msgs = append(msgs, m)
		if (i+1)%(every-1) == 0 && i+1 < len(valid) {
			p := badPayloads[bad%len(badPayloads)]
			bad++
			injected[p.reason]++
			msgs = append(msgs, rig.Msg{Topic: m.Topic, Payload: []byte(p.payload)})
		}
	}
	done := c.traffic(ctx, msgs, c.s.Mode.Rate*float64(every)/float64(every-1))
	if err := <-done; err != nil {
		return err
	}
	c.note("%d malformed or oversized among %d messages (%.1f %%)", bad, len(msgs), 100*float64(bad)/float64(len(msgs)))
	c.checks = append(c.checks, func() {
		mm, err := c.d.Metrics()
		if err != nil {
			c.fail("metrics: %v", err)
			return
		}
		var got []string
		for name, v := range mm {
			if !strings.HasPrefix(name, "holomix_messages_rejected_total{") || v == 0 {
				continue
			}
			reason := strings.TrimSuffix(strings.TrimPrefix(name, `holomix_messages_rejected_total{reason="`), `"}`)
			got = append(got, fmt.Sprintf("%s=%.0f", reason, v))
			if int(v) != injected[reason] {
				c.fail("rejected{reason=%q} = %.0f, injected %d", reason, v, injected[reason])
			}
		}
		for reason, n := range injected {
			if mm[fmt.Sprintf(`holomix_messages_rejected_total{reason=%q}`, reason)] == 0 {
				c.fail("rejected{reason=%q} = 0, injected %d", reason, n)
			}
		}
		sort.Strings(got)
		c.note("rejected by reason (/metrics): %s", strings.Join(got, " "))
		if dl := c.d.Metric("holomix_dead_letters"); dl != float64(bad) {
			c.note("%.0f dead letters kept (of %d)", dl, bad)
		}
	})
	return nil
}

// 7. Clock trouble: one buoy an hour ahead of the clock, one a day late.
func clockTrouble(ctx context.Context, c *Case) error {
	ahead, behind := "ahead000", "behind000"
	for _, id := range []string{ahead, behind} {
		c.cfg.Sites = append(c.cfg.Sites, rig.SiteConfig{ID: id, MaxDepth: 13, Depths: c.stream.Depths})
	}
	if err := c.start(); err != nil {
		return err
	}
	steps := c.stepsFor(c.s.Mode.Traffic)
	wall := time.Now().UTC().Truncate(time.Second)
	var msgs []rig.Msg
	oddKeys := map[string][]rig.Key{}
	for k := 0; k < steps; k++ {
		msgs = append(msgs, c.stream.ReadingsStep(k)...)
		c.stream.AddReadings(c.want, k)
		for _, b := range []struct {
			site string
			t    time.Time
		}{{ahead, wall.Add(time.Hour + time.Duration(k)*10*time.Second)}, {behind, wall.Add(-24*time.Hour + time.Duration(k)*10*time.Second)}} {
			for d, z := range c.stream.Depths {
				v := 10 + 0.01*float64((k+d)%5)
				msgs = append(msgs, rig.Msg{Topic: c.prefix + "/" + b.site + "/temp",
					Payload: fmt.Appendf(nil, `{"time":"%s","depth_m":%g,"temp_c":%.2f}`, b.t.Format(time.RFC3339), z, v)})
				key := rig.KeyOf(b.site, z, b.t)
				c.want[key] = float64(int(v*100+0.5)) / 100
				oddKeys[b.site] = append(oddKeys[b.site], key)
			}
		}
	}
	c.steps, c.alerts = steps, c.stream.ExpectedAlerts(steps)
	if err := <-c.traffic(ctx, msgs, c.s.Mode.Rate); err != nil {
		return err
	}
	c.checks = append(c.checks, func() {
		byKey := map[rig.Key]rig.Point{}
		for _, p := range c.points {
			byKey[p.Key] = p
		}
		future, late := 0, 0
		for _, k := range oddKeys[ahead] {
			if p, ok := byKey[k]; ok && p.QC&8 != 0 {
				future++
			}
		}
		for _, k := range oddKeys[behind] {
			if _, ok := byKey[k]; ok {
				late++
			}
		}
		normalFlagged := 0
		for _, p := range c.points {
			if p.Key.Site != ahead && p.Key.Site != behind && p.QC != 0 {
				normalFlagged++
			}
		}
		c.note("buoy an hour ahead: %d of %d stored flagged future (qc bit 8); buoy a day late: %d of %d stored; other buoys' readings flagged: %d",
			future, len(oddKeys[ahead]), late, len(oddKeys[behind]), normalFlagged)
		if future != len(oddKeys[ahead]) {
			c.fail("%d of %d readings from the future stored with the future flag", future, len(oddKeys[ahead]))
		}
		if late != len(oddKeys[behind]) {
			c.fail("%d of %d day-late readings stored", late, len(oddKeys[behind]))
		}
		if normalFlagged > 0 {
			c.fail("%d readings of well-behaved buoys were flagged", normalFlagged)
		}
	})
	return nil
}

// 8. SIGTERM under load: drains within the budget, exits 0, loses nothing.
func sigterm(ctx context.Context, c *Case) error {
	if err := c.start(); err != nil {
		return err
	}
	done := c.traffic(ctx, c.readings(c.stepsFor(c.s.Mode.Traffic)), c.s.Mode.Rate)
	if err := c.waitAcked(ctx, 0.4); err != nil {
		return err
	}
	// The budget governs the daemon's own drain, which it logs as it stops;
	// the outside view (signal to exit status) adds process teardown and the
	// suite's scheduling and is reported beside it, with 3 s more allowed.
	code, took, err := c.d.Term(c.s.Mode.SIGTERMBudget + 5*time.Second)
	own, logged := testenv.StoppedTook(c.d.Log.String())
	c.note("SIGTERM at 40 %%: drained in %v, exit %d after %v", own, code, took.Round(time.Millisecond))
	switch {
	case !logged:
		c.fail("no \"stopped\" log line")
	case err != nil || code != 0 || own > c.s.Mode.SIGTERMBudget || took > c.s.Mode.SIGTERMBudget+3*time.Second:
		c.fail("SIGTERM under load: drained in %v, exit %d after %v (want 0, drained within %v): %v",
			own, code, took.Round(time.Millisecond), c.s.Mode.SIGTERMBudget, err)
	}
	time.Sleep(time.Second)
	if err := c.d.Start(); err != nil {
		return err
	}
	return <-done
}
