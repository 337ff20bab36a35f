package status

import (
	"net/http/httptest"
	"testing"
	"time"

	"holomix/detect"
	"holomix/detect/water"
)

// benchStore holds 10 days of 10-minute profiles at 14 depths for one site
// and 200 events: a full heat map.
func benchStore(b *testing.B) *Store {
	depths := []float64{1, 2, 4, 6, 8, 10, 12, 14, 16, 18, 20, 23, 26, 29}
	st := NewStore([]SiteMeta{{ID: "res", Name: "Bench Reservoir", MaxDepth: 30, Depths: depths}}, 10)
	var m water.Metrics
	for i := 0; i < 10*144; i++ {
		at := t0.Add(time.Duration(i) * 10 * time.Minute)
		temps := make([]float64, len(depths))
		for k, z := range depths {
			temps[k] = 6 + 12/(1+float64(z)/8) - float64(i)/400
		}
		wc := water.Column{Depths: depths, Temps: temps, MaxDepth: 30}
		if err := water.Compute(wc, &m); err != nil {
			b.Fatal(err)
		}
		st.ObserveColumn(detect.Column{Site: "res", Time: at, State: water.StateStratified, Seasonal: detect.SeasonStratified, Metrics: m},
			detect.Profile{Site: "res", Time: at, Depths: depths, Temps: temps})
	}
	for i := 0; i < 200; i++ {
		st.ObserveEvent(detect.Event{Time: t0.Add(time.Duration(i) * time.Hour), Site: "res", Kind: detect.KindSensorFault, Status: detect.StatusFiring, Subject: "5 m", Summary: "silent"})
	}
	return st
}

func BenchmarkRenderSite(b *testing.B) {
	h := Handler(benchStore(b), nil, Options{})
	b.ReportAllocs()
	for b.Loop() {
		rec := httptest.NewRecorder()
		h.ServeHTTP(rec, httptest.NewRequest("GET", "/sites/res", nil))
		if rec.Code != 200 {
			b.Fatal(rec.Code)
		}
	}
}

func BenchmarkRenderOverview(b *testing.B) {
	h := Handler(benchStore(b), nil, Options{})
	b.ReportAllocs()
	for b.Loop() {
		rec := httptest.NewRecorder()
		h.ServeHTTP(rec, httptest.NewRequest("GET", "/", nil))
		if rec.Code != 200 {
			b.Fatal(rec.Code)
		}
	}
}
