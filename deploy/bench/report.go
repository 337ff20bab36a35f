package main

import (
	"bufio"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"sort"
	"strings"
	"time"
)

// machine describes where the figures were measured.
type machine struct {
	nproc              int
	cpu                string
	memory             string
	kernel             string
	goVersion          string
	mosquitto, influxd string
	loadStart, loadEnd string
}

func firstLine(name string, args ...string) string {
	out, err := exec.Command(name, args...).CombinedOutput()
	s := strings.TrimSpace(string(out))
	if i := strings.IndexByte(s, '\n'); i >= 0 {
		s = s[:i]
	}
	if s == "" && err != nil {
		return "unknown (" + err.Error() + ")"
	}
	return s
}

func procField(path, key string) string {
	f, err := os.Open(path)
	if err != nil {
		return "unknown"
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		if k, v, ok := strings.Cut(sc.Text(), ":"); ok && strings.TrimSpace(k) == key {
			return strings.TrimSpace(v)
		}
	}
	return "unknown"
}

func memTotal() string {
	v := procField("/proc/meminfo", "MemTotal")
	var kb float64
	if _, err := fmt.Sscanf(v, "%f kB", &kb); err != nil {
		return v
	}
	return fmt.Sprintf("%.1f GiB", kb/(1<<20))
}

func loadAvg() string {
	b, err := os.ReadFile("/proc/loadavg")
	if err != nil {
		return "unknown"
	}
	f := strings.Fields(string(b))
	if len(f) < 3 {
		return "unknown"
	}
	return strings.Join(f[:3], " ")
}

func describeMachine(root string) machine {
	m := machine{nproc: runtime.NumCPU(), cpu: procField("/proc/cpuinfo", "model name"), memory: memTotal(),
		kernel: firstLine("uname", "-sr"), goVersion: firstLine("go", "version"), loadStart: loadAvg()}
	mosq := "/usr/sbin/mosquitto"
	if p := os.Getenv("HOLOMIX_MOSQUITTO"); p != "" {
		mosq = p
	}
	m.mosquitto = strings.TrimPrefix(firstLine(mosq, "-h"), "mosquitto ")
	influxd := filepath.Join(root, ".cache", "bin", "influxd")
	if p := os.Getenv("HOLOMIX_INFLUXD"); p != "" {
		influxd = p
	}
	m.influxd = firstLine(influxd, "version")
	// Built with go install, influxd reports "vunknown": take the module version.
	if out, err := exec.Command("go", "version", "-m", influxd).Output(); err == nil {
		for _, l := range strings.Split(string(out), "\n") {
			if f := strings.Fields(l); len(f) >= 3 && f[0] == "mod" && f[1] == "github.com/influxdata/influxdb" {
				m.influxd = "InfluxDB " + f[2] + " (built from source; the binary says: " + m.influxd + ")"
			}
		}
	}
	return m
}

func (m machine) oneLine() string {
	return fmt.Sprintf("%d CPUs (%s), %s, %s, %s, mosquitto %s, %s, load %s", m.nproc, m.cpu, m.memory, m.kernel,
		m.goVersion, m.mosquitto, m.influxd, m.loadStart)
}

type latencyResult struct {
	rateMsgs, rateReadings float64
	achieved               float64
	seconds                float64
	expected               int
	samples                []time.Duration
	slow                   []string        // histogram tails from the daemon's /metrics
	probe                  []time.Duration // 4 KiB write + fsync every 50 ms on the same disk, sorted
}

type memoryResult struct {
	sites, depths, readings  int
	rss, hwm, heapMiB        float64
	anonPeak, fileAtAnonPeak float64 // RssAnon at its sampled peak, RssFile then
	anonEnd, fileEnd         float64
	goLimit                  float64 // GOMEMLIMIT in effect (MiB), from /metrics
	seconds                  float64
	checkpointMS             float64
}

type report struct {
	started  time.Time
	took     time.Duration
	machine  machine
	runs     []result
	latency  *latencyResult
	memory   *memoryResult
	replay   string
	profiles []string
	commands []string
	batch    int // points per database request (A, B and the direct writes)
}

func (b *bench) recordReport(r result) { b.report.runs = append(b.report.runs, r) }

func (r *report) rates(pipeline, workload string, inflight int) []float64 {
	var out []float64
	for _, x := range r.runs {
		if x.Pipeline == pipeline && x.Workload == workload && x.Inflight == inflight {
			out = append(out, x.Rate)
		}
	}
	sort.Float64s(out)
	return out
}

func median(v []float64) float64 {
	if len(v) == 0 {
		return 0
	}
	s := append([]float64(nil), v...)
	sort.Float64s(s)
	if len(s)%2 == 1 {
		return s[len(s)/2]
	}
	return (s[len(s)/2-1] + s[len(s)/2]) / 2
}

func (r *report) median(pipeline, workload string, inflight int) float64 {
	return median(r.rates(pipeline, workload, inflight))
}

// spread formats median and range: "29,100 (27,800–30,200, n=3)".
func spread(v []float64) string {
	if len(v) == 0 {
		return "–"
	}
	return fmt.Sprintf("%s (%s–%s, n=%d)", thousands(median(v)), thousands(v[0]), thousands(v[len(v)-1]), len(v))
}

func thousands(f float64) string {
	s := fmt.Sprintf("%.0f", f)
	neg := strings.HasPrefix(s, "-")
	s = strings.TrimPrefix(s, "-")
	var b strings.Builder
	for i, c := range s {
		if i > 0 && (len(s)-i)%3 == 0 {
			b.WriteByte(',')
		}
		b.WriteRune(c)
	}
	if neg {
		return "-" + b.String()
	}
	return b.String()
}

func verdict(ok bool) string {
	if ok {
		return "met"
	}
	return "**missed**"
}

func ms(d time.Duration) string { return fmt.Sprintf("%.1f ms", float64(d.Microseconds())/1000) }

func (r *report) markdown() string {
	var b strings.Builder
	m := r.machine
	fmt.Fprintf(&b, "## holomix benchmark (%s UTC, %s)\n\n", r.started.UTC().Format("2006-01-02 15:04"), r.took.Round(time.Second))
	fmt.Fprintf(&b, "Machine: %d CPUs (`nproc`), %s; memory %s; %s; %s; mosquitto %s; %s. Broker, database, daemon and publisher share the machine. Load average %s at start, %s at end (other work was running on this shared machine).\n\n",
		m.nproc, m.cpu, m.memory, m.kernel, m.goVersion, m.mosquitto, m.influxd, m.loadStart, m.loadEnd)
	if len(r.runs) > 0 {
		b.WriteString("### Throughput (readings/s confirmed by an InfluxDB count query; median (min–max) over interleaved rounds)\n\n")
		b.WriteString("| workload | max_inflight_messages | A: bare pipeline | B: holomix run | B/A | count-only subscriber | target |\n")
		b.WriteString("|---|---|---|---|---|---|---|\n")
		type key struct {
			w string
			i int
		}
		var keys []key
		seen := map[key]bool{}
		for _, x := range r.runs {
			k := key{x.Workload, x.Inflight}
			if x.Pipeline == "D" {
				continue
			}
			if !seen[k] {
				seen[k] = true
				keys = append(keys, k)
			}
		}
		for _, k := range keys {
			a, bb, c := r.rates("A", k.w, k.i), r.rates("B", k.w, k.i), r.rates("C", k.w, k.i)
			ratio := 0.0
			if median(a) > 0 {
				ratio = median(bb) / median(a)
			}
			target := ""
			switch k.w {
			case "json":
				target = fmt.Sprintf("B/A ≥ 1.0: %s", verdict(ratio >= 1.0))
			case "json-profile":
				target = fmt.Sprintf("B ≥ 150,000: %s", verdict(median(bb) >= 150000))
			}
			cs := "–"
			if len(c) > 0 {
				cs = fmt.Sprintf("%s msgs/s", thousands(median(c)*float64(1)/readingsPerMsg(k.w)))
			}
			fmt.Fprintf(&b, "| %s | %d | %s | %s | %.2f | %s | %s |\n", wname(k.w), k.i, spread(a), spread(bb), ratio, cs, target)
		}
		for _, w := range []string{"json", "json-profile"} {
			if d := r.rates("D", w, 0); len(d) > 0 {
				fmt.Fprintf(&b, "\nInfluxDB alone, the same %s readings as line protocol in sequential %s-point requests (no broker, no decoding): %s readings/s.\n", w, thousands(float64(r.batch)), spread(d))
			}
		}
		b.WriteString("\nPer round (readings/s):\n\n| workload | inflight | round | A | B | B/A |\n|---|---|---|---|---|---|\n")
		for _, k := range keys {
			for round := 1; ; round++ {
				var a, bb float64
				found := false
				for _, x := range r.runs {
					if x.Workload == k.w && x.Inflight == k.i && x.Round == round {
						found = true
						if x.Pipeline == "A" {
							a = x.Rate
						} else if x.Pipeline == "B" {
							bb = x.Rate
						}
					}
				}
				if !found {
					break
				}
				q := 0.0
				if a > 0 {
					q = bb / a
				}
				fmt.Fprintf(&b, "| %s | %d | %d | %s | %s | %.2f |\n", k.w, k.i, round, thousands(a), thousands(bb), q)
			}
		}
		b.WriteString("\n")
	}
	if l := r.latency; l != nil {
		b.WriteString("### Alert latency (publish of the triggering profile → webhook received, intake_change firings)\n\n")
		b.WriteString("| load | samples | p50 | p99 | max | target |\n|---|---|---|---|---|---|\n")
		fmt.Fprintf(&b, "| %s profiles/s = %s readings/s (half the B json-profile median; achieved %s msgs/s) | %d of %d | %s | %s | %s | p99 < 500 ms: %s |\n\n",
			thousands(l.rateMsgs), thousands(l.rateReadings), thousands(l.achieved), len(l.samples), l.expected,
			ms(pct(l.samples, 0.5)), ms(pct(l.samples, 0.99)), ms(pct(l.samples, 1)),
			verdict(len(l.samples) > 0 && len(l.samples) >= l.expected && pct(l.samples, 0.99) < 500*time.Millisecond))
		if len(l.probe) > 0 {
			fmt.Fprintf(&b, "The disk itself meanwhile (4 KiB write + fsync every 50 ms beside the spool, %d probes): p50 %s, p99 %s, max %s.\n",
				len(l.probe), ms(pct(l.probe, 0.5)), ms(pct(l.probe, 0.99)), ms(pct(l.probe, 1)))
		}
		if len(l.slow) > 0 {
			b.WriteString("During that run (daemon /metrics): " + strings.Join(l.slow, "; ") + ".\n\n")
		}
	}
	if mm := r.memory; mm != nil {
		b.WriteString("### Memory of the daemon\n\n| sites × depths | readings drained | drain readings/s | peak RSS (VmHWM) | peak anonymous (RssAnon; RssFile then) | RSS after (anon + file) | Go heap in use | GOMEMLIMIT | checkpoint avg | target |\n|---|---|---|---|---|---|---|---|---|---|\n")
		fmt.Fprintf(&b, "| %s × %d | %s | %s | %.1f MiB | %.1f MiB (%.1f MiB) | %.1f MiB (%.1f + %.1f) | %.1f MiB | %.0f MiB | %.0f ms | < 150 MB (143 MiB): %s |\n\n",
			thousands(float64(mm.sites)), mm.depths, thousands(float64(mm.readings)), thousands(float64(mm.readings)/mm.seconds),
			mm.hwm, mm.anonPeak, mm.fileAtAnonPeak, mm.rss, mm.anonEnd, mm.fileEnd, mm.heapMiB, mm.goLimit, mm.checkpointMS,
			verdict(mm.hwm*(1<<20) < 150e6))
		b.WriteString("RssFile is pages of the memory-mapped bbolt files (spool, state) resident in the page cache: they count in VmHWM but the kernel can drop them under memory pressure; RssAnon is the process's own memory.\n\n")
	}
	if r.replay != "" {
		b.WriteString("### Replay of the year-long file (deploy/bench-replay.sh)\n\n```\n" + r.replay + "\n```\n\n")
	}
	if len(r.profiles) > 0 {
		b.WriteString("CPU profiles of B (in-process, same code as the binary): " + strings.Join(r.profiles, ", ") + "\n\n")
	}
	b.WriteString("Method: A and B get the same pre-generated messages (100 sites × 24 depths, 5 sites with intake jumps that fire intake_change), published at QoS 1 while the consumer is offline, so its persistent session holds them; the clock starts when the consumer starts (for B: when the binary is executed) and stops when `SELECT count(temp_c) FROM water_temperature` returns every reading. A: paho (QoS 1, auto-ack) → encoding/json → influxdb-client-go WriteAPI (batch " + thousands(float64(r.batch)) + ", flush 100 ms). B: `holomix run` (influx.batch_size " + thousands(float64(r.batch)) + ") with 100 configured sites with an intake each, QC, fsynced spool, assembly, detection, water_column/lake_event points and a signed webhook receiver. Count-only: a paho subscriber at QoS 1 that only counts (the broker + client ceiling). Broker: deploy/mosquitto.conf's flow control (max_queued_messages 1000000, no byte limits, autosave 60 s) with max_inflight_messages as listed (20 = Mosquitto's default).\n\n")
	b.WriteString("Commands: " + strings.Join(r.commands, "; ") + "\n")
	return b.String()
}

func readingsPerMsg(w string) float64 {
	if w == "json-profile" {
		return 24
	}
	return 1
}

func wname(w string) string {
	if w == "json-profile" {
		return "one 24-depth profile per message (json-profile)"
	}
	return "one reading per message (json)"
}
