package demo

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"sort"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"holomix/detect"
	"holomix/ingest/sim"
)

// counts are the daemon metrics the demo reads (see ingest/metrics.go,
// alert/metrics.go and internal/daemon).
type counts struct {
	messages, received, spooled, stored, detected, dead int64
	acksPending                                         int64
	delivered, failed, pending                          int64 // webhook receiver
}

// gather reads the daemon's metrics from its registry.
func gather(reg *prometheus.Registry) counts {
	var c counts
	mfs, err := reg.Gather()
	if err != nil {
		return c
	}
	for _, mf := range mfs {
		var sum int64
		for _, m := range mf.GetMetric() {
			if r := receiverLabel(m.GetLabel()); r != "" && r != webhookName {
				continue
			}
			switch {
			case m.GetCounter() != nil:
				sum += int64(m.GetCounter().GetValue())
			case m.GetGauge() != nil:
				sum += int64(m.GetGauge().GetValue())
			}
		}
		switch mf.GetName() {
		case "holomix_messages_received_total":
			c.messages = sum
		case "holomix_readings_received_total":
			c.received = sum
		case "holomix_readings_spooled_total":
			c.spooled = sum
		case "holomix_readings_stored_total":
			c.stored = sum
		case "holomix_readings_detected_total":
			c.detected = sum
		case "holomix_messages_rejected_total":
			c.dead = sum
		case "holomix_mqtt_acks_pending":
			c.acksPending = sum
		case "holomix_alert_delivered_total":
			c.delivered = sum
		case "holomix_alert_failed_total":
			c.failed = sum
		case "holomix_alert_pending":
			c.pending = sum
		}
	}
	return c
}

type labelPair interface {
	GetName() string
	GetValue() string
}

func receiverLabel[L labelPair](ls []L) string {
	for _, l := range ls {
		if l.GetName() == "receiver" {
			return l.GetValue()
		}
	}
	return ""
}

// Event is one detector event as the status API lists it.
type Event struct {
	Time    time.Time         `json:"time"`
	Site    string            `json:"site"`
	Kind    detect.Kind       `json:"kind"`
	Status  detect.Status     `json:"status"`
	Summary string            `json:"summary"`
	Details map[string]string `json:"details"`
}

// Onset is the detector's estimate of when the change began (the "onset"
// detail), else the event time.
func (e Event) Onset() time.Time {
	if s, ok := e.Details["onset"]; ok {
		if t, err := time.Parse(time.RFC3339, s); err == nil {
			return t
		}
	}
	return e.Time
}

// fetchEvents reads every site's events from the running status API.
func fetchEvents(ctx context.Context, statusURL string, sc sim.Scenario) (map[string][]Event, error) {
	cl := &http.Client{Timeout: 5 * time.Second}
	out := map[string][]Event{}
	for _, site := range sc.Sites {
		req, err := http.NewRequestWithContext(context.WithoutCancel(ctx), http.MethodGet, statusURL+"api/sites/"+url.PathEscape(site.ID)+"/events", nil)
		if err != nil {
			return out, err
		}
		resp, err := cl.Do(req)
		if err != nil {
			return out, fmt.Errorf("events of %s: %w", site.ID, err)
		}
		var evs []Event
		err = json.NewDecoder(io.LimitReader(resp.Body, 16<<20)).Decode(&evs)
		resp.Body.Close()
		if err != nil {
			return out, fmt.Errorf("events of %s: HTTP %d: %w", site.ID, resp.StatusCode, err)
		}
		out[site.ID] = evs
	}
	return out, nil
}

// writeSummary prints the end-of-run summary.
func writeSummary(w io.Writer, r *Report) {
	fmt.Fprintln(w)
	how := "the season ended"
	switch {
	case r.Interrupted:
		how = "interrupted"
	case r.Reached.Before(r.End):
		how = "time was up (--for)"
	}
	fmt.Fprintf(w, "summary: %s at data time %s after %s wall\n", how, r.Reached.Format("2006-01-02 15:04"), r.Wall.Round(time.Second))
	fmt.Fprintf(w, "  readings   published %d in %d MQTT messages; the daemon received %d, spooled %d, detected %d",
		r.Readings, r.Messages, r.Received, r.Spooled, r.Detected)
	if r.Stored > 0 {
		fmt.Fprintf(w, ", stored %d in InfluxDB", r.Stored)
	}
	fmt.Fprintln(w)
	if r.Dead > 0 || r.BrokerDropped > 0 {
		fmt.Fprintf(w, "             dead-lettered messages %d, messages the broker dropped %d\n", r.Dead, r.BrokerDropped)
	}
	if !r.Drained && !r.Interrupted {
		fmt.Fprintf(w, "             (the daemon had not caught up when the demo stopped; the rest stays in the storage directory)\n")
	}
	evKinds := map[string]int{}
	for _, evs := range r.Events {
		for _, e := range evs {
			if e.Status == detect.StatusFiring {
				evKinds[string(e.Kind)]++
			}
		}
	}
	alKinds := map[string]int{}
	for _, a := range r.Alerts {
		if a.Payload.Status == detect.StatusFiring {
			alKinds[string(a.Payload.Kind)]++
		}
	}
	fmt.Fprintf(w, "  detection  %d profiles, %d events\n", r.Profiles, r.EventCount)
	fmt.Fprintf(w, "  alerts     %d delivered to the webhook, every signature verified", len(r.Alerts))
	if r.Rejected > 0 || r.Repeats > 0 || r.AlertsFailed > 0 || r.AlertsPending > 0 {
		fmt.Fprintf(w, " (refused %d, redelivered %d, failed %d, still pending %d)", r.Rejected, r.Repeats, r.AlertsFailed, r.AlertsPending)
	}
	fmt.Fprintln(w)
	kinds := make([]string, 0, len(evKinds)+len(alKinds))
	for k := range evKinds {
		kinds = append(kinds, k)
	}
	for k := range alKinds {
		if _, ok := evKinds[k]; !ok {
			kinds = append(kinds, k)
		}
	}
	sort.Strings(kinds)
	if len(kinds) > 0 {
		fmt.Fprintf(w, "    %-24s %8s %8s\n", "onsets by kind", "detected", "alerted")
		for _, k := range kinds {
			fmt.Fprintf(w, "    %-24s %8d %8d\n", k, evKinds[k], alKinds[k])
		}
		fmt.Fprintf(w, "    (a kind that fires again while its earlier episode is open is not alerted again)\n")
	}
	fmt.Fprintf(w, "  the simulator's truth next to what holomix detected (detected: the event's estimated onset):\n")
	fmt.Fprintf(w, "    %-10s  %-20s  %-16s  %-16s  %10s  %s\n", "site", "", "truth", "detected", "difference", "alert")
	rows := 0
	for _, st := range r.Truth.Sites {
		rows += truthRows(w, r, st)
	}
	if rows == 0 {
		fmt.Fprintf(w, "    (nothing to compare yet: no lake reached Tmd or froze before the demo stopped)\n")
	}
	fmt.Fprintf(w, "  (truth: the model's full column; an ice cover counts from 3 days. Ice is inferred from water temperatures\n")
	fmt.Fprintf(w, "   only: its thickness is unknown and no ice is safe because an alert says so; follow local guidance.)\n")
}

// truthRows prints the truth-versus-detection lines of one site: the fall
// passage through Tmd and every ice cover of at least minIceRow.
func truthRows(w io.Writer, r *Report, st sim.SiteTruth) (printed int) {
	evs := r.Events[st.Site]
	freeze := r.Reached
	brief := 0
	type row struct {
		what  string
		truth time.Time
		kind  detect.Kind
	}
	var rows []row
	for _, ep := range st.IceEpisodes {
		end := ep.Off
		if end.IsZero() {
			end = r.Reached
		}
		if end.Sub(ep.On) < minIceRow {
			brief++
			continue
		}
		if ep.On.Before(freeze) {
			freeze = ep.On
		}
		rows = append(rows, row{"ice on", ep.On, detect.KindIceOn})
		if !ep.Off.IsZero() {
			rows = append(rows, row{"ice off", ep.Off, detect.KindIceOff})
		}
	}
	rows = append([]row{{"whole column at Tmd", st.MaxDensity, detect.KindMaxDensityReached}}, rows...)
	used := map[int]bool{}
	for i, rw := range rows {
		var best = -1
		for j, e := range evs {
			if used[j] || e.Kind != rw.kind || e.Status != detect.StatusFiring {
				continue
			}
			if i == 0 && !e.Onset().Before(freeze) {
				continue // the fall passage only
			}
			if !rw.truth.IsZero() && absDur(e.Onset().Sub(rw.truth)) > matchWindow {
				continue
			}
			if best < 0 || (!rw.truth.IsZero() && absDur(e.Onset().Sub(rw.truth)) < absDur(evs[best].Onset().Sub(rw.truth))) {
				best = j
			}
		}
		ts, ds, diff, al := "—", "—", "", ""
		if !rw.truth.IsZero() {
			ts = rw.truth.UTC().Format("2006-01-02 15:04")
		}
		if best >= 0 {
			used[best] = true
			e := evs[best]
			ds = e.Onset().UTC().Format("2006-01-02 15:04")
			if !rw.truth.IsZero() {
				diff = fmt.Sprintf("%+.1f h", e.Onset().Sub(rw.truth).Hours())
			}
			al = "not sent"
			if alerted(r.Alerts, e) {
				al = "sent"
			}
		} else if !rw.truth.IsZero() {
			ds = "not detected"
		}
		if rw.truth.IsZero() && best < 0 {
			continue
		}
		fmt.Fprintf(w, "    %-10s  %-20s  %-16s  %-16s  %10s  %s\n", st.Site, rw.what, ts, ds, diff, al)
		printed++
	}
	if brief > 0 {
		fmt.Fprintf(w, "    %-10s  (+%d skim-ice spells shorter than 3 days)\n", st.Site, brief)
	}
	return printed
}

// Matching of events to the truth in the summary.
const (
	minIceRow   = 3 * 24 * time.Hour
	matchWindow = 14 * 24 * time.Hour
)

// alerted reports whether the webhook got the event's firing alert.
func alerted(alerts []Alert, e Event) bool {
	for _, a := range alerts {
		p := a.Payload
		if p.Site.ID == e.Site && p.Kind == e.Kind && p.Status == detect.StatusFiring && p.EventTime.Equal(e.Time) {
			return true
		}
	}
	return false
}

func absDur(d time.Duration) time.Duration {
	if d < 0 {
		return -d
	}
	return d
}
