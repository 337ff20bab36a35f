package ingest

import (
	"math"
	"testing"
	"time"
)

// BenchmarkQCCheckChain checks the readings of a 24-sensor chain the way a
// replay or a live profile delivers them: one timestamp at a time, every
// depth in order, 1-minute steps, a slow diel cycle. "configured": the site
// has configured sensor depths (nearest-depth matching); "any": it has none.
func BenchmarkQCCheckChain(b *testing.B) {
	depths := make([]float64, 24)
	for i := range depths {
		depths[i] = 0.5 + float64(i)
	}
	for _, c := range []struct {
		name  string
		known map[string][]float64
	}{{"configured", map[string][]float64{"calder-mere": depths}}, {"any", nil}} {
		b.Run(c.name, func(b *testing.B) {
			q := NewQualityControl(QCConfig{KnownDepths: c.known})
			t0 := time.Date(2024, 6, 1, 0, 0, 0, 0, time.UTC)
			day := make([]float64, 24*60*len(depths)) // one day of values, repeated
			for i := range day {
				h := float64(i/len(depths)) / 60
				day[i] = 8 + 10*math.Exp(-depths[i%len(depths)]/6) + 0.5*math.Sin(2*math.Pi*h/24)
			}
			b.ReportAllocs()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				at := t0.Add(time.Duration(i/len(depths)) * time.Minute)
				r := Reading{Site: "calder-mere", Depth: depths[i%len(depths)], Time: at, TempC: day[i%len(day)]}
				q.Check(&r, at)
			}
		})
	}
}
