package detect

import (
	"math"
	"strings"
	"testing"
	"time"

	"holomix/detect/water"
)

// pondSite is an invented 3 m pond with five sensors (0.5-2.5 m).
func pondSite() *Site {
	cfg := DefaultSiteConfig("pond")
	cfg.MaxDepth = 3
	return NewSite(cfg)
}

// TestMaxDensityFastCrossing: a uniform 3 m column cooling 0.15 °C an hour
// from 6 to 2 °C crosses the ±0.3 °C band around Tmd (3.98 °C, Chen &
// Millero 1986; fresh water is densest near 4 °C, common practice, no
// source) in 4 hours, less than the 6 h hold: the crossing rule still raises
// one max_density_reached, its onset at the entry into the band or the
// crossing, within 2 hours of the crossing.
func TestMaxDensityFastCrossing(t *testing.T) {
	s := pondSite()
	depths := depthsEvery(0.5, 2.5)
	t0 := time.Date(2025, 11, 1, 0, 0, 0, 0, time.UTC)
	// Two days of a steady, uniform 6 °C column first (a seasonal state).
	temp := func(h float64) float64 {
		if h < 48 {
			return 6
		}
		return math.Max(2, 6-0.15*(h-48))
	}
	var evs []Event
	for m := 0; m <= 5*24*60; m += 10 {
		tm := t0.Add(time.Duration(m) * time.Minute)
		T := temp(float64(m) / 60)
		_, e := s.Process(profileAt("pond", tm, depths, func(float64) float64 { return T }))
		evs = append(evs, e...)
	}
	md := kinds(evs, KindMaxDensityReached)
	if len(md) != 1 {
		t.Fatalf("%d max_density_reached, want 1", len(md))
	}
	tmd := water.Tmd(0, water.PressureDbar(1.5))
	cross := t0.Add(time.Duration((48 + (6-tmd)/0.15) * float64(time.Hour)))
	on := onsetOf(t, md[0])
	if d := on.Sub(cross); d < -2*time.Hour || d > 2*time.Hour {
		t.Errorf("onset %s, %v from the crossing at %s (want within 2 h)", on, d, cross)
	}
	if !strings.Contains(md[0].Details["criterion"], "passed through its Tmd") {
		t.Errorf("criterion %q does not name the crossing rule", md[0].Details["criterion"])
	}
}

// TestMaxDensityNoCrossingWhenLayered: a column whose mean passes Tmd while
// it is layered (top cooling to 1 °C over a bottom staying at 5.5 °C, the
// way a bog froze with its column at 5-6 °C) has not reached its maximum
// density: no event.
func TestMaxDensityNoCrossingWhenLayered(t *testing.T) {
	s := pondSite()
	depths := depthsEvery(0.5, 2.5)
	t0 := time.Date(2025, 11, 1, 0, 0, 0, 0, time.UTC)
	var evs []Event
	for m := 0; m <= 4*24*60; m += 10 {
		tm := t0.Add(time.Duration(m) * time.Minute)
		h := float64(m) / 60
		top := math.Max(1, 6-0.1*h)
		_, e := s.Process(profileAt("pond", tm, depths, func(z float64) float64 {
			return top + (5.5-top)*(z-0.5)/2
		}))
		evs = append(evs, e...)
	}
	if md := kinds(evs, KindMaxDensityReached); len(md) != 0 {
		t.Fatalf("max_density_reached at %s (%s) for a layered column", md[0].Time, md[0].Details["criterion"])
	}
}

// TestOverturnSeasonRecordStartsInFall: a record starting in autumn with a
// stratified column that cools and mixes within days has no seasonal peak
// on record; the cooling trend makes its overturn a fall one.
func TestOverturnSeasonRecordStartsInFall(t *testing.T) {
	cfg := DefaultSiteConfig("deploy")
	cfg.MaxDepth = 10
	s := NewSite(cfg)
	depths := depthsEvery(1, 9.5)
	t0 := time.Date(2025, 9, 15, 0, 0, 0, 0, time.UTC)
	var evs []Event
	for m := 0; m <= 5*24*60; m += 10 {
		tm := t0.Add(time.Duration(m) * time.Minute)
		h := float64(m) / 60
		surf := 18 - 0.08*h // cooling 1.9 °C a day
		bot := 12.0
		_, e := s.Process(profileAt("deploy", tm, depths, func(z float64) float64 {
			if surf <= bot {
				return surf
			}
			if z <= 4 {
				return surf
			}
			return bot
		}))
		evs = append(evs, e...)
	}
	ov := kinds(evs, KindOverturn)
	if len(ov) != 1 {
		t.Fatalf("%d overturns, want 1", len(ov))
	}
	if ov[0].Season != "fall" {
		t.Errorf("overturn labelled %q (%s), want fall", ov[0].Season, ov[0].Details["season_basis"])
	}
}
