package water

import (
	"encoding/json"
	"math"
	"math/rand"
	"strings"
	"testing"
)

func compute(t *testing.T, c Column) *Metrics {
	t.Helper()
	var m Metrics
	if err := Compute(c, &m); err != nil {
		t.Fatalf("Compute: %v", err)
	}
	return &m
}

// coneHyps is the cone basin A(z) = A0·(1 − z/H)² tabulated every step metres.
func coneHyps(a0, h, step float64) Hypsography {
	var hy Hypsography
	for i := 0; float64(i)*step <= h+1e-9; i++ {
		z := float64(i) * step
		u := 1 - z/h
		hy.Depths = append(hy.Depths, z)
		hy.Areas = append(hy.Areas, a0*u*u)
	}
	return hy
}

// twoLayer is a 20 m column of 10 m at 20 °C over 10 m at 4 °C (a step at 10 m).
func twoLayer() Column {
	return Column{
		Depths:   []float64{0, 10 - 1e-6, 10 + 1e-6, 20},
		Temps:    []float64{20, 20, 4, 4},
		MaxDepth: 20,
	}
}

// Analytic check [C] (SCIENCE.md §4; Idso 1973 formula, g = 9.81, CIPM density):
// box basin, H = 20 m, 10 m at 20 °C over 10 m at 4 °C: S_T = 867.30 J/m².
func TestSchmidt_Idso1973_BoxBasin(t *testing.T) {
	m := compute(t, twoLayer())
	near(t, "SchmidtJM2 (box)", m.SchmidtJM2, 867.30, 0.05)
	if m.MeanMethod != "depth-weighted" {
		t.Errorf("MeanMethod = %q, want depth-weighted for a box basin", m.MeanMethod)
	}
	near(t, "MeanTempC (box)", m.MeanTempC, 12, 1e-6)
}

// Analytic check [C] (SCIENCE.md §4): cone basin A(z) = A0(1 − z/H)², same
// temperatures: z_v = 5 m, S_T = 108.41 J/m².
func TestSchmidt_Idso1973_ConeBasin(t *testing.T) {
	c := twoLayer()
	c.Hypsography = coneHyps(2.5e6, 20, 0.1)
	m := compute(t, c)
	near(t, "SchmidtJM2 (cone)", m.SchmidtJM2, 108.41, 0.05)
	if m.MeanMethod != "volume-weighted" {
		t.Errorf("MeanMethod = %q, want volume-weighted", m.MeanMethod)
	}
	// Volume-weighted mean [C]: 7/8 of a cone's volume lies in its top half.
	near(t, "MeanTempC (cone)", m.MeanTempC, 20*7.0/8+4*1.0/8, 1e-3)
}

// Analytic check [C] (SCIENCE.md §4): any isothermal column has S_T = 0.
func TestSchmidt_IsothermalIsZero(t *testing.T) {
	for _, temp := range []float64{0.5, 3.95, 12, 25} {
		for _, hy := range []Hypsography{{}, coneHyps(1e5, 30, 1)} {
			m := compute(t, Column{Depths: []float64{0.5, 2, 5, 10, 20, 30}, Temps: []float64{temp, temp, temp, temp, temp, temp}, Hypsography: hy})
			near(t, "SchmidtJM2 (isothermal)", m.SchmidtJM2, 0, 1e-9)
		}
	}
	m := compute(t, Column{Depths: []float64{0.5, 2, 5}, Temps: []float64{8, 8, 8}, Salinity: 0.4, MaxDepth: 6})
	near(t, "SchmidtJM2 (isothermal, S=0.4)", m.SchmidtJM2, 0, 1e-9)
}

// Check [C] (SCIENCE.md §4, N² = (g/rho)·drho/dz, textbook definition):
// 20 °C at 1 m over 10 °C at 5 m gives 3.673e-3 s⁻².
func TestN2_CheckValue(t *testing.T) {
	m := compute(t, Column{Depths: []float64{1, 5}, Temps: []float64{20, 10}})
	if len(m.N2) != 1 {
		t.Fatalf("len(N2) = %d, want 1", len(m.N2))
	}
	near(t, "N2", m.N2[0], 3.673e-3, 5e-7)
	near(t, "MaxN2", m.MaxN2, m.N2[0], 0)
}

// Common practice, no source: 1 °C water under 4 °C water is unstable (the
// 4 °C water is denser), 4 °C under 1 °C is stable.
func TestFact_FourUnderOneIsStable(t *testing.T) {
	stable := compute(t, Column{Depths: []float64{1, 5}, Temps: []float64{1, 4}})
	unstable := compute(t, Column{Depths: []float64{1, 5}, Temps: []float64{4, 1}})
	if !(stable.N2[0] > 0 && stable.DensityDiff > 0) {
		t.Errorf("4 °C under 1 °C: N² %g, Δrho %g, want both > 0", stable.N2[0], stable.DensityDiff)
	}
	if !(unstable.N2[0] < 0 && unstable.SchmidtJM2 < 0) {
		t.Errorf("1 °C under 4 °C: N² %g, S_T %g, want both < 0", unstable.N2[0], unstable.SchmidtJM2)
	}
}

// densityToTemp inverts CIPM density on the warm side (T ≥ 3.983035 °C).
func densityToTemp(rho float64) float64 {
	lo, hi := 3.983035, 40.0
	for i := 0; i < 200; i++ {
		mid := 0.5 * (lo + hi)
		if DensityCIPM(mid) > rho {
			lo = mid
		} else {
			hi = mid
		}
	}
	return 0.5 * (lo + hi)
}

// Thermocline and metalimnion by the density-gradient method stated on
// ComputeWith; expected depths [C] by hand from the method's definition for
// gradients 0, 0.05, 0.3, 0.5, 0.2, 0.02 kg/m³/m every 2 m:
// thermocline (6·10 + 8·6.667)/16.667 = 6.8 m, top 3 + 2·0.05/0.25 = 3.4 m,
// bottom 9 + 2·0.1/0.18 = 10.111 m.
func TestThermocline_DensityGradientMethod(t *testing.T) {
	grads := []float64{0, 0.05, 0.3, 0.5, 0.2, 0.02}
	depths := []float64{0, 2, 4, 6, 8, 10, 12}
	rho := []float64{997.0}
	for _, g := range grads {
		rho = append(rho, rho[len(rho)-1]+2*g)
	}
	temps := make([]float64, len(rho))
	for i, r := range rho {
		temps[i] = densityToTemp(r)
	}
	m := compute(t, Column{Depths: depths, Temps: temps})
	near(t, "ThermoclineM", m.ThermoclineM, 6.8, 1e-6)
	near(t, "MetaTopM", m.MetaTopM, 3.4, 1e-6)
	near(t, "MetaBottomM", m.MetaBottomM, 9+2*0.1/0.18, 1e-6)
	if m.ThermoclineMethod == "" {
		t.Error("ThermoclineMethod is empty")
	}

	// Symmetric neighbours: the refinement stays at the midpoint.
	rho = []float64{998, 998.2, 999.2, 999.4}
	for i, r := range rho {
		temps[i] = densityToTemp(r)
	}
	m = compute(t, Column{Depths: []float64{1, 2, 3, 4}, Temps: temps[:4]})
	near(t, "ThermoclineM (symmetric)", m.ThermoclineM, 2.5, 1e-6)

	// Largest gradient below 0.1 kg/m³/m: no thermocline (Read et al. 2011 [M]).
	m = compute(t, Column{Depths: []float64{0, 5, 10, 20}, Temps: []float64{12, 11.8, 11.6, 11.5}})
	if !math.IsNaN(m.ThermoclineM) || !math.IsNaN(m.MetaTopM) || !math.IsNaN(m.MetaBottomM) {
		t.Errorf("weak gradient: thermocline %g, meta %g-%g, want NaN", m.ThermoclineM, m.MetaTopM, m.MetaBottomM)
	}
}

// Heat to lose before Tmd [C]: isothermal 10 °C fresh box column 20 m deep,
// ∫ rho·cp·(10 − Tmd(z)) dz with Tmd of Chen & Millero at 1 dbar per metre =
// rho(10)·4186·(20·6.0161 + 1.9911e-3·200 + 5.822e-8·8000/3).
func TestHeatToTmd_Box(t *testing.T) {
	m := compute(t, Column{Depths: []float64{0.5, 5, 20}, Temps: []float64{10, 10, 10}})
	integral := 20*(10-3.9839) + 1.9911e-3*20*20/2 + 5.822e-8*20*20*20/3
	want := DensityCIPM(10) * 4186 * integral
	near(t, "HeatToTmdJM2", m.HeatToTmdJM2, want, want*1e-9)
	// A column at its Tmd everywhere has none to lose; a colder one has negative heat.
	cold := compute(t, Column{Depths: []float64{0.5, 5, 20}, Temps: []float64{1, 2, 3}})
	if cold.HeatToTmdJM2 >= 0 {
		t.Errorf("cold column HeatToTmdJM2 = %g, want < 0", cold.HeatToTmdJM2)
	}
}

func TestCompute_FillsEveryField(t *testing.T) {
	c := Column{
		Depths:      []float64{0.5, 2, 5, 8, 12, 20},
		Temps:       []float64{16, 15.8, 15.5, 9, 7, 6.5},
		Salinity:    0.2,
		MaxDepth:    24,
		Hypsography: coneHyps(1e6, 24, 1),
	}
	m := compute(t, c)
	if m.Formula != FormulaEOS80 || m.PressureMethod != PressureMethod || m.SensorsUsed != 6 || m.IntegrationDepthM != 24 {
		t.Errorf("formula %q, pressure %q, sensors %d, depth %g", m.Formula, m.PressureMethod, m.SensorsUsed, m.IntegrationDepthM)
	}
	if len(m.DensityKgM3) != 6 || len(m.TmdC) != 6 || len(m.N2) != 5 {
		t.Fatalf("lengths %d %d %d", len(m.DensityKgM3), len(m.TmdC), len(m.N2))
	}
	for i, z := range c.Depths {
		near(t, "DensityKgM3 (potential, surface pressure)", m.DensityKgM3[i], DensityEOS80(0.2, c.Temps[i], 0), 1e-12)
		near(t, "TmdC (own pressure)", m.TmdC[i], Tmd(0.2, z), 1e-12)
	}
	near(t, "SurfaceTempC", m.SurfaceTempC, 16, 0)
	near(t, "BottomTempC", m.BottomTempC, 6.5, 0)
	near(t, "DensityDiff", m.DensityDiff, m.BottomDensity-m.SurfaceDensity, 0)
	near(t, "FreezingPointC", m.FreezingPointC, FreezingPoint(0.2, 0), 0)
	if !(m.MeanTempC > 6.5 && m.MeanTempC < 16) || !(m.SchmidtJM2 > 0) || !(m.HeatToTmdJM2 > 0) || !(m.MaxN2 > 0) {
		t.Errorf("implausible metrics: %+v", m)
	}
	if !(m.ThermoclineM > 5 && m.ThermoclineM < 8) || !(m.MetaTopM <= m.ThermoclineM && m.ThermoclineM <= m.MetaBottomM) {
		t.Errorf("thermocline %g m (metalimnion %g-%g), want between the 5 m and 8 m sensors", m.ThermoclineM, m.MetaTopM, m.MetaBottomM)
	}
}

// A deep isothermal column is not stratified: potential density is used.
func TestCompute_PotentialDensityDeepIsothermal(t *testing.T) {
	m := compute(t, Column{Depths: []float64{1, 50, 100, 200}, Temps: []float64{4.5, 4.5, 4.5, 4.5}})
	if m.DensityDiff != 0 {
		t.Errorf("DensityDiff = %g for an isothermal column, want 0", m.DensityDiff)
	}
	// In-situ density at 200 m would differ by about 1 kg/m³.
	if d := DensityEOS80(0, 4.5, 200) - DensityEOS80(0, 4.5, 1); d < 0.5 {
		t.Errorf("in-situ compression over 200 m = %g kg/m³, expected about 1", d)
	}
}

func TestCompute_Errors(t *testing.T) {
	good := func() Column {
		return Column{Depths: []float64{0.5, 2, 5}, Temps: []float64{10, 9, 8}}
	}
	for name, tc := range map[string]struct {
		mod  func(*Column)
		want string
	}{
		"no sensors":        {func(c *Column) { c.Depths, c.Temps = nil, nil }, "no sensors"},
		"length mismatch":   {func(c *Column) { c.Temps = c.Temps[:2] }, "3 depths but 2 temperatures"},
		"not ascending":     {func(c *Column) { c.Depths[2] = 2 }, "strictly ascending"},
		"negative depth":    {func(c *Column) { c.Depths[0] = -1 }, "depth -1 m"},
		"NaN temperature":   {func(c *Column) { c.Temps[1] = math.NaN() }, "temperature NaN"},
		"Inf temperature":   {func(c *Column) { c.Temps[1] = math.Inf(1) }, "temperature +Inf"},
		"hot":               {func(c *Column) { c.Temps[0] = 55 }, "outside"},
		"salinity":          {func(c *Column) { c.Salinity = -1 }, "salinity"},
		"max depth shallow": {func(c *Column) { c.MaxDepth = 3 }, "deeper than the maximum depth"},
		"hyps mismatch":     {func(c *Column) { c.Hypsography = Hypsography{Depths: []float64{0, 5}, Areas: []float64{1}} }, "hypsography has 2 depths"},
		"hyps not from 0":   {func(c *Column) { c.Hypsography = Hypsography{Depths: []float64{1, 5}, Areas: []float64{2, 1}} }, "start at 0 m"},
		"hyps increasing":   {func(c *Column) { c.Hypsography = Hypsography{Depths: []float64{0, 5}, Areas: []float64{1, 2}} }, "must not increase"},
		"hyps zero surface": {func(c *Column) { c.Hypsography = Hypsography{Depths: []float64{0, 5}, Areas: []float64{0, 0}} }, "surface area"},
	} {
		c := good()
		tc.mod(&c)
		var m Metrics
		err := Compute(c, &m)
		if err == nil || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("%s: error %v, want one containing %q", name, err, tc.want)
		}
	}
	if err := Compute(good(), nil); err == nil {
		t.Error("Compute with nil Metrics: no error")
	}
}

// After warm-up Compute reuses m's slices and allocates nothing.
func TestCompute_NoAllocations(t *testing.T) {
	c := benchColumn()
	var m Metrics
	if err := Compute(c, &m); err != nil {
		t.Fatal(err)
	}
	allocs := testing.AllocsPerRun(50, func() {
		if err := Compute(c, &m); err != nil {
			t.Fatal(err)
		}
	})
	if allocs != 0 {
		t.Errorf("Compute allocates %.1f times per call after warm-up, want 0", allocs)
	}
}

// Property: Schmidt stability is never negative for a statically stable column
// (potential density non-decreasing downward, here all on one side of Tmd so the
// interpolated profile is stable too), for box and cone basins, and it grows when
// the warm top layer is warmed (summer profiles; the top sensor interval lies
// above the centre of volume). Seeded loop for reproducibility.
func TestSchmidt_PropertyStableNonNegativeAndGrowsWithWarming(t *testing.T) {
	rng := rand.New(rand.NewSource(20240601))
	var m, m2 Metrics
	for iter := 0; iter < 400; iter++ {
		n := 3 + rng.Intn(12)
		depths := make([]float64, n)
		depths[0] = 0.2 + rng.Float64()
		depths[1] = depths[0] + 0.2 + rng.Float64()
		for i := 2; i < n; i++ {
			depths[i] = depths[i-1] + 0.2 + 4*rng.Float64()
		}
		zD := depths[n-1] + 5*rng.Float64()
		if zD < 4*depths[1] {
			zD = 4 * depths[1] // the top interval lies above the centre of volume of a cone
		}
		summer := rng.Intn(2) == 0
		temps := make([]float64, n)
		if summer { // warm over cold, all ≥ Tmd at the surface
			temps[n-1] = 4 + 8*rng.Float64()
			for i := n - 2; i >= 0; i-- {
				temps[i] = math.Min(temps[i+1]+3*rng.Float64(), 35)
			}
		} else { // winter: cold over ~4 °C, all ≤ 3.98 °C
			temps[n-1] = 3.98 * rng.Float64()
			for i := n - 2; i >= 0; i-- {
				temps[i] = temps[i+1] * rng.Float64()
			}
		}
		c := Column{Depths: depths, Temps: temps, MaxDepth: zD}
		if rng.Intn(2) == 0 {
			c.Hypsography = coneHyps(1e6, zD, zD/40)
		}
		if err := Compute(c, &m); err != nil {
			t.Fatalf("iter %d: %v", iter, err)
		}
		if m.SchmidtJM2 < -1e-9 {
			t.Fatalf("iter %d: stable column %+v has S_T = %g < 0", iter, c, m.SchmidtJM2)
		}
		if !summer {
			continue
		}
		warmer := append([]float64(nil), temps...)
		warmer[0] += 0.5 + 2*rng.Float64()
		c.Temps = warmer
		if err := Compute(c, &m2); err != nil {
			t.Fatalf("iter %d: %v", iter, err)
		}
		if !(m2.SchmidtJM2 > m.SchmidtJM2) {
			t.Fatalf("iter %d: warming the top from %g to %g °C moved S_T from %g to %g", iter, temps[0], warmer[0], m.SchmidtJM2, m2.SchmidtJM2)
		}
	}
}

func TestMetricsJSON_NaNIsNullAndRoundTrips(t *testing.T) {
	m := compute(t, Column{Depths: []float64{0.5, 5, 20}, Temps: []float64{10, 10, 10}})
	b, err := json.Marshal(m)
	if err != nil {
		t.Fatal(err)
	}
	s := string(b)
	for _, key := range []string{`"thermocline_m":null`, `"metalimnion_top_m":null`, `"formula":"CIPM-2001"`, `"n2_s2":[`, `"schmidt_j_m2":`, `"heat_to_tmd_j_m2":`} {
		if !strings.Contains(s, key) {
			t.Errorf("JSON lacks %s: %s", key, s)
		}
	}
	var back Metrics
	if err := json.Unmarshal(b, &back); err != nil {
		t.Fatal(err)
	}
	if !math.IsNaN(back.ThermoclineM) || back.MeanTempC != m.MeanTempC || len(back.DensityKgM3) != 3 || back.DensityKgM3[2] != m.DensityKgM3[2] {
		t.Errorf("round trip: %+v", back)
	}
}
