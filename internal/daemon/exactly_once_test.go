package daemon

import (
	"context"
	"crypto/rand"
	"encoding/base64"
	"encoding/json"
	"fmt"
	"io"
	"net"
	"net/http"
	"reflect"
	"sort"
	"strings"
	"sync"
	"testing"
	"time"

	"holomix/internal/testenv"
)

// eoHook is a loopback webhook receiver keeping every delivery.
type eoHook struct {
	mu  sync.Mutex
	got []eoDelivery
}

type eoDelivery struct {
	WebhookID string
	ID        string `json:"id"`
	Site      struct {
		ID string `json:"id"`
	} `json:"site"`
	Kind      string    `json:"kind"`
	Status    string    `json:"status"`
	EventTime time.Time `json:"event_time"`
}

func (h *eoHook) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	b, _ := io.ReadAll(r.Body)
	var d eoDelivery
	_ = json.Unmarshal(b, &d)
	d.WebhookID = r.Header.Get("webhook-id")
	h.mu.Lock()
	h.got = append(h.got, d)
	h.mu.Unlock()
	w.WriteHeader(http.StatusOK)
}

// alerts returns the distinct alert ids with "site kind status time", and
// fails on two deliveries of one alert under different webhook ids.
func (h *eoHook) alerts(t *testing.T) map[string]string {
	h.mu.Lock()
	defer h.mu.Unlock()
	out := map[string]string{}
	wid := map[string]string{}
	for _, d := range h.got {
		if prev, ok := wid[d.ID]; ok && prev != d.WebhookID {
			t.Fatalf("alert %s delivered as two messages (%s, %s)", d.ID, prev, d.WebhookID)
		}
		wid[d.ID] = d.WebhookID
		out[d.ID] = fmt.Sprintf("%s %s %s %s", d.Site.ID, d.Kind, d.Status, d.EventTime.UTC().Format(time.RFC3339))
	}
	return out
}

const eoSites, eoDepths, eoSteps = 6, 20, 120

// eoYAML configures the sites (20 sensors, an intake at 5 m) and the webhook.
func eoYAML(hookURL string) string {
	var b strings.Builder
	b.WriteString("sites:\n")
	for s := 0; s < eoSites; s++ {
		fmt.Fprintf(&b, "  - id: mere%d\n    max_depth_m: 20\n    sensor_depths_m: [", s)
		for d := 0; d < eoDepths; d++ {
			if d > 0 {
				b.WriteString(", ")
			}
			fmt.Fprintf(&b, "%d", d)
		}
		b.WriteString("]\n    intakes:\n      - name: hatchery\n        depth_m: 5\n")
	}
	fmt.Fprintf(&b, "alerts:\n  receivers:\n    - name: hook\n      type: webhook\n      url: %s\n      send_resolved: true\n      secret: {env: HOLOMIX_E2E_HOOK_SECRET}\n", hookURL)
	return b.String()
}

// eoMessages is one reading per message: a still 10 °C column whose water
// from 3 to 7 m warms by 0.5 °C per 10 minutes (3 °C/h) from step 60 to 65,
// which opens intake_change at the 5 m intake (limit 1 °C/h) at every site;
// it resolves after an hour of calm.
func eoMessages(t0 time.Time) [][]e2eMsg {
	steps := make([][]e2eMsg, eoSteps)
	for step := 0; step < eoSteps; step++ {
		ts := t0.Add(time.Duration(step) * 10 * time.Minute).Format(time.RFC3339)
		for s := 0; s < eoSites; s++ {
			for d := 0; d < eoDepths; d++ {
				temp := 10.0
				if d >= 3 && d <= 7 {
					temp += 0.5 * float64(min(max(step-59, 0), 6))
				}
				steps[step] = append(steps[step], e2eMsg{
					topic:   fmt.Sprintf("lakes/mere%d/temp", s),
					payload: fmt.Appendf(nil, `{"time":"%s","depth_m":%d,"temp_c":%.2f}`, ts, d, temp),
				})
			}
		}
	}
	return steps
}

func flatten(steps [][]e2eMsg) []e2eMsg {
	var out []e2eMsg
	for _, s := range steps {
		out = append(out, s...)
	}
	return out
}

func eoQuery(t *testing.T, e *e2eEnv, q string) [][]any {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	raw, err := e.in.InfluxQL(ctx, e.in.Token, q)
	if err != nil {
		t.Fatal(err)
	}
	var res struct {
		Results []struct {
			Series []struct {
				Values [][]any `json:"values"`
			} `json:"series"`
		} `json:"results"`
	}
	_ = json.Unmarshal(raw, &res)
	if len(res.Results) == 0 || len(res.Results[0].Series) == 0 {
		return nil
	}
	return res.Results[0].Series[0].Values
}

// eoOutcome is what detection left behind: the alerts delivered, the
// lake_event points and the number of water_column points.
type eoOutcome struct {
	alerts  map[string]string
	events  []string
	columns int
}

func eoRun(t *testing.T, crash bool) eoOutcome {
	hook := &eoHook{}
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	srv := &http.Server{Handler: hook}
	go srv.Serve(ln)
	t.Cleanup(func() { srv.Close() })
	key := make([]byte, 32)
	rand.Read(key)
	e := newE2E(t, e2eOpts{extraYAML: eoYAML("http://" + ln.Addr().String() + "/hook"),
		env: []string{"HOLOMIX_E2E_HOOK_SECRET=whsec_" + base64.StdEncoding.EncodeToString(key)}})
	e.start()
	t0 := time.Now().UTC().Add(-30 * 24 * time.Hour).Truncate(time.Hour)
	steps := eoMessages(t0)
	pub := newE2EPublisher(t, e.mq.URL, "eo-pub")
	total := eoSites * eoDepths * eoSteps
	waitDetected := func(n int) {
		t.Helper()
		deadline := time.Now().Add(60 * time.Second)
		for e.metric("holomix_readings_detected_total") < float64(n) {
			if time.Now().After(deadline) {
				t.Fatalf("detection saw %v of %d readings", e.metric("holomix_readings_detected_total"), n)
			}
			time.Sleep(20 * time.Millisecond)
		}
	}
	checkpointed := func() {
		t.Helper()
		before := e.metric("holomix_checkpoints_total")
		e.waitFor("checkpoint", 60*time.Second, func() bool { return e.metric("holomix_checkpoints_total") != before })
	}
	if crash {
		// Crash 1: checkpoint before the change, let the intake_change
		// events fire, crash before the next checkpoint (most likely: one
		// comes every 5 s) and restart: the events are raised again from the
		// re-fed readings and must not become second alerts.
		pub.publish(t, flatten(steps[:55]), 200, 60*time.Second)
		waitDetected(55 * eoSites * eoDepths)
		checkpointed()
		ck := e.metric("holomix_checkpoints_total")
		pub.publish(t, flatten(steps[55:70]), 200, 60*time.Second)
		waitDetected(70 * eoSites * eoDepths)
		after := e.metric("holomix_checkpoints_total")
		e.kill()
		t.Logf("crash 1 (SIGKILL) after the intake changes fired; checkpoints since the one before the change: %v", after-ck)
		e.start()
		// Crash 2: checkpoint while the changes are open and calming, crash,
		// restart: only the restored detector state knows a change is open,
		// so the resolved alerts prove the state survived.
		pub.publish(t, flatten(steps[70:74]), 200, 60*time.Second)
		waitDetected(4 * eoSites * eoDepths) // the counter restarted with the process
		checkpointed()
		e.kill()
		e.start()
		pub.publish(t, flatten(steps[74:]), 200, 60*time.Second)
	} else {
		pub.publish(t, flatten(steps), 200, 60*time.Second)
	}
	e.waitCount(total, 60*time.Second)
	waitDetected(total - map[bool]int{true: 74 * eoSites * eoDepths, false: 0}[crash])
	// Let the outbox deliver and the derived points reach the database.
	deadline := time.Now().Add(30 * time.Second)
	for len(hook.alerts(t)) < 2*eoSites || e.metric("holomix_spool_derived_points") > 0 {
		if time.Now().After(deadline) {
			t.Fatalf("%d alerts delivered (%v), %v derived points waiting; lake_event: %v", len(hook.alerts(t)), hook.alerts(t), e.metric("holomix_spool_derived_points"), eoQuery(t, e, `SELECT * FROM lake_event`))
		}
		time.Sleep(100 * time.Millisecond)
	}
	// After a restart the detected counter also counts re-fed readings, so it
	// can reach its mark before the last derived points are spooled: read the
	// outcome until two reads 1.5 s apart (longer than the writer's idle
	// tick) agree with nothing left in the spool.
	var out eoOutcome
	read := func() eoOutcome {
		var o eoOutcome
		o.alerts = hook.alerts(t)
		for _, r := range eoQuery(t, e, `SELECT * FROM lake_event`) {
			o.events = append(o.events, fmt.Sprint(r))
		}
		sort.Strings(o.events)
		if rows := eoQuery(t, e, `SELECT count(schmidt_j_m2) FROM water_column`); len(rows) > 0 {
			o.columns = int(rows[0][1].(float64))
		}
		return o
	}
	for deadline, prev := time.Now().Add(30*time.Second), read(); ; prev = out {
		time.Sleep(1500 * time.Millisecond)
		out = read()
		if reflect.DeepEqual(out, prev) && e.metric("holomix_spool_derived_points") == 0 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("derived points still changing after 30 s: %d columns, %d events", out.columns, len(out.events))
		}
	}
	if c, _ := e.term(5 * time.Second); c != 0 {
		t.Fatalf("exit %d", c)
	}
	return out
}

// TestE2EExactlyOnceDetection: a crash (SIGKILL) between two checkpoints,
// after events were raised, gives the same alerts (no second alert, none
// lost), the same lake_event points and the same water_column points as an
// uninterrupted run.
func TestE2EExactlyOnceDetection(t *testing.T) {
	ref := eoRun(t, false)
	if len(ref.alerts) != 2*eoSites || len(ref.events) == 0 || ref.columns == 0 {
		t.Fatalf("reference run: %d alerts (want %d: intake_change firing and resolved per site), %d lake_event points, %d columns: %v",
			len(ref.alerts), 2*eoSites, len(ref.events), ref.columns, ref.alerts)
	}
	got := eoRun(t, true)
	if fmt.Sprint(got.alerts) != fmt.Sprint(ref.alerts) {
		t.Fatalf("alerts differ after a crash:\n got %v\nwant %v", got.alerts, ref.alerts)
	}
	if strings.Join(got.events, "\n") != strings.Join(ref.events, "\n") {
		t.Fatalf("lake_event points differ after a crash:\n got %v\nwant %v", got.events, ref.events)
	}
	if got.columns != ref.columns {
		t.Fatalf("water_column points: %d after a crash, %d without", got.columns, ref.columns)
	}
	t.Logf("%d alerts, %d lake_event points, %d water_column points, identical with and without the crash", len(got.alerts), len(got.events), got.columns)
}

var _ = testenv.FreePort
