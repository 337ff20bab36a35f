package daemon

// End-to-end throughput measurement (not part of the normal test run):
//
//	HOLOMIX_E2E_BENCH=1 go test -run TestE2EThroughput -v -timeout 30m ./internal/daemon/
//
// Method: the messages are published while the subscriber is offline, so the
// broker holds them for its persistent session; then the subscriber connects
// and the time to drain the queue is measured. The publisher thus does not
// compete for the CPU during the measurement. "ingest" is the time until every
// reading is committed to the spool and every message acknowledged; "stored"
// until InfluxDB holds every point. The bare paho subscriber (QoS 1, auto
// acknowledgement, counts only) gives the ceiling of broker + client on this
// machine, in the same run.

import (
	"fmt"
	"os"
	"strconv"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"

	"holomix/internal/testenv"
)

// bareDrain measures a bare paho subscriber draining n queued messages.
func bareDrain(t testing.TB, mq *testenv.Mosquitto, topic string, msgs []e2eMsg) float64 {
	t.Helper()
	var got atomic.Int64
	opts := mqtt.NewClientOptions().AddBroker(mq.URL).SetClientID("bare-counter").SetCleanSession(false).SetOrderMatters(false)
	opts.SetDefaultPublishHandler(func(mqtt.Client, mqtt.Message) { got.Add(1) })
	c := mqtt.NewClient(opts)
	if tok := c.Connect(); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		t.Fatal(tok.Error())
	}
	if tok := c.Subscribe(topic, 1, nil); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		t.Fatal(tok.Error())
	}
	c.Disconnect(100)
	newE2EPublisher(t, mq.URL, "bare-pub").publish(t, msgs, 1000, 10*time.Minute)
	got.Store(0)
	c = mqtt.NewClient(opts)
	start := time.Now()
	if tok := c.Connect(); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		t.Fatal(tok.Error())
	}
	defer c.Disconnect(100)
	for got.Load() < int64(len(msgs)) {
		if time.Since(start) > 5*time.Minute {
			t.Fatalf("bare subscriber: %d of %d", got.Load(), len(msgs))
		}
		time.Sleep(5 * time.Millisecond)
	}
	return float64(len(msgs)) / time.Since(start).Seconds()
}

type drainResult struct {
	readings                 int
	ingestRate, storeRate    float64 // readings/s
	commitAvg                time.Duration
	commitReadings           float64
	rssMB, hwmMB             float64
	anonMB, fileMB           float64 // resident anonymous and file-backed (bbolt's maps) memory
	checkpointAvg            time.Duration
	checkpointN              float64
	checkpointMB             float64 // written by the last checkpoint
	ingestTook, storeTook    time.Duration
	duplicates, acksPendingM float64
}

// daemonDrain publishes msgs while the daemon is stopped, starts it and
// measures the drain.
func daemonDrain(t testing.TB, e *e2eEnv, msgs []e2eMsg, readings int) drainResult {
	t.Helper()
	e.start() // creates the persistent session
	e.term(5 * time.Second)
	newE2EPublisher(t, e.mq.URL, "bench-pub").publish(t, msgs, 1000, 10*time.Minute)
	start := time.Now()
	e.start()
	var r drainResult
	r.readings = readings
	for e.metric("holomix_readings_spooled_total") < float64(readings) {
		if time.Since(start) > 5*time.Minute {
			t.Fatalf("daemon: %v of %d readings spooled", e.metric("holomix_readings_spooled_total"), readings)
		}
		time.Sleep(20 * time.Millisecond)
	}
	r.ingestTook = time.Since(start)
	for e.metric("holomix_readings_stored_total") < float64(readings) {
		if time.Since(start) > 5*time.Minute {
			t.Fatalf("daemon: %v of %d readings stored", e.metric("holomix_readings_stored_total"), readings)
		}
		time.Sleep(20 * time.Millisecond)
	}
	r.storeTook = time.Since(start)
	r.ingestRate = float64(readings) / r.ingestTook.Seconds()
	r.storeRate = float64(readings) / r.storeTook.Seconds()
	time.Sleep(6 * time.Second) // at least one checkpoint at full size
	m := e.metrics()
	if n := m["holomix_spool_commit_duration_seconds_count"]; n > 0 {
		r.commitAvg = time.Duration(m["holomix_spool_commit_duration_seconds_sum"] / n * 1e9)
		r.commitReadings = m["holomix_spool_commit_readings_sum"] / m["holomix_spool_commit_readings_count"]
	}
	if n := m["holomix_checkpoint_duration_seconds_count"]; n > 0 {
		r.checkpointAvg = time.Duration(m["holomix_checkpoint_duration_seconds_sum"] / n * 1e9)
		r.checkpointN = n
	}
	r.checkpointMB = m["holomix_checkpoint_written_bytes"] / 1e6
	r.duplicates = m["holomix_readings_duplicate_total"]
	r.rssMB, r.hwmMB, r.anonMB, r.fileMB = procMem(t, e.cmd.Process.Pid)
	if c, _ := e.term(10 * time.Second); c != 0 {
		t.Fatalf("exit %d", c)
	}
	return r
}

// procMem returns the resident set size, its peak (VmHWM), and its
// anonymous and file-backed parts, in MiB.
func procMem(t testing.TB, pid int) (rss, hwm, anon, file float64) {
	b, err := os.ReadFile(fmt.Sprintf("/proc/%d/status", pid))
	if err != nil {
		t.Fatal(err)
	}
	for _, l := range strings.Split(string(b), "\n") {
		f := strings.Fields(l)
		if len(f) < 2 {
			continue
		}
		v, _ := strconv.ParseFloat(f[1], 64)
		switch f[0] {
		case "VmRSS:":
			rss = v / 1024
		case "VmHWM:":
			hwm = v / 1024
		case "RssAnon:":
			anon = v / 1024
		case "RssFile:":
			file = v / 1024
		}
	}
	return rss, hwm, anon, file
}

func (r drainResult) String() string {
	return fmt.Sprintf("%d readings: ingest %.0f readings/s (%v), stored in InfluxDB %.0f readings/s (%v); commit %v avg, %.0f readings/commit; checkpoint %v avg of %.0f (last wrote %.1f MB); RSS %.0f MB (peak %.0f MB; now %.0f MB anonymous, %.0f MB file-backed); exact duplicates %v",
		r.readings, r.ingestRate, r.ingestTook.Round(time.Millisecond), r.storeRate, r.storeTook.Round(time.Millisecond),
		r.commitAvg.Round(time.Microsecond), r.commitReadings, r.checkpointAvg.Round(time.Millisecond), r.checkpointN, r.checkpointMB,
		r.rssMB, r.hwmMB, r.anonMB, r.fileMB, r.duplicates)
}

// e2eManySites returns profile messages for sites × steps with depths each.
func e2eManySites(sites, depths, steps int, t0 time.Time) []e2eMsg {
	var out []e2eMsg
	for step := 0; step < steps; step++ {
		ts := t0.Add(time.Duration(step) * 10 * time.Minute).Format(time.RFC3339)
		for s := 0; s < sites; s++ {
			var d, v strings.Builder
			for k := 0; k < depths; k++ {
				if k > 0 {
					d.WriteByte(',')
					v.WriteByte(',')
				}
				fmt.Fprintf(&d, "%g", 0.5+float64(k))
				fmt.Fprintf(&v, "%.3f", 20-0.5*float64(k)+0.01*float64(step%7))
			}
			out = append(out, e2eMsg{
				topic:   fmt.Sprintf("lakes/lake%04d/profile", s),
				payload: fmt.Appendf(nil, `{"time":"%s","depths_m":[%s],"temps_c":[%s]}`, ts, d.String(), v.String()),
			})
		}
	}
	return out
}

// BenchmarkE2EThroughput drains queued messages through a real Mosquitto
// into holomix and a real InfluxDB, beside a bare paho subscriber that only
// counts (the broker's ceiling), and logs the rates, commit and checkpoint
// figures and the daemon's memory. Run it once per case:
//
//	go test -run '^$' -bench E2EThroughput -benchtime 1x -v ./internal/daemon/
//
// (HOLOMIX_E2E_BENCH_N sets the readings of the single-reading case,
// default 100,000.)
func BenchmarkE2EThroughput(b *testing.B) {
	t0 := time.Now().UTC().Add(-60 * 24 * time.Hour).Truncate(time.Hour)
	n := 100000
	if v, err := strconv.Atoi(os.Getenv("HOLOMIX_E2E_BENCH_N")); err == nil && v > 0 {
		n = v
	}
	report := func(b *testing.B, r drainResult) {
		b.ReportMetric(r.ingestRate, "spooled_readings/s")
		b.ReportMetric(r.storeRate, "stored_readings/s")
		b.ReportMetric(r.hwmMB, "peak_RSS_MB")
	}
	for _, inflight := range []int{20, 1000} {
		b.Run(fmt.Sprintf("single/inflight%d", inflight), func(b *testing.B) {
			for b.Loop() {
				e := newE2E(b, e2eOpts{maxInflight: inflight})
				msgs := e2eReadings(n, t0)
				bare := bareDrain(b, e.mq, "lakes/+/temp", msgs)
				r := daemonDrain(b, e, msgs, n)
				b.Logf("max_inflight_messages %d: bare paho subscriber %.0f msgs/s; holomix %s", inflight, bare, r)
				report(b, r)
			}
		})
	}
	b.Run("profile24", func(b *testing.B) {
		for b.Loop() {
			e := newE2E(b, e2eOpts{maxInflight: 1000, profile: true})
			msgs := e2eProfiles(2*n/24, t0) // 2n readings
			bare := bareDrain(b, e.mq, "lakes/+/profile", msgs)
			r := daemonDrain(b, e, msgs, len(msgs)*24)
			b.Logf("json-profile, 24 depths: bare paho subscriber %.0f msgs/s (%.0f readings/s); holomix %s", bare, bare*24, r)
			report(b, r)
		}
	})
	b.Run("sites1000x30", func(b *testing.B) {
		for b.Loop() {
			e := newE2E(b, e2eOpts{maxInflight: 1000, profile: true})
			msgs := e2eManySites(1000, 30, 12, t0)
			r := daemonDrain(b, e, msgs, len(msgs)*30)
			b.Logf("1,000 sites × 30 depths, 12 profiles each: holomix %s", r)
			report(b, r)
		}
	})
}
