package alert

import (
	"context"
	"fmt"
	"net/http"
	"net/http/httptest"
	"sync/atomic"
	"testing"
	"time"

	"holomix/config"
	"holomix/detect"
)

// BenchmarkDrain10k submits 10,000 events across 100 sites in batches of 100
// (pairs of events: firing + resolved for condition kinds and ice_on, two
// firings for the one-shot transition kinds), and measures the time until all 30,000
// deliveries to 3 loopback webhook receivers are acknowledged and marked in
// the outbox. Run: go test ./alert -run '^$' -bench Drain10k -benchtime 1x
func BenchmarkDrain10k(b *testing.B) {
	const sites, perSite, receivers = 100, 100, 3
	kinds := []detect.Kind{detect.KindStratificationOnset, detect.KindOverturn, detect.KindMaxDensityReached,
		detect.KindInverseStratification, detect.KindIceOn, detect.KindIceOff, detect.KindIntakeChange,
		detect.KindIntakeOverturnRisk, detect.KindFrazilRisk, detect.KindSensorFault, detect.KindDegreeDays}
	// Events in submission order: round r holds event r of every site.
	var rounds [][]detect.Event
	for r := 0; r < perSite; r++ {
		var batch []detect.Event
		ep := r / 2
		for s := 0; s < sites; s++ {
			ev := detect.Event{
				Time: t0.Add(time.Duration(ep) * time.Hour), Site: fmt.Sprintf("site-%03d", s),
				Kind: kinds[ep%len(kinds)], Subject: fmt.Sprintf("s%d", ep/len(kinds)),
				Status: detect.StatusFiring, Severity: "warning", Confidence: "high", Summary: "benchmark event",
				Metrics: []detect.Metric{{Name: "surface_temp_c", Value: 7.8, Unit: "C"}, {Name: "bottom_temp_c", Value: 7.6, Unit: "C"}},
			}
			if r%2 == 1 {
				ev.Time = ev.Time.Add(30 * time.Minute)
				if lifecycleOf(ev.Kind) != lcOneShot {
					ev.Status = detect.StatusResolved
				}
			}
			batch = append(batch, ev)
		}
		rounds = append(rounds, batch)
	}
	siteInfo := map[string]SiteInfo{}
	for s := 0; s < sites; s++ {
		id := fmt.Sprintf("site-%03d", s)
		siteInfo[id] = SiteInfo{ID: id, Name: fmt.Sprintf("Lake %03d", s)}
	}
	var got atomic.Int64
	var rcs []config.Receiver
	for i := 0; i < receivers; i++ {
		srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
			got.Add(1)
			w.WriteHeader(http.StatusNoContent)
		}))
		defer srv.Close()
		rc := webhook(fmt.Sprintf("hook%d", i), srv.URL, testSecret)
		rc.Resolved = true
		rcs = append(rcs, rc)
	}
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		got.Store(0)
		d, err := Open(Options{Dir: b.TempDir(), Receivers: rcs, Sites: siteInfo, Logger: quietLogger()})
		if err != nil {
			b.Fatal(err)
		}
		ctx, cancel := context.WithCancel(context.Background())
		done := make(chan error, 1)
		go func() { done <- d.Run(ctx) }()
		start := time.Now()
		for _, batch := range rounds {
			if err := d.Submit(batch...); err != nil {
				b.Fatal(err)
			}
		}
		submitted := time.Since(start)
		want := int64(sites * perSite * receivers)
		for got.Load() < want {
			time.Sleep(time.Millisecond)
		}
		delivered := time.Since(start)
		for {
			p, err := d.Pending()
			if err != nil {
				b.Fatal(err)
			}
			if len(p) == 0 {
				break
			}
			time.Sleep(time.Millisecond)
		}
		marked := time.Since(start)
		cancel()
		if err := <-done; err != nil {
			b.Fatal(err)
		}
		if err := d.Close(); err != nil {
			b.Fatal(err)
		}
		b.ReportMetric(submitted.Seconds(), "s-submit")
		b.ReportMetric(delivered.Seconds(), "s-delivered")
		b.ReportMetric(marked.Seconds(), "s-marked")
		if n := got.Load(); n != want {
			b.Fatalf("receivers got %d requests, want %d", n, want)
		}
	}
}
