package sim

import "testing"

// BenchmarkSeason runs the default three-site scenario from 15 September to
// 20 May (about 35 600 steps of 10 min) per iteration.
func BenchmarkSeason(b *testing.B) {
	var steps int
	for b.Loop() {
		s := New(DefaultScenario(1))
		for s.Now().Before(seasonEnd) {
			s.Step()
			steps++
		}
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(steps), "ns/step")
}

// BenchmarkStep is one 10-minute step of the three sites with reporting.
func BenchmarkStep(b *testing.B) {
	s := New(DefaultScenario(1))
	for range 1000 {
		s.Step()
	}
	b.ResetTimer()
	for b.Loop() {
		s.Step()
	}
}
