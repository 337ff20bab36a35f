package detect

import (
	"encoding/json"
	"math"
	"strings"
	"testing"
	"time"

	"holomix/config"
	"holomix/detect/water"
)

var t0 = time.Date(2024, 10, 1, 0, 0, 0, 0, time.UTC)

// profileAt builds a profile at t over depths with temperatures from f.
func profileAt(site string, t time.Time, depths []float64, f func(z float64) float64) Profile {
	p := Profile{Site: site, Time: t, Depths: depths, Temps: make([]float64, len(depths))}
	for i, z := range depths {
		p.Temps[i] = f(z)
	}
	return p
}

func depthsEvery(step, max float64) []float64 {
	var d []float64
	for z := 0.5; z <= max; z += step {
		d = append(d, z)
	}
	return d
}

func kinds(evs []Event, k Kind) []Event {
	var out []Event
	for _, e := range evs {
		if e.Kind == k {
			out = append(out, e)
		}
	}
	return out
}

func TestIntakeChangeFiresAndResolves(t *testing.T) {
	cfg := DefaultSiteConfig("pond")
	cfg.MaxDepth = 10
	cfg.Intakes = []IntakeConfig{{Name: "supply", Depth: 6}} // default 1 °C/h
	s := NewSite(cfg)
	depths := depthsEvery(1, 9.5)
	var all []Event
	for i := 0; i < 12*60; i++ { // 12 h of 1-minute profiles
		tm := t0.Add(time.Duration(i) * time.Minute)
		h := tm.Sub(t0).Hours()
		deep := 8.0
		if h >= 4 && h < 6 { // warm water reaches the intake at 2 °C/h for 2 hours
			deep = 8 + 2*(h-4)
		} else if h >= 6 {
			deep = 12
		}
		_, ev := s.Process(profileAt("pond", tm, depths, func(z float64) float64 { return deep }))
		all = append(all, ev...)
	}
	ic := kinds(all, KindIntakeChange)
	if len(ic) != 2 || ic[0].Status != StatusFiring || ic[1].Status != StatusResolved {
		t.Fatalf("intake_change events %v, want firing then resolved", ic)
	}
	fire, res := ic[0], ic[1]
	// 2 °C/h measured over the last 30-65 min crosses 1 °C/h about 30 min after the change starts.
	if d := fire.Time.Sub(t0.Add(4 * time.Hour)); d < 20*time.Minute || d > 45*time.Minute {
		t.Errorf("fired %s after the change began", d)
	}
	if fire.Subject != "supply" || fire.Details["onset"] == "" || res.Details["onset"] != fire.Details["onset"] {
		t.Errorf("episode keys: %+v / %+v", fire.Details, res.Details)
	}
	if res.Time.Before(t0.Add(6*time.Hour)) || res.Time.After(t0.Add(8*time.Hour+10*time.Minute)) {
		t.Errorf("resolved at %s, want within about 2 h of the end of the change", res.Time)
	}
	var rate float64
	for _, m := range fire.Metrics {
		if m.Name == "rate_c_per_h" {
			rate = m.Value
		}
	}
	if rate <= 1 || rate > 2.1 {
		t.Errorf("rate metric %.2f °C/h", rate)
	}
}

func TestIntakeTemperatureInterpolated(t *testing.T) {
	temp, lo, hi, ok := interpAt([]float64{1, 3, 7}, []float64{20, 10, 6}, 5)
	if !ok || lo != 3 || hi != 7 || math.Abs(temp-8) > 1e-12 {
		t.Errorf("interpAt(5) = %v %v %v %v, want 8 between 3 and 7 m", temp, lo, hi, ok)
	}
	if _, _, _, ok := interpAt([]float64{1, 3}, []float64{20, 10}, 4.5); ok {
		t.Errorf("intake 1.5 m below the deepest sensor must have no temperature")
	}
	if v, _, _, ok := interpAt([]float64{1, 3}, []float64{20, 10}, 3.8); !ok || v != 10 {
		t.Errorf("intake 0.8 m below the deepest sensor takes its temperature")
	}
}

func TestSensorFaultAndRecovery(t *testing.T) {
	cfg := DefaultSiteConfig("pond")
	cfg.MaxDepth = 8
	cfg.Expected = []float64{0.55, 2.05, 4.05, 7.05}
	s := NewSite(cfg)
	var all []Event
	var lastCol Column
	for i := 0; i < 24*6; i++ { // 24 h of 10-min profiles; 7.05 m silent from 2 h to 10 h
		tm := t0.Add(time.Duration(i) * 10 * time.Minute)
		h := tm.Sub(t0).Hours()
		depths := []float64{0.55, 2.05, 4.05, 7.05}
		if h >= 2 && h < 10 {
			depths = depths[:3]
		}
		c, ev := s.Process(profileAt("pond", tm, depths, func(z float64) float64 { return 10 - z/2 }))
		all = append(all, ev...)
		if h >= 9 && h < 9.1 {
			lastCol = c
		}
	}
	f := kinds(all, KindSensorFault)
	if len(f) != 2 || f[0].Status != StatusFiring || f[1].Status != StatusResolved {
		t.Fatalf("sensor_fault events %v", f)
	}
	if f[0].Subject != "7.05 m" || f[1].Subject != "7.05 m" {
		t.Errorf("subjects %q %q, want \"7.05 m\"", f[0].Subject, f[1].Subject)
	}
	// Last reading at 1:50; the fault fires at the first profile more than 6 h later.
	if want := t0.Add(8 * time.Hour); !f[0].Time.Equal(want) {
		t.Errorf("fault at %s, want %s", f[0].Time, want)
	}
	if !f[1].Time.Equal(t0.Add(10 * time.Hour)) {
		t.Errorf("recovery at %s", f[1].Time)
	}
	if f[0].Confidence != "1 of 4 sensors missing (7.05 m)" {
		t.Errorf("confidence %q", f[0].Confidence)
	}
	if lastCol.SensorsExpected != 4 || lastCol.SensorsUsed != 3 || len(lastCol.Missing) != 1 || lastCol.Missing[0] != 7.05 {
		t.Errorf("column sensors %d/%d missing %v", lastCol.SensorsUsed, lastCol.SensorsExpected, lastCol.Missing)
	}
	if s.Summary().SensorFaults != 1 {
		t.Errorf("summary faults %d", s.Summary().SensorFaults)
	}
}

func TestSensorFaultFromProfileExpected(t *testing.T) {
	s := NewSite(DefaultSiteConfig("pond"))
	var all []Event
	for i := 0; i < 10; i++ {
		tm := t0.Add(time.Duration(i) * time.Hour)
		p := profileAt("pond", tm, []float64{0.5, 2, 4}, func(z float64) float64 { return 8 })
		p.Expected = []float64{0.5, 2, 4, 6}
		_, ev := s.Process(p)
		all = append(all, ev...)
	}
	f := kinds(all, KindSensorFault)
	if len(f) != 1 || f[0].Subject != "6.00 m" || !f[0].Time.Equal(t0.Add(7*time.Hour)) {
		t.Fatalf("fault of a never-seen expected depth: %v", f)
	}
}

// Hatchery practice: 100 ATU = 10 days at 10 °C (SCIENCE.md §6 [V: hatchery manuals]).
func TestDegreeDays100ATUIsTenDaysAt10C(t *testing.T) {
	loc := time.FixedZone("UTC-6", -6*3600)
	start := time.Date(2024, 11, 1, 0, 0, 0, 0, loc)
	cfg := DefaultSiteConfig("hatch")
	cfg.MaxDepth = 5
	cfg.Location = loc
	cfg.Intakes = []IntakeConfig{{Name: "eggs", Depth: 2, DD: &DegreeDayConfig{Start: start, BaseC: 0, Thresholds: []float64{100, 300}}}}
	s := NewSite(cfg)
	var all []Event
	var last Column
	for tm := start.Add(-2 * 24 * time.Hour); tm.Before(start.Add(12 * 24 * time.Hour)); tm = tm.Add(30 * time.Minute) {
		c, ev := s.Process(profileAt("hatch", tm, []float64{0.5, 2, 4}, func(z float64) float64 { return 10 }))
		all = append(all, ev...)
		last = c
	}
	dd := kinds(all, KindDegreeDays)
	if len(dd) != 1 {
		t.Fatalf("degree_days events %v, want one (100 °C·day)", dd)
	}
	// The 10th local day ends at local midnight of Nov 11.
	if want := time.Date(2024, 11, 11, 0, 0, 0, 0, loc); dd[0].Details["onset"] != want.UTC().Format(time.RFC3339) {
		t.Errorf("100 °C·day reached at %s, want %s", dd[0].Details["onset"], want.UTC())
	}
	if !strings.Contains(dd[0].Summary, "100 °C·day above 0 °C") || dd[0].Subject != "eggs 100 °C·day" {
		t.Errorf("summary %q subject %q", dd[0].Summary, dd[0].Subject)
	}
	if len(last.Intakes) != 1 || !last.Intakes[0].HasDegreeDays || math.Abs(last.Intakes[0].DegreeDays-110) > 1e-9 {
		t.Errorf("column degree days %+v, want 110 after 11 complete days", last.Intakes)
	}
}

func TestFrazilRisk(t *testing.T) {
	cfg := DefaultSiteConfig("river-pond")
	cfg.MaxDepth = 4
	s := NewSite(cfg)
	depths := []float64{0.3, 1.5, 3}
	var all []Event
	for i := 0; i < 12*6; i++ {
		tm := t0.Add(time.Duration(i) * 10 * time.Minute)
		h := tm.Sub(t0).Hours()
		top := 0.5 - 0.05*h // open, stirred water cooling to and below 0.1 °C
		if h > 10 {
			top = 0.4 // a warmer morning
		}
		if h >= 9 && h < 9.1 {
			s.ObserveAir(tm, -9) // the night turns cold after the risk began
		}
		_, ev := s.Process(profileAt("river-pond", tm, depths, func(z float64) float64 { return top + 0.02*(z-0.3) }))
		all = append(all, ev...)
	}
	fz := kinds(all, KindFrazilRisk)
	if len(fz) != 3 {
		t.Fatalf("frazil events %v, want firing, update, resolved", fz)
	}
	if fz[0].Status != StatusFiring || fz[0].Severity != "warning" || fz[1].Status != StatusUpdate || fz[1].Severity != "critical" ||
		fz[2].Status != StatusResolved {
		t.Errorf("frazil sequence %v", fz)
	}
	if want := t0.Add(8 * time.Hour); !fz[0].Time.Equal(want) { // 0.5 − 0.05 h ≤ 0.1 from 8 h
		t.Errorf("frazil fired at %s, want %s", fz[0].Time, want)
	}
	if fz[0].Details["caution"] != CautionFrazil {
		t.Errorf("no frazil caution")
	}
}

func TestOlderProfileIgnoredAndBadInputRejected(t *testing.T) {
	s := NewSite(DefaultSiteConfig("pond"))
	depths := []float64{0.5, 2, 4}
	c, _ := s.Process(profileAt("pond", t0, depths, func(z float64) float64 { return 8 }))
	if c.State == "" {
		t.Fatal("first profile ignored")
	}
	c, ev := s.Process(profileAt("pond", t0.Add(-time.Minute), depths, func(z float64) float64 { return 8 }))
	if c.State != "" || ev != nil {
		t.Errorf("older profile not ignored: %+v", c)
	}
	c, _ = s.Process(profileAt("pond", t0, depths, func(z float64) float64 { return 8 }))
	if c.State != "" {
		t.Errorf("profile as old as the last not ignored")
	}
	bad := []Profile{
		{Site: "pond", Time: t0.Add(time.Hour), Depths: []float64{2, 0.5}, Temps: []float64{8, 8}},
		{Site: "pond", Time: t0.Add(time.Hour), Depths: []float64{0.5, 2}, Temps: []float64{8, math.NaN()}},
		{Site: "pond", Time: t0.Add(time.Hour), Depths: []float64{0.5, 2}, Temps: []float64{8}},
		{Site: "other", Time: t0.Add(time.Hour), Depths: []float64{0.5, 2}, Temps: []float64{8, 8}},
		{Site: "pond", Time: t0.Add(time.Hour), Depths: []float64{0.5, 2}, Temps: []float64{8, 99}},
	}
	for _, p := range bad {
		c, ev := s.Process(p)
		if !c.Rejected || c.State != "unknown" || !strings.HasPrefix(c.Reason, "rejected: ") || ev != nil {
			t.Errorf("bad profile %+v not rejected: %+v", p, c)
		}
	}
	if got := s.Counters(); got.Rejected != len(bad) || got.Ignored != 2 || got.Profiles != 1 {
		t.Errorf("counters %+v", got)
	}
}

func TestColumnOwnsItsSlices(t *testing.T) {
	s := NewSite(DefaultSiteConfig("pond"))
	depths := []float64{0.5, 2, 4}
	c1, _ := s.Process(profileAt("pond", t0, depths, func(z float64) float64 { return 20 - z }))
	keep := append([]float64(nil), c1.Metrics.DensityKgM3...)
	keepN2 := append([]float64(nil), c1.Metrics.N2...)
	s.Process(profileAt("pond", t0.Add(time.Hour), depths, func(z float64) float64 { return 4 + z }))
	for i := range keep {
		if c1.Metrics.DensityKgM3[i] != keep[i] {
			t.Fatalf("column metrics changed by the next profile")
		}
	}
	for i := range keepN2 {
		if c1.Metrics.N2[i] != keepN2[i] {
			t.Fatalf("column N² changed by the next profile")
		}
	}
}

func TestSiteConfigFrom(t *testing.T) {
	d := config.Detect{HoldTime: config.Duration(3 * time.Hour), StratDensityDiff: 0.2}
	site := config.Site{ID: "lake-a", Name: "Lake A", MaxDepth: 12, Depths: []float64{5, 0.5, 10}, Timezone: "America/Chicago",
		Hypsography: []config.HypsoPoint{{Depth: 0, Area: 1e5}, {Depth: 12, Area: 0}},
		Intakes:     []config.Intake{{Name: "hatchery", Depth: 9, DegreeDays: &config.DegreeDays{Start: "2024-11-01", Thresholds: []float64{300, 100}}}}}
	c, err := SiteConfigFrom(d, site)
	if err != nil {
		t.Fatal(err)
	}
	def := DefaultSiteConfig("x")
	if c.Hold != 3*time.Hour || c.IceHold != def.IceHold || c.Thresholds.StratDensityDiff != 0.2 || c.Thresholds.TmdDelta != 0.3 ||
		c.Hysteresis != 0.5 || c.ProjectionWindow != 5*24*time.Hour || c.FrazilMaxC != 0.1 || c.FrazilAirC != -6 || c.SensorFaultAfter != 6*time.Hour ||
		c.MaxGap != DefaultMaxGap || c.MinStratified != DefaultMinStratified {
		t.Errorf("defaults not applied: %+v", c)
	}
	// detect.max_gap and detect.min_stratified reach the site's configuration.
	d2 := d
	d2.MaxGap, d2.MinStratified = config.Duration(3*24*time.Hour), config.Duration(10*24*time.Hour)
	if c2, err := SiteConfigFrom(d2, site); err != nil || c2.MaxGap != 3*24*time.Hour || c2.MinStratified != 10*24*time.Hour {
		t.Errorf("max gap / min stratified not mapped: %v %v (%v)", c2.MaxGap, c2.MinStratified, err)
	}
	d2.MaxGap = config.Duration(time.Hour)
	if _, err := SiteConfigFrom(d2, site); err == nil || !strings.Contains(err.Error(), "data gap") {
		t.Errorf("max gap of 1 h accepted: %v", err)
	}
	if c.Location.String() != "America/Chicago" || c.Expected[0] != 0.5 || c.Expected[2] != 10 {
		t.Errorf("site fields: %v %v", c.Location, c.Expected)
	}
	k := c.Intakes[0]
	if k.MaxRateCPerH != 1 || k.DD == nil || k.DD.Thresholds[0] != 100 || k.DD.Start.Format(time.RFC3339) != "2024-11-01T00:00:00-05:00" {
		t.Errorf("intake %+v %+v", k, k.DD)
	}
	if len(c.Hypsography.Depths) != 2 || c.Hypsography.Areas[0] != 1e5 {
		t.Errorf("hypsography %+v", c.Hypsography)
	}

	bad := site
	bad.Timezone = "Mars/Olympus"
	if _, err := SiteConfigFrom(d, bad); err == nil {
		t.Error("unknown timezone accepted")
	}
	bad = site
	bad.Intakes = []config.Intake{{Name: "a", Depth: 40}, {Name: "a", Depth: 2, DegreeDays: &config.DegreeDays{Start: "1 Nov"}}}
	if _, err := SiteConfigFrom(d, bad); err == nil {
		t.Error("bad intakes accepted")
	}
	bad = site
	bad.Intakes = []config.Intake{{Name: "a", Depth: 40}, {Name: "a", Depth: 2}}
	_, err = SiteConfigFrom(config.Detect{ProjectionWindow: config.Duration(24 * time.Hour)}, bad)
	for _, want := range []string{"depth 40", "used twice", "projection window"} {
		if err == nil || !strings.Contains(err.Error(), want) {
			t.Errorf("error %v does not report %q", err, want)
		}
	}
}

func TestRestoreStateRejectsOtherSiteAndGarbage(t *testing.T) {
	a := NewSite(DefaultSiteConfig("a"))
	a.Process(profileAt("a", t0, []float64{0.5, 2, 4}, func(z float64) float64 { return 8 }))
	blob, err := a.MarshalState()
	if err != nil {
		t.Fatal(err)
	}
	if !json.Valid(blob) {
		t.Fatal("state is not JSON")
	}
	if err := NewSite(DefaultSiteConfig("b")).RestoreState(blob); err == nil {
		t.Error("state of site a restored into site b")
	}
	if err := NewSite(DefaultSiteConfig("a")).RestoreState([]byte("{")); err == nil {
		t.Error("garbage restored")
	}
}

// The ice gate: the temperature above Tmd at which fresh water is as dense as
// water at 0 °C. Check value [C] from the CIPM 2001 formula (SCIENCE.md §1):
// 8.1376 °C.
func TestIceGateFreshWater(t *testing.T) {
	g := iceGateC(0)
	if math.Abs(g-8.1376) > 0.001 {
		t.Errorf("ice gate %.4f °C, want 8.1376 °C [C: CIPM 2001]", g)
	}
	if d := water.DensityCIPM(g) - water.DensityCIPM(0); math.Abs(d) > 1e-9 {
		t.Errorf("density at the gate differs from 0 °C water by %g kg/m³", d)
	}
}
