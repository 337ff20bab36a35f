package main

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"math"
	"net/http/httptest"
	"os"
	"os/exec"
	"path/filepath"
	"sort"
	"strings"
	"testing"
	"time"

	"holomix/internal/testenv"
)

// partitionSites are the invented sites of the two-instance test; instance A
// takes the first two, instance B the last two.
var partitionSites = [4]string{"aldwick", "brackley", "fenwater", "gorsemoor"}

var partitionDepths = [5]float64{0.5, 2, 4, 6, 8}

const partitionSteps = 100 // ten-minute steps per site: 4 sites x 5 depths x 100 = 2,000 readings

// partitionTemp is the scenario: a stratified column that cools and mixes
// between steps 40 and 60 (an autumn overturn in miniature), then stays mixed.
func partitionTemp(site, step, depth int) float64 {
	strat := [5]float64{16, 15.5, 11, 8, 7}
	mixed := 7.2
	off := 0.3 * float64(site)
	f := math.Min(1, math.Max(0, float64(step-40)/20))
	return strat[depth]*(1-f) + mixed*f + off + 0.01*math.Sin(float64(step+depth))
}

func partitionConfig(t *testing.T, dir, name string, brokerURL, influxURL, bucket, hookURL, hookSecret string, httpPort int, sites []string) string {
	t.Helper()
	var b strings.Builder
	fmt.Fprintf(&b, "mqtt:\n  broker: %s\n  client_id: holomix-%s\n  subscriptions:\n", brokerURL, name)
	for _, s := range sites {
		fmt.Fprintf(&b, "    - topic: buoys/%s/chain\n      template: buoys/{site}/chain\n", s)
	}
	fmt.Fprintf(&b, "influx:\n  url: %s\n  bucket: %s\nstorage:\n  dir: %s\nsites:\n", influxURL, bucket, filepath.Join(dir, "state-"+name))
	for _, s := range sites {
		fmt.Fprintf(&b, "  - id: %s\n    max_depth_m: 10\n    sensor_depths_m: [0.5, 2, 4, 6, 8]\n", s)
	}
	fmt.Fprintf(&b, "detect:\n  hold_time: 1h\n  profile_interval: 10m\n  watermark: 20m\n")
	fmt.Fprintf(&b, "alerts:\n  receivers:\n    - name: lab\n      url: %s\n      secret: {file: %s}\n      send_resolved: true\n", hookURL, hookSecret)
	fmt.Fprintf(&b, "http:\n  listen: 127.0.0.1:%d\nlog:\n  level: info\n", httpPort)
	p := filepath.Join(dir, name+".yaml")
	if err := os.WriteFile(p, []byte(b.String()), 0o600); err != nil {
		t.Fatal(err)
	}
	return p
}

type alertKey struct {
	site, kind, subject string
	time                time.Time
}

// TestPartitionedInstances runs two daemons on one broker and one database,
// each with its own sites, topic filters, client id and storage directory. One
// publisher sends 2,000 readings across four sites; instance B is stopped for
// part of the run and started again. Every reading must be stored exactly once
// (clean QC flags: nothing flagged as a duplicate), every alert delivered once,
// and B must lose nothing while stopped (its persistent session holds its
// messages). The expected alerts come from `holomix replay` of the same data.
func TestPartitionedInstances(t *testing.T) {
	bin := buildHolomix(t)
	dir := t.TempDir()
	broker := testenv.StartMosquitto(t, testenv.MosquittoOptions{})
	db := testenv.StartInflux(t, testenv.InfluxOptions{})
	hooks := &webhookCollector{}
	hookSrv := httptest.NewServer(hooks)
	defer hookSrv.Close()
	secret := filepath.Join(dir, "hook.secret")
	if err := os.WriteFile(secret, []byte("whsec_cGFydGl0aW9uLXRlc3Qtc2VjcmV0\n"), 0o600); err != nil {
		t.Fatal(err)
	}

	portA, portB := testenv.FreePort(t), testenv.FreePort(t)
	cfgA := partitionConfig(t, dir, "a", broker.URL, db.URL, db.Bucket, hookSrv.URL+"/hook", secret, portA, partitionSites[:2])
	cfgB := partitionConfig(t, dir, "b", broker.URL, db.URL, db.Bucket, hookSrv.URL+"/hook", secret, portB, partitionSites[2:])
	if code, out, errs := runCheck(t, nil, "--partition", cfgA, cfgB); code != 0 || !strings.Contains(out, ": clean") {
		t.Fatalf("check-config --partition: exit %d\n%s\n%s", code, out, errs)
	}

	// The data, also as a file for the replay oracle.
	start := time.Now().UTC().Add(-time.Duration(partitionSteps+3) * 10 * time.Minute).Truncate(10 * time.Minute)
	csvPath := filepath.Join(dir, "published.csv")
	f, err := os.Create(csvPath)
	if err != nil {
		t.Fatal(err)
	}
	w := bufio.NewWriter(f)
	fmt.Fprintln(w, "time,site,depth_m,temp_c")
	for step := 0; step < partitionSteps; step++ {
		for si, s := range partitionSites {
			for di, d := range partitionDepths {
				fmt.Fprintf(w, "%s,%s,%g,%.3f\n", start.Add(time.Duration(step)*10*time.Minute).Format(time.RFC3339), s, d, partitionTemp(si, step, di))
			}
		}
	}
	if err := w.Flush(); err != nil {
		t.Fatal(err)
	}
	f.Close()
	expected := replayFiring(t, bin, dir, db.URL, db.Bucket, secret, csvPath, start.Add(time.Duration(partitionSteps-6)*10*time.Minute))

	a := newDaemon(t, "instance A", bin, nil, "run", "-c", cfgA)
	b := newDaemon(t, "instance B", bin, nil, "run", "-c", cfgB)
	a.start()
	b.start()
	a.waitHTTP(fmt.Sprintf("http://127.0.0.1:%d/api/sites", portA), "", 30*time.Second)
	b.waitHTTP(fmt.Sprintf("http://127.0.0.1:%d/api/sites", portB), "", 30*time.Second)

	pub := publisher(t, broker.URL, "partition-publisher")
	for step := 0; step < partitionSteps; step++ {
		if step == 40 {
			if code := b.stop(60 * time.Second); code != 0 {
				t.Fatalf("instance B exit code %d after SIGTERM\n%s", code, b.tail())
			}
		}
		for si, s := range partitionSites {
			for di, d := range partitionDepths {
				publish(t, pub, "buoys/"+s+"/chain", chainReading(start.Add(time.Duration(step)*10*time.Minute), d, partitionTemp(si, step, di)))
			}
		}
	}
	b.start() // B resumes its persistent session: steps 40..99 of its sites were queued for it
	b.waitHTTP(fmt.Sprintf("http://127.0.0.1:%d/api/sites", portB), "", 30*time.Second)

	ctx := context.Background()
	deadline := time.Now().Add(120 * time.Second)
	want := int64(partitionSteps * len(partitionDepths))
	for {
		counts, err := influxCount(ctx, db.InfluxQL, db.Token, `SELECT COUNT(temp_c) FROM water_temperature GROUP BY site`)
		done := err == nil
		for _, s := range partitionSites {
			done = done && counts[s] == want
		}
		if done {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("stored readings per site %v (err %v), want %d each\nA:\n%s\nB:\n%s", counts, err, want, a.tail(), b.tail())
		}
		time.Sleep(250 * time.Millisecond)
	}
	flagged, err := influxCount(ctx, db.InfluxQL, db.Token, `SELECT COUNT(qc) FROM water_temperature WHERE qc <> 0 GROUP BY site`)
	if err != nil || len(flagged) != 0 {
		t.Errorf("readings stored with QC flags (a redelivery stored as a duplicate?): %v %v", flagged, err)
	}

	// Alerts: every expected firing alert, each delivered once.
	deadline = time.Now().Add(60 * time.Second)
	var got map[alertKey]int
	var ids map[string]int
	for {
		got, ids = map[alertKey]int{}, map[string]int{}
		for _, d := range hooks.all() {
			ids[d.ID]++
			if d.Payload.Status == "firing" {
				got[alertKey{d.Payload.Site.ID, d.Payload.Kind, d.Payload.Subject, d.Payload.EventTime.UTC()}]++
			}
		}
		missing := 0
		for k := range expected {
			if got[k] == 0 {
				missing++
			}
		}
		if missing == 0 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("%d of %d expected alerts not delivered within 60 s\nexpected %v\ngot %v\nA:\n%s\nB:\n%s", missing, len(expected), keys(expected), keys(got), a.tail(), b.tail())
		}
		time.Sleep(250 * time.Millisecond)
	}
	time.Sleep(2 * time.Second) // let any duplicate arrive, then count again
	// A second message for one alert (another webhook-id) is a duplicate; the
	// same webhook-id again is an at-least-once resend that receivers drop by
	// id (allowed, and reported).
	perAlert := map[alertKey]map[string]bool{}
	repeats := 0
	ids = map[string]int{}
	for _, d := range hooks.all() {
		if ids[d.ID]++; ids[d.ID] > 1 {
			repeats++
		}
		if d.Payload.Status == "firing" {
			k := alertKey{d.Payload.Site.ID, d.Payload.Kind, d.Payload.Subject, d.Payload.EventTime.UTC()}
			if perAlert[k] == nil {
				perAlert[k] = map[string]bool{}
			}
			perAlert[k][d.ID] = true
		}
	}
	if repeats > 0 {
		t.Logf("%d resends with a webhook-id already delivered (allowed)", repeats)
	}
	for k, idset := range perAlert {
		if len(idset) > 1 {
			t.Errorf("alert %v delivered as %d different messages", k, len(idset))
		}
		if _, ok := expected[k]; !ok && k.time.Before(start.Add(time.Duration(partitionSteps-6)*10*time.Minute)) {
			t.Errorf("alert %v delivered but replay of the same data does not raise it", k)
		}
	}
	for _, s := range partitionSites {
		n := 0
		for k := range got {
			if k.site == s {
				n++
			}
		}
		t.Logf("%s: %d firing alert(s) delivered", s, n)
	}
	if code := a.stop(60 * time.Second); code != 0 {
		t.Errorf("instance A exit code %d", code)
	}
	if code := b.stop(60 * time.Second); code != 0 {
		t.Errorf("instance B exit code %d", code)
	}
}

// replayFiring runs `holomix replay --format json` over the published data with
// all four sites and the same detection settings, and returns its firing events
// before cutoff (later ones depend on how the end of the record is closed).
func replayFiring(t *testing.T, bin, dir, influxURL, bucket, secret, csvPath string, cutoff time.Time) map[alertKey]bool {
	t.Helper()
	all := partitionConfig(t, dir, "all", "tcp://127.0.0.1:1", influxURL, bucket, "http://127.0.0.1:1/hook", secret, 1, partitionSites[:])
	cmd := exec.Command(bin, "replay", "-c", all, "--format", "json", csvPath)
	var errb strings.Builder
	cmd.Stderr = &errb
	outB, err := cmd.Output()
	out := string(outB)
	if err != nil {
		t.Fatalf("replay: %v\n%s%s", err, out, errb.String())
	}
	exp := map[alertKey]bool{}
	perSite := map[string]int{}
	for _, ln := range strings.Split(out, "\n") {
		if !strings.HasPrefix(ln, `{"record":"event"`) {
			continue
		}
		var ev struct {
			Time    time.Time `json:"time"`
			Site    string    `json:"site"`
			Kind    string    `json:"kind"`
			Status  string    `json:"status"`
			Subject string    `json:"subject"`
		}
		if err := json.Unmarshal([]byte(ln), &ev); err != nil {
			t.Fatalf("replay output %q: %v", ln, err)
		}
		if ev.Status == "firing" && ev.Time.Before(cutoff) {
			exp[alertKey{ev.Site, ev.Kind, ev.Subject, ev.Time.UTC()}] = true
			perSite[ev.Site]++
		}
	}
	for _, s := range partitionSites {
		if perSite[s] == 0 {
			t.Fatalf("the scenario raises no event at %s in replay; the test would prove nothing\n%s", s, out)
		}
	}
	return exp
}

func keys[V any](m map[alertKey]V) []string {
	var out []string
	for k := range m {
		out = append(out, fmt.Sprintf("%s/%s/%s@%s", k.site, k.kind, k.subject, k.time.Format(time.RFC3339)))
	}
	sort.Strings(out)
	return out
}
