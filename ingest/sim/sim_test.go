package sim

import (
	"fmt"
	"math"
	"reflect"
	"strconv"
	"sync"
	"testing"
	"time"

	"holomix/detect/water"
	"holomix/ingest"
)

// seasonEnd is the end of the simulated season in the tests (the default
// scenario starts on 15 September 2025).
var seasonEnd = time.Date(2026, time.May, 20, 0, 0, 0, 0, time.UTC)

// seasonRun is one default season stepped once and checked on every step;
// several tests read its record.
type seasonRun struct {
	truth       Truth
	budgets     map[string][]Budget // at each check point
	unstable    []string            // violations of static stability
	maxGapKgM3  float64             // largest density inversion seen (kg/m³)
	tmdFirst    map[string]time.Time
	iceFirst    map[string]time.Time
	midwinter   map[string][]float64 // column on 15 February
	midDepths   map[string][]float64
	midIce      map[string]float64
	summerTop   map[string]float64 // top layer on 16 September
	summerBot   map[string]float64
	readings    int
	sites       []SiteSpec
	checkedStep int
}

var (
	seasonOnce sync.Once
	season     *seasonRun
)

// stabilityGap returns the largest amount (kg/m³) by which a layer is denser
// than the layer below it, both taken at the pressure of their common
// interface (local static stability; in-situ density would hide an
// instability behind compressibility). Water colder than Tmd lying above
// warmer water is lighter by the equation of state and so counts as stable.
func stabilityGap(sal float64, depths, temps []float64) (float64, int) {
	worst, at := 0.0, -1
	for i := 0; i+1 < len(temps); i++ {
		zIf := (depths[i] + depths[i+1]) / 2
		p := water.PressureDbar(zIf)
		ru, _ := water.Density(sal, temps[i], p)
		rl, _ := water.Density(sal, temps[i+1], p)
		if ru-rl > worst {
			worst, at = ru-rl, i
		}
	}
	return worst, at
}

func runSeason(t testing.TB) *seasonRun {
	t.Helper()
	seasonOnce.Do(func() {
		sc := DefaultScenario(1)
		s := New(sc)
		if err := s.Err(); err != nil {
			panic(err)
		}
		r := &seasonRun{
			budgets: map[string][]Budget{}, tmdFirst: map[string]time.Time{}, iceFirst: map[string]time.Time{},
			midwinter: map[string][]float64{}, midDepths: map[string][]float64{}, midIce: map[string]float64{},
			summerTop: map[string]float64{}, summerBot: map[string]float64{}, sites: s.Sites(),
		}
		feb15 := time.Date(2026, time.February, 15, 12, 0, 0, 0, time.UTC)
		sep16 := time.Date(2025, time.September, 16, 12, 0, 0, 0, time.UTC)
		for s.Now().Before(seasonEnd) {
			now, rs := s.Step()
			r.readings += len(rs)
			for _, spec := range r.sites {
				id := spec.ID
				temps, depths := s.Column(id), s.Layers(id)
				gap, at := stabilityGap(spec.Salinity, depths, temps)
				if gap > r.maxGapKgM3 {
					r.maxGapKgM3 = gap
				}
				if gap > 1e-6 && len(r.unstable) < 5 {
					r.unstable = append(r.unstable, id+" at "+now.Format(time.RFC3339)+" layer "+itoa(at))
				}
				if r.tmdFirst[id].IsZero() {
					all := true
					for i, v := range temps {
						if math.Abs(v-water.Tmd(spec.Salinity, water.PressureDbar(depths[i]))) > 0.3 {
							all = false
							break
						}
					}
					if all {
						r.tmdFirst[id] = now
					}
				}
				if r.iceFirst[id].IsZero() && s.Ice(id) >= 0.01 {
					r.iceFirst[id] = now
				}
				if now.Equal(feb15) {
					r.midwinter[id], r.midDepths[id], r.midIce[id] = temps, depths, s.Ice(id)
				}
				if now.Equal(sep16) {
					r.summerTop[id], r.summerBot[id] = temps[0], temps[len(temps)-1]
				}
				if now.Minute() == 0 && now.Hour() == 0 && now.Day() == 1 {
					b, err := s.Budget(id)
					if err != nil {
						panic(err)
					}
					r.budgets[id] = append(r.budgets[id], b)
				}
			}
			r.checkedStep++
		}
		for _, spec := range r.sites {
			b, _ := s.Budget(spec.ID)
			r.budgets[spec.ID] = append(r.budgets[spec.ID], b)
		}
		r.truth = s.Truth()
		season = r
	})
	if season == nil {
		t.Fatal("season run failed")
	}
	return season
}

func itoa(i int) string { return strconv.Itoa(i) }

func siteTruth(t *testing.T, tr Truth, id string) SiteTruth {
	t.Helper()
	for _, st := range tr.Sites {
		if st.Site == id {
			return st
		}
	}
	t.Fatalf("no truth for %s", id)
	return SiteTruth{}
}

// The energy that crossed the surface equals the change in water enthalpy
// plus the latent heat taken up by ice (first law; ice latent heat 333.55
// kJ/kg, density 917 kg/m³), within 1 % over the season and at every month
// boundary, including months with ice.
func TestEnergyBudget_SurfaceFluxEqualsHeatContentChange(t *testing.T) {
	r := runSeason(t)
	for id, bs := range r.budgets {
		sawIce := false
		for _, b := range bs {
			scale := math.Max(math.Abs(b.SurfaceInJ), math.Abs(b.HeatChangeJ))
			if scale == 0 {
				t.Fatalf("%s: no energy exchanged", id)
			}
			if d := math.Abs(b.SurfaceInJ - b.HeatChangeJ); d > 0.01*scale {
				t.Errorf("%s: surface in %.6g J, heat change %.6g J: off by %.3g %%", id, b.SurfaceInJ, b.HeatChangeJ, 100*d/scale)
			}
			if b.IceLatentJ > 0 {
				sawIce = true
			}
		}
		if !sawIce {
			t.Errorf("%s: no month boundary with ice: the latent term was not exercised", id)
		}
		last := bs[len(bs)-1]
		// Sanity of scale: the season's net heat change is a sizeable part
		// of the column's heat capacity (more than 0.5 K over the volume).
		if math.Abs(last.HeatChangeJ) < 0.5*rhoCp*last.ColumnVolumeM3 {
			t.Errorf("%s: season heat change %.3g J is implausibly small", id, last.HeatChangeJ)
		}
	}
}

// After every step the column is statically stable by the project's own
// equation of state (water.Density at each interface's pressure), within
// 1e-6 kg/m³. Inverse stratification (colder-than-Tmd water over warmer)
// passes because the density function says it is lighter.
func TestStaticStability_EveryStep(t *testing.T) {
	r := runSeason(t)
	if len(r.unstable) > 0 {
		t.Errorf("statically unstable columns (largest inversion %.3g kg/m³): %v", r.maxGapKgM3, r.unstable)
	}
	if r.checkedStep < 30000 {
		t.Errorf("only %d steps checked", r.checkedStep)
	}
}

// The stability check itself must catch an unstable column and must pass an
// inverse one (common practice, no source: water below Tmd is lighter).
func TestStabilityGap_DetectsInstability(t *testing.T) {
	depths := []float64{0.25, 0.75, 1.25}
	if g, _ := stabilityGap(0, depths, []float64{8, 12, 6}); g < 1e-3 {
		t.Errorf("8 °C over 12 °C not flagged (gap %v)", g)
	}
	if g, _ := stabilityGap(0, depths, []float64{0, 2, 3.9}); g > 0 {
		t.Errorf("inverse stratification 0/2/3.9 °C flagged as unstable (gap %v)", g)
	}
	if g, _ := stabilityGap(0, depths, []float64{3, 5, 4}); g < 1e-4 {
		t.Errorf("5 °C over 4 °C not flagged (gap %v)", g)
	}
}

// With a cold enough winter a fresh lake cools to Tmd throughout before its
// surface can freeze (common practice, no source; SCIENCE.md §5). Checked on
// the model column independently of the simulator's own truth record.
func TestFreshColumnReachesTmdBeforeIce(t *testing.T) {
	r := runSeason(t)
	for _, spec := range r.sites {
		if spec.Salinity != 0 {
			continue
		}
		tmd, ice := r.tmdFirst[spec.ID], r.iceFirst[spec.ID]
		if tmd.IsZero() || ice.IsZero() {
			t.Errorf("%s: Tmd reached %v, ice %v: both must happen", spec.ID, tmd, ice)
			continue
		}
		if !tmd.Before(ice) {
			t.Errorf("%s: ice %v before the column reached Tmd %v", spec.ID, ice, tmd)
		}
		tr := siteTruth(t, r.truth, spec.ID)
		if !tr.MaxDensity.Equal(tmd) {
			t.Errorf("%s: truth says Tmd at %v, the column check at %v", spec.ID, tr.MaxDensity, tmd)
		}
	}
}

// A shallow body freezes long before a deep one under the same air
// (common practice, no source; SCIENCE.md §5).
func TestShallowPondFreezesBeforeDeepReservoir(t *testing.T) {
	r := runSeason(t)
	pond, res := siteTruth(t, r.truth, "ottersedge"), siteTruth(t, r.truth, "larchmere")
	if pond.IceOn.IsZero() || res.IceOn.IsZero() {
		t.Fatalf("no ice: pond %v reservoir %v", pond.IceOn, res.IceOn)
	}
	if !pond.IceOn.Before(res.IceOn.Add(-7 * 24 * time.Hour)) {
		t.Errorf("pond froze %v, reservoir %v: want the pond at least a week earlier", pond.IceOn, res.IceOn)
	}
}

// The season looks like a dimictic temperate lake: summer stratification,
// fall overturn, ice, inverse stratification under ice with a bottom near
// Tmd, ice-off in spring. Date windows bracket the ice dates observed on
// Wisconsin lakes by NTL-LTER (ice on 7 Nov - 5 Dec, ice off 7 Apr - 4 May,
// knb-lter-ntl.33 as listed in shared/data/ntl/SOURCES.md), widened by the
// published ±7 d accuracy of temperature-based ice dates and our invented climate.
func TestSeasonIsRealistic(t *testing.T) {
	r := runSeason(t)
	day := func(m time.Month, d int, y int) time.Time { return time.Date(y, m, d, 0, 0, 0, 0, time.UTC) }
	// Summer: the deep reservoir starts with a warm epilimnion over a cold hypolimnion.
	if top, bot := r.summerTop["larchmere"], r.summerBot["larchmere"]; top < 17 || top > 23 || bot < 4.5 || bot > 9 {
		t.Errorf("larchmere on 16 Sep: top %.2f °C bottom %.2f °C; want ~18-22 over ~5-8", top, bot)
	}
	for _, st := range r.truth.Sites {
		if !st.StratifiedAtStart {
			t.Errorf("%s: not stratified at the start", st.Site)
		}
		if st.FallOverturn.IsZero() || st.FallOverturn.After(day(time.December, 1, 2025)) {
			t.Errorf("%s: fall overturn %v, want before December", st.Site, st.FallOverturn)
		}
		if st.IceOn.Before(day(time.October, 25, 2025)) || st.IceOn.After(day(time.January, 15, 2026)) {
			t.Errorf("%s: ice on %v outside 25 Oct - 15 Jan", st.Site, st.IceOn)
		}
		if st.IceOff.Before(day(time.March, 20, 2026)) || st.IceOff.After(day(time.May, 10, 2026)) {
			t.Errorf("%s: ice off %v outside 20 Mar - 10 May", st.Site, st.IceOff)
		}
		if st.SpringOverturn.IsZero() || st.SpringOverturn.Before(st.IceOff) {
			t.Errorf("%s: spring overturn %v not after ice-off %v", st.Site, st.SpringOverturn, st.IceOff)
		}
		// Stefan's law with snow gives tens of centimetres, not metres.
		if st.MaxIceM < 0.2 || st.MaxIceM > 1.0 {
			t.Errorf("%s: greatest ice %.2f m, want 0.2-1.0 m", st.Site, st.MaxIceM)
		}
	}
	if res := siteTruth(t, r.truth, "larchmere"); res.FallOverturn.Before(day(time.October, 1, 2025)) {
		t.Errorf("larchmere: fall overturn %v, want October or November", res.FallOverturn)
	}
	// Mid-February: under ice, the top at the freezing point, inverse
	// stratification, the deep reservoir's bottom near its Tmd.
	for id, temps := range r.midwinter {
		spec := r.sites[indexOf(r.sites, id)]
		if r.midIce[id] <= 0 {
			t.Errorf("%s: open water on 15 Feb", id)
			continue
		}
		tf := water.FreezingPoint(spec.Salinity, 0)
		if math.Abs(temps[0]-tf) > 1e-9 {
			t.Errorf("%s: top layer %.4f °C under ice, want Tf %.4f", id, temps[0], tf)
		}
		bot := temps[len(temps)-1]
		if bot-temps[0] < 0.5 {
			t.Errorf("%s: no inverse stratification under ice: top %.2f bottom %.2f", id, temps[0], bot)
		}
		if tmdBot := water.Tmd(spec.Salinity, water.PressureDbar(r.midDepths[id][len(temps)-1])); bot > tmdBot+0.05 {
			t.Errorf("%s: bottom %.2f °C above its Tmd %.2f under ice", id, bot, tmdBot)
		}
	}
	if bot := r.midwinter["larchmere"][len(r.midwinter["larchmere"])-1]; bot < 3.0 {
		t.Errorf("larchmere: bottom %.2f °C under ice, want near 4 °C", bot)
	}
}

func indexOf(sites []SiteSpec, id string) int {
	for i, s := range sites {
		if s.ID == id {
			return i
		}
	}
	return -1
}

// The saline lake freezes at its own freezing point (UNESCO 1983 formula via
// water.FreezingPoint: about −0.084 °C at S = 1.5) and its ice forms only
// once the surface reaches it.
func TestSalineLakeFreezesAtItsFreezingPoint(t *testing.T) {
	r := runSeason(t)
	temps := r.midwinter["saltwick"]
	want := water.FreezingPoint(1.5, 0)
	if math.Abs(want-(-0.0575*1.5+1.710523e-3*math.Pow(1.5, 1.5)-2.154996e-4*1.5*1.5)) > 1e-12 {
		t.Fatalf("freezing point formula changed: %v", want)
	}
	if math.Abs(temps[0]-want) > 1e-9 {
		t.Errorf("saltwick top under ice %.5f °C, want %.5f", temps[0], want)
	}
}

// Same seed, same world: readings and truth are identical; another seed differs.
func TestDeterministicBySeed(t *testing.T) {
	run := func(seed int64) ([]ingest.Reading, Truth) {
		s := New(DefaultScenario(seed))
		var all []ingest.Reading
		for range 6 * 24 * 3 { // 3 days
			_, rs := s.Step()
			all = append(all, rs...)
		}
		return all, s.Truth()
	}
	a, ta := run(11)
	b, tb := run(11)
	c, _ := run(12)
	if len(a) == 0 {
		t.Fatal("no readings")
	}
	if !reflect.DeepEqual(a, b) || !reflect.DeepEqual(ta, tb) {
		t.Error("same seed gave different output")
	}
	if reflect.DeepEqual(a, c) {
		t.Error("different seeds gave identical readings")
	}
}

// Stefan's law (Stefan 1891) [M]: with the surface held at the air
// temperature Ta and no heat from the water, ρ L dh/dt = k (Tf − Ta)/h
// integrates to h² = h0² + 2 k (Tf − Ta) t/(ρ L). With a surface transfer
// coefficient H in series the exact solution is
// h²/(2k) + h/H = h0²/(2k) + h0/H + (Tf − Ta) t/(ρ L) (ice growth with a
// surface resistance, standard texts, e.g. Ashton 1989) [M]. The model's
// incremental integration must reproduce both within 0.5 % over 90 days.
func TestIceGrowth_StefanLaw(t *testing.T) {
	for _, tc := range []struct {
		name string
		h    float64 // W m⁻² K⁻¹ surface transfer
	}{{"surface at air temperature", 1e7}, {"surface resistance", 15}} {
		t.Run(tc.name, func(t *testing.T) {
			spec := SiteSpec{ID: "x", MaxDepth: 2, LayerM: 0.5, ExtinctionPerM: 1, Initial: InitialProfile{SurfaceC: 0, BottomC: 0, WidthM: 1}}
			c := newColumn(spec, 0)
			const ta, h0, dt = -12.0, 0.02, 600.0
			c.ice = h0
			fa := func(ts float64) (float64, float64) { return tc.h * (ta - ts), -tc.h }
			days := 90.0
			for range int(days * 86400 / dt) {
				faV := c.iceSurface(fa)
				c.growIce(faV*c.area0*dt, 0)
			}
			rhs := h0*h0/(2*kIce) + h0/tc.h + (c.tf-ta)*days*86400/(rhoIce*latentFus)
			// Solve h²/(2k) + h/H = rhs for h > 0.
			a, b := 1/(2*kIce), 1/tc.h
			want := (-b + math.Sqrt(b*b+4*a*rhs)) / (2 * a)
			if d := math.Abs(c.ice-want) / want; d > 0.005 {
				t.Errorf("ice after %v days: %.4f m, analytic %.4f m (%.2f %% off)", days, c.ice, want, 100*d)
			}
			if tc.h > 1e6 {
				stefan := math.Sqrt(h0*h0 + 2*kIce*(c.tf-ta)*days*86400/(rhoIce*latentFus))
				if d := math.Abs(c.ice-stefan) / stefan; d > 0.005 {
					t.Errorf("pure Stefan: %.4f m vs %.4f m", c.ice, stefan)
				}
			}
		})
	}
}

// The buoys report what the truth says: a stuck sensor repeats one value for
// a day, one reading carries an 8 °C spike, dropouts are counted, the noise
// has about the configured σ.
func TestReadingsCarryInjectedFaults(t *testing.T) {
	sc := DefaultScenario(3)
	s := New(sc)
	stuck, spike := sc.Faults[0], sc.Faults[1]
	var stuckVals []float64
	var spikeReading, prevSpikeDepth *ingest.Reading
	var prev = map[string]ingest.Reading{}
	var total int
	var devSum, devN float64
	end := spike.At.Add(6 * time.Hour)
	if a := stuck.At.Add(stuck.Duration + 6*time.Hour); a.After(end) {
		end = a
	}
	for s.Now().Before(end) {
		now, rs := s.Step()
		total += len(rs)
		for i := range rs {
			r := rs[i]
			key := fmt.Sprintf("%s/%g", r.Site, r.Depth)
			if r.Site == stuck.Site && r.Depth == stuck.Depth && !now.Before(stuck.At) && now.Before(stuck.At.Add(stuck.Duration)) {
				stuckVals = append(stuckVals, r.TempC)
			}
			if r.Site == spike.Site && r.Depth == spike.Depth && !now.Before(spike.At) && spikeReading == nil {
				spikeReading = &rs[i]
				if p, ok := prev[key]; ok {
					prevSpikeDepth = &p
				}
			}
			if r.Site == "larchmere" && r.Depth == 29 && !(r.Site == stuck.Site && r.Depth == stuck.Depth) {
				// deviation from the model's own value at that depth
				devSum += math.Pow(r.TempC-s.sites[0].col.sample(29), 2)
				devN++
			}
			prev[key] = r
		}
	}
	if len(stuckVals) < 100 {
		t.Fatalf("only %d stuck readings", len(stuckVals))
	}
	for _, v := range stuckVals {
		if v != stuckVals[0] {
			t.Fatalf("stuck sensor changed value: %v then %v", stuckVals[0], v)
		}
	}
	if spikeReading == nil || prevSpikeDepth == nil {
		t.Fatal("no spike reading seen")
	}
	if d := spikeReading.TempC - prevSpikeDepth.TempC; d < 7 || d > 9 {
		t.Errorf("spike rose %.3f °C over the previous reading, want about 8", d)
	}
	tr := s.Truth()
	if f := tr.Faults[0]; f.Readings != len(stuckVals) || f.ValueC != stuckVals[0] || !f.First.Equal(stuck.At) {
		t.Errorf("stuck truth %+v does not match %d readings of %v", f, len(stuckVals), stuckVals[0])
	}
	if f := tr.Faults[1]; f.Readings != 1 || f.ValueC != spikeReading.TempC || !f.First.Equal(spikeReading.Time) {
		t.Errorf("spike truth %+v does not match reading %+v", f, *spikeReading)
	}
	var reported, dropped int
	for _, st := range tr.Sites {
		reported += st.Readings
		dropped += st.Dropped
	}
	if reported != total {
		t.Errorf("truth counts %d readings, %d delivered", reported, total)
	}
	if dropped == 0 {
		t.Error("no dropouts in several weeks of readings")
	}
	sigma := math.Sqrt(devSum / devN)
	if sigma < 0.010 || sigma > 0.020 {
		t.Errorf("sensor noise σ = %.4f °C, configured 0.015", sigma)
	}
}

func TestScenarioValidation(t *testing.T) {
	good := DefaultScenario(1)
	cases := map[string]func(*Scenario){
		"no sites":           func(s *Scenario) { s.Sites = nil },
		"no start":           func(s *Scenario) { s.Start = time.Time{} },
		"bad id":             func(s *Scenario) { s.Sites[0].ID = "a/b" },
		"duplicate id":       func(s *Scenario) { s.Sites[1].ID = s.Sites[0].ID },
		"depth order":        func(s *Scenario) { s.Sites[0].SensorDepths = []float64{2, 1} },
		"sensor below floor": func(s *Scenario) { s.Sites[1].SensorDepths = []float64{1, 9} },
		"report not multiple": func(s *Scenario) {
			s.Report = 15 * time.Minute
		},
		"fault unknown site": func(s *Scenario) { s.Faults[0].Site = "nowhere" },
		"hypsography grows":  func(s *Scenario) { s.Sites[0].Hypsography[1].Area = 9e9 },
	}
	for name, mut := range cases {
		t.Run(name, func(t *testing.T) {
			sc := DefaultScenario(1)
			sc.Sites = append([]SiteSpec(nil), good.Sites...)
			for i := range sc.Sites {
				sc.Sites[i].Hypsography = append(sc.Sites[i].Hypsography[:0:0], good.Sites[i].Hypsography...)
			}
			mut(&sc)
			if _, err := NewChecked(sc); err == nil {
				t.Fatal("no error")
			}
			s := New(sc)
			if s.Err() == nil {
				t.Fatal("New hid the error")
			}
			if _, rs := s.Step(); rs != nil {
				t.Error("an invalid simulator produced readings")
			}
		})
	}
}

func TestAccessors(t *testing.T) {
	s := New(DefaultScenario(1))
	if !math.IsNaN(s.AirTemp("nowhere")) || s.Column("nowhere") != nil || s.Layers("nowhere") != nil {
		t.Error("unknown site not reported")
	}
	if _, err := s.Budget("nowhere"); err == nil {
		t.Error("Budget of unknown site: no error")
	}
	if a := s.AirTemp("larchmere"); a < -40 || a > 40 {
		t.Errorf("air %v", a)
	}
	if w := s.Wind("ottersedge"); !(w >= 0) {
		t.Errorf("wind %v", w)
	}
	if n := len(s.Column("larchmere")); n != 60 || len(s.Layers("larchmere")) != n {
		t.Errorf("larchmere has %d layers, want 60 of 0.5 m", n)
	}
	if n := len(s.Column("ottersedge")); n != 12 {
		t.Errorf("ottersedge has %d layers, want 12 of 0.25 m", n)
	}
	t0 := s.Now()
	tt, _ := s.Step()
	if tt.Sub(t0) != 10*time.Minute || !s.Now().Equal(tt) {
		t.Errorf("step moved %v -> %v", t0, tt)
	}
}
