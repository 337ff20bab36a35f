package detect

import (
	"encoding/json"
	"math"
	"math/rand/v2"
	"strings"
	"testing"
	"time"
)

// calmLake is an invented 10 m lake (no measured data) in late autumn,
// sensors at 1-9 m, read every 10 minutes with normal noise σ = 0.01 °C:
//   - before day 0, windy open water, the top (4.2 °C) warmer than the bottom;
//   - from day 0, calm open water under nightly frosts: the column below its
//     Tmd (3.98 °C), the top at 1 m cooling 0.15 °C a day from 3.4 °C and
//     swinging ±0.08 °C day and night (warmest at 15:00), the bottom at
//     3.9 °C, no wind stirring — as sheltered as under ice by the top's RMS
//     change and the column activity, and inversely layered;
//   - from day freeze (when > 0), ice: the top relaxes to 2.4 °C within a few
//     hours (a freeze mixes the cold surface water down) and then only warms
//     a little by day (sunlight through the ice, 0.015 °C a day) and slowly
//     cools, with no night-time fall — the day-night swing is gone.
type calmLake struct {
	start  time.Time
	freeze float64 // day of the freeze; 0: none
	depths []float64
}

func newCalmLake(freeze float64) calmLake {
	return calmLake{start: time.Date(2024, 11, 20, 0, 0, 0, 0, time.UTC), freeze: freeze, depths: []float64{1, 2, 3, 4, 5, 6, 7, 8, 9}}
}

func (l calmLake) day(t time.Time) float64 { return t.Sub(l.start).Hours() / 24 }

// top is the noise-free temperature at 1 m on day d, °C.
func (l calmLake) top(d float64) float64 {
	open := func(d float64) float64 {
		hour := math.Mod(d*24, 24)
		return 3.4 - 0.15*d + 0.08*math.Sin(2*math.Pi*(hour-9)/24)
	}
	switch {
	case d < 0:
		return 4.2
	case l.freeze <= 0 || d < l.freeze:
		return open(d)
	}
	dt := d - l.freeze
	ice := 2.4 - 0.01*dt + 0.015*(math.Floor(dt)+math.Min(1, math.Max(0, (math.Mod(dt, 1)*24-9)/6)))
	f := math.Exp(-dt * 24 / 2) // 2-hour relaxation from the open-water value
	return f*open(l.freeze) + (1-f)*ice
}

// temp is the noise-free temperature at depth z on day d: the top's
// departure from the bottom's 3.9 °C decays linearly to the bottom.
func (l calmLake) temp(d, z float64) float64 {
	return 3.9 + (l.top(d)-3.9)*(9-z)/8
}

func (l calmLake) profiles(days float64, seed uint64) []Profile {
	r := rand.New(rand.NewPCG(seed, 11))
	var out []Profile
	for t := l.start.Add(-2 * 24 * time.Hour); l.day(t) < days; t = t.Add(10 * time.Minute) {
		p := Profile{Site: "calm-lake", Time: t, Depths: l.depths, Temps: make([]float64, len(l.depths))}
		for i, z := range l.depths {
			p.Temps[i] = l.temp(l.day(t), z) + 0.01*r.NormFloat64()
		}
		out = append(out, p)
	}
	return out
}

func calmSite() *Site {
	cfg := DefaultSiteConfig("calm-lake")
	cfg.Name = "Calm Lake (invented)"
	cfg.MaxDepth = 10
	cfg.Expected = []float64{1, 2, 3, 4, 5, 6, 7, 8, 9}
	return NewSite(cfg)
}

// TestIceOnNotInferredFromCalmOpenWaterWithNightFrosts: calm open water whose
// top cools by night and warms by day (see calmLake) passes every other
// ice-on test for days, and must not be called ice: its top sensor's
// day-night swing is larger than ice allows at 1 m (IceDielSwingCM). The
// physics (water under ice is cut off from the air) is cited at
// IceDielSwingCM; the lake is invented.
func TestIceOnNotInferredFromCalmOpenWaterWithNightFrosts(t *testing.T) {
	for seed := uint64(1); seed <= 3; seed++ {
		l := newCalmLake(0)
		s := calmSite()
		otherwiseIce, run, allIce, runAll := 0, 0, 0, 0
		minSwing, maxSwing, maxLimit := math.Inf(1), 0.0, 0.0
		for _, p := range l.profiles(7, seed) {
			c, evs := s.Process(p)
			if len(kinds(evs, KindIceOn)) > 0 || c.IceInferred {
				t.Fatalf("seed %d: ice inferred over open water at %s (signals %+v)", seed, p.Time, c.Ice)
			}
			sig := c.Ice
			if p.Time.Minute() != 0 || l.day(p.Time) < 1 {
				continue
			}
			// Every ice-on condition but the day-night swing, and all of them.
			if sig.OK && sig.TopMinusBottomC <= -0.1 && sig.TopChangeCPerH <= IceTopChangeMaxCPerH &&
				sig.ActivityCPerH <= IceActivityMaxCPerH && sig.TopC < s.gateC {
				run++
				otherwiseIce = max(otherwiseIce, run)
				minSwing, maxSwing, maxLimit = math.Min(minSwing, sig.DielSwingC), math.Max(maxSwing, sig.DielSwingC), math.Max(maxLimit, sig.DielSwingMaxC)
				if !sig.openWaterDiel() {
					runAll++
					allIce = max(allIce, runAll)
				} else {
					runAll = 0
				}
			} else {
				run, runAll = 0, 0
			}
		}
		// Without the swing test this would be ice: the other tests hold for
		// far longer than the 24-hour ice hold. With it, no run of hourly
		// windows as long as the hold passes every test: each day has
		// windows whose swing is over the limit (the swing of one 24-hour
		// window depends on the hour it starts, see TestDielSwingIsTwoWay).
		if otherwiseIce < 72 {
			t.Fatalf("seed %d: the other ice-on tests held for only %d consecutive hours; the series does not test the swing rule", seed, otherwiseIce)
		}
		if time.Duration(allIce)*time.Hour >= s.cfg.IceHold {
			t.Errorf("seed %d: every ice-on test, the swing included, passed for %d consecutive hours", seed, allIce)
		}
		t.Logf("seed %d: other ice-on tests passed for %d h; all of them for at most %d h; top day-night swing %.3f-%.3f °C, limit at most %.3f °C",
			seed, otherwiseIce, allIce, minSwing, maxSwing, maxLimit)
	}
}

// TestIceOnAfterCalmOpenWaterStillFound: the same calm open water freezing on
// day 3.6 (14:24 UTC, during the day's warming) must give one ice_on with
// its onset within 2 days of the freeze (the simulator target,
// internal/demo/truth_test.go) and its event after the freeze.
func TestIceOnAfterCalmOpenWaterStillFound(t *testing.T) {
	for seed := uint64(1); seed <= 3; seed++ {
		l := newCalmLake(3.6)
		freeze := l.start.Add(time.Duration(l.freeze * 24 * float64(time.Hour)))
		s := calmSite()
		var ons []Event
		for _, p := range l.profiles(8, seed) {
			_, evs := s.Process(p)
			ons = append(ons, kinds(evs, KindIceOn)...)
		}
		if len(ons) != 1 {
			t.Fatalf("seed %d: %d ice_on events, want 1", seed, len(ons))
		}
		on := onsetOf(t, ons[0])
		if d := on.Sub(freeze); d < -48*time.Hour || d > 48*time.Hour {
			t.Errorf("seed %d: ice_on onset %s is %+.1f h from the freeze at %s, want within 48 h", seed, on, d.Hours(), freeze)
		}
		if ons[0].Time.Before(freeze) {
			t.Errorf("seed %d: ice_on raised at %s, before the freeze at %s", seed, ons[0].Time, freeze)
		}
		if !strings.Contains(ons[0].Details["evidence"], "day-night swing") {
			t.Errorf("seed %d: evidence %q does not state the swing", seed, ons[0].Details["evidence"])
		}
		sw, lim := metricValue(ons[0], "top_diel_swing_c"), metricValue(ons[0], "top_diel_swing_limit_c")
		if math.IsNaN(sw) || math.IsNaN(lim) || sw > lim {
			t.Errorf("seed %d: ice_on metrics swing %v, limit %v", seed, sw, lim)
		}
		t.Logf("seed %d: freeze %s, ice_on onset %s (%+.1f h), event %s; swing %.3f °C, limit %.3f °C",
			seed, freeze.Format("01-02 15:04"), on.Format("01-02 15:04"), on.Sub(freeze).Hours(), ons[0].Time.Format("01-02 15:04"), sw, lim)
	}
}

// TestDielSwingIsTwoWay checks the swing statistic on hand-made hourly means
// at 1 m (no noise): a day-night cycle of amplitude a gives 0.7a-1.9a, by
// the hour the window starts (the 3-hour running mean keeps
// sin(π/8)/(3 sin(π/24)) ≈ 97.5 % of a 24-hour cycle's amplitude); a steady cooling, a freeze's step and a staircase of
// daytime warming without night-time cooling give one direction only; hours
// of another top sensor (a dropout) and hours without a depth (checkpoints
// written before the depth was kept) are left out.
func TestDielSwingIsTwoWay(t *testing.T) {
	at := time.Date(2024, 12, 1, 0, 0, 0, 0, time.UTC)
	from := at.Add(-iceWindow)
	run := func(f func(h int) (float64, float64)) (float64, float64) {
		s := calmSite()
		for h := 0; h < 24; h++ {
			v, z := f(h)
			s.st.Hours = append(s.st.Hours, hourRec{Start: from.Add(time.Duration(h) * time.Hour), Top: v, TopOK: true, TopZ: z})
		}
		return s.dielSwing(from, at, 0)
	}
	cycle := func(h int) float64 { return 0.05 * math.Sin(2*math.Pi*float64(h-9)/24) }
	// Over one day the statistic depends on the hour the window starts: a
	// window from trough to trough sees the whole rise but not the whole
	// fall. It lies between about 0.7 and 1.9 times the amplitude; what
	// holds off ice is its largest value of the day (one window over the
	// limit breaks a 24-hour hold and stops the walk-back).
	gain := math.Sin(math.Pi/8) / (3 * math.Sin(math.Pi/24))
	lo, hi := math.Inf(1), 0.0
	for phase := 0; phase < 24; phase++ {
		sw, lim := run(func(h int) (float64, float64) { return 3 + cycle(h+phase), 1 })
		lo, hi = math.Min(lo, sw), math.Max(hi, sw)
		if math.Abs(lim-IceDielSwingCM) > 1e-12 {
			t.Fatalf("limit at 1 m without noise %.4f °C, want %.4f", lim, IceDielSwingCM)
		}
	}
	if want := 2 * 0.05 * gain; hi > want+1e-9 || hi < 0.9*want || lo < 0.7*0.05 {
		t.Errorf("cycle of ±0.05 °C: swing %.4f-%.4f °C over the hours of the day, want from at least 0.035 up to 0.9-1 × %.4f", lo, hi, want)
	}
	for name, f := range map[string]func(h int) (float64, float64){
		"steady cooling 0.3 °C/day": func(h int) (float64, float64) { return 3 - 0.3*float64(h)/24, 1 },
		"freeze step of 0.5 °C":     func(h int) (float64, float64) { return 3 - 0.5*boolF(h >= 12), 1 },
		"daytime warming staircase": func(h int) (float64, float64) {
			return 3 + 0.1*math.Min(1, math.Max(0, float64(h-9)/6)), 1
		},
		"cycle on another sensor in the dropout hours": func(h int) (float64, float64) {
			if h%4 == 1 {
				return 3.6, 2
			}
			return 3, 1
		},
		"cycle in hours without a depth": func(h int) (float64, float64) {
			if h < 20 {
				return 3 + cycle(h), 0
			}
			return 3, 1
		},
	} {
		if sw, _ := run(f); sw > 1e-9 {
			t.Errorf("%s: swing %.4f °C, want 0", name, sw)
		}
	}
	// 1/z (IceDielSwingCM) and the noise in quadrature.
	if r := dielLimit(0.25, 0) / dielLimit(1, 0); math.Abs(r-4) > 1e-12 {
		t.Errorf("limit at 0.25 m / limit at 1 m = %.4f, want 4", r)
	}
	if got, want := dielLimit(1, 0.01), math.Sqrt(IceDielSwingCM*IceDielSwingCM+0.03*0.03); math.Abs(got-want) > 1e-12 {
		t.Errorf("limit at 1 m with σ 0.01 °C: %.5f, want %.5f", got, want)
	}
	// No hour with a known depth: no limit, the swing says nothing.
	if _, lim := run(func(h int) (float64, float64) { return 3 + cycle(h), 0 }); lim != 0 {
		t.Errorf("hours without a depth: limit %.4f, want 0 (unknown)", lim)
	}
}

// TestRestoreStateWithoutTopDepth: a checkpoint written before the top
// sensor's depth was kept in the hourly records (no "top_z") restores, and
// the freeze of TestIceOnAfterCalmOpenWaterStillFound is still found within
// 2 days.
func TestRestoreStateWithoutTopDepth(t *testing.T) {
	l := newCalmLake(3.6)
	freeze := l.start.Add(time.Duration(l.freeze * 24 * float64(time.Hour)))
	ps := l.profiles(8, 1)
	s := calmSite()
	cut := len(ps) / 2 // day 3: open water, a day and a half before the freeze
	for _, p := range ps[:cut] {
		s.Process(p)
	}
	b, err := s.MarshalState()
	if err != nil {
		t.Fatal(err)
	}
	var raw map[string]any
	if err := json.Unmarshal(b, &raw); err != nil {
		t.Fatal(err)
	}
	hrs, _ := raw["hours"].([]any)
	stripped := 0
	for _, h := range hrs {
		if m, ok := h.(map[string]any); ok {
			if _, ok := m["top_z"]; ok {
				delete(m, "top_z")
				stripped++
			}
		}
	}
	if stripped == 0 {
		t.Fatal("no top_z in the hourly records of the checkpoint")
	}
	old, _ := json.Marshal(raw)
	r := calmSite()
	if err := r.RestoreState(old); err != nil {
		t.Fatalf("restore a checkpoint without top_z: %v", err)
	}
	var ons []Event
	for _, p := range ps[cut:] {
		_, evs := r.Process(p)
		ons = append(ons, kinds(evs, KindIceOn)...)
	}
	if len(ons) != 1 {
		t.Fatalf("%d ice_on events after the restore, want 1", len(ons))
	}
	if d := onsetOf(t, ons[0]).Sub(freeze); d < -48*time.Hour || d > 48*time.Hour {
		t.Errorf("ice_on onset %+.1f h from the freeze after the restore, want within 48 h", d.Hours())
	}
}
