package water

import (
	"strings"
	"testing"
)

func classify(t *testing.T, c Column) (State, string) {
	t.Helper()
	m := compute(t, c)
	return Classify(c, m, DefaultThresholds())
}

func TestDefaultThresholds(t *testing.T) {
	th := DefaultThresholds()
	want := Thresholds{StratDensityDiff: 0.1, TmdDelta: 0.3, InverseDeltaT: 0.1, ThermoclineMinGrad: 0.1, MinSurfaceDepth: 2, MinSensors: 3, MinCoverage: 0.5}
	if th != want {
		t.Errorf("DefaultThresholds() = %+v, want %+v", th, want)
	}
}

// SCIENCE.md §5 definitions (Woolway et al. 2021; Pierson et al. 2011; design choice for δ).
func TestClassify_States(t *testing.T) {
	for _, tc := range []struct {
		name   string
		c      Column
		want   State
		reason string
	}{
		{"summer", Column{Depths: []float64{0.5, 2, 5, 8, 12, 20}, Temps: []float64{22, 21.8, 21, 14, 8, 6.5}}, StateStratified, "denser than the surface"},
		{"autumn isothermal near Tmd", Column{Depths: []float64{0.5, 2, 5, 10, 20}, Temps: []float64{3.95, 3.95, 3.95, 3.95, 3.95}}, StateMaxDensity, "within ±0.30 °C"},
		{"autumn mixed at 8 °C", Column{Depths: []float64{0.5, 2, 5, 10, 20}, Temps: []float64{8, 8, 7.98, 7.97, 7.95}}, StateMixed, "within the 0.1 threshold"},
		{"winter under ice", Column{Depths: []float64{1, 3, 8, 14, 20}, Temps: []float64{0.2, 1.5, 3.0, 3.7, 3.9}}, StateInverse, "colder and"},
		// Common practice, no source: water near 4 °C under 1 °C water is stable (inverse layering).
		{"4 under 1", Column{Depths: []float64{0.5, 5, 10}, Temps: []float64{1, 2.5, 3.9}}, StateInverse, "at or below its Tmd"},
		// Common practice, no source: 1 °C under 4 °C is not stable: neither inverse nor stratified.
		{"1 under 4", Column{Depths: []float64{0.5, 5, 10}, Temps: []float64{3.9, 2.5, 1}}, StateMixed, "no inverse layering"},
		{"warm under cold", Column{Depths: []float64{0.5, 5, 10}, Temps: []float64{10, 15, 25}}, StateMixed, "statically unstable"},
		{"too few sensors", Column{Depths: []float64{0.5, 10}, Temps: []float64{10, 8}}, StateUnknown, "only 2 sensor depth(s); at least 3"},
		{"no surface sensor", Column{Depths: []float64{3, 10, 20}, Temps: []float64{10, 8, 6}}, StateUnknown, "shallowest sensor is at 3.00 m"},
		{"poor coverage", Column{Depths: []float64{0.5, 2, 5}, Temps: []float64{10, 8, 6}, MaxDepth: 30}, StateUnknown, "sensors span 4.50 m of the 30.00 m column"},
	} {
		st, reason := classify(t, tc.c)
		if st != tc.want || !strings.Contains(reason, tc.reason) {
			t.Errorf("%s: Classify = %s (%q), want %s with %q", tc.name, st, reason, tc.want, tc.reason)
		}
	}
}

func TestClassify_ThresholdsMatter(t *testing.T) {
	c := Column{Depths: []float64{0.5, 5, 10}, Temps: []float64{12, 11.8, 11.6}}
	m := compute(t, c)
	th := DefaultThresholds()
	if st, _ := Classify(c, m, th); st != StateMixed {
		t.Fatalf("weak gradient with default thresholds: %s, want mixed", st)
	}
	th.StratDensityDiff = m.DensityDiff / 2
	if st, _ := Classify(c, m, th); st != StateStratified {
		t.Errorf("with threshold %g: %s, want stratified", th.StratDensityDiff, st)
	}
	// Metrics that do not belong to the column are refused.
	if st, reason := Classify(Column{Depths: []float64{1, 2, 3, 4}, Temps: []float64{1, 2, 3, 4}}, m, th); st != StateUnknown || reason == "" {
		t.Errorf("mismatched metrics: %s %q, want unknown", st, reason)
	}
	if st, _ := Classify(c, nil, th); st != StateUnknown {
		t.Errorf("nil metrics: %s, want unknown", st)
	}
}

// Tmd at each sensor's own pressure: a deep column at 3.85 °C is within δ = 0.1 °C
// of Tmd at 100 m (3.78 °C) but not of the surface value 3.98 °C everywhere.
func TestClassify_MaxDensityUsesOwnPressure(t *testing.T) {
	c := Column{Depths: []float64{0.5, 50, 100}, Temps: []float64{3.95, 3.88, 3.80}}
	m := compute(t, c)
	th := DefaultThresholds()
	th.TmdDelta = 0.05
	if st, reason := Classify(c, m, th); st != StateMaxDensity {
		t.Errorf("column following Tmd(p): %s (%s), want max_density", st, reason)
	}
}
