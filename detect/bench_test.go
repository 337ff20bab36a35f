package detect

import (
	"math"
	"math/rand/v2"
	"testing"
	"time"
)

// BenchmarkProcess24 measures Process on 1-minute profiles of 24 depths (the
// replay target: a year of such data, about 525 600 profiles and 12.6 M
// readings, at 1 M readings/s or better, i.e. under about 24 µs per profile
// for everything). The site has an intake with degree-days and expected
// depths, as a hatchery site would.
func BenchmarkProcess24(b *testing.B) {
	depths := make([]float64, 24)
	for i := range depths {
		depths[i] = 0.5 + float64(i)
	}
	const week = 7 * 24 * 60
	r := rand.New(rand.NewPCG(1, 2))
	rows := make([][]float64, week)
	for i := range rows {
		h := float64(i) / 60
		rows[i] = make([]float64, len(depths))
		for k, z := range depths {
			te := 18 - 0.01*h + 0.5*math.Exp(-z)*math.Sin(2*math.Pi*h/24)
			rows[i][k] = 8 + (te-8)*0.5*(1-math.Tanh((z-8)/1.5)) + 0.04*(r.Float64()-0.5)
		}
	}
	start := time.Date(2024, 8, 1, 0, 0, 0, 0, time.UTC)
	cfg := DefaultSiteConfig("bench")
	cfg.MaxDepth = 25
	cfg.Expected = depths
	cfg.Intakes = []IntakeConfig{{Name: "hatchery", Depth: 12, DD: &DegreeDayConfig{Start: start, Thresholds: []float64{1e9}}}}
	s := NewSite(cfg)
	// Warm up one day so the windows are full.
	for i := 0; i < 24*60; i++ {
		s.Process(Profile{Site: "bench", Time: start.Add(time.Duration(i) * time.Minute), Depths: depths, Temps: rows[i%week]})
	}
	base := start.Add(24 * time.Hour)
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		s.Process(Profile{Site: "bench", Time: base.Add(time.Duration(i) * time.Minute), Depths: depths, Temps: rows[i%week]})
	}
	b.StopTimer()
	if ns := float64(b.Elapsed().Nanoseconds()) / float64(b.N); ns > 0 {
		b.ReportMetric(24e9/ns, "readings/s")
	}
}
