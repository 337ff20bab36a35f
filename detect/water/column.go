package water

import (
	"errors"
	"fmt"
	"math"
)

// Physical constants and method settings of Compute.
const (
	// Gravity is the acceleration of gravity, m/s², used for Schmidt stability
	// and N². 9.81 is standard gravity (9.80665) rounded as in the check values
	// of SCIENCE.md §4; local g varies between about 9.78 and 9.83.
	Gravity = 9.81
	// HeatCapacity is the specific heat capacity of water at constant pressure,
	// J/(kg·K), a constant [M: the usual textbook value near 15-20 °C]. TEOS-10
	// (cp_t_exact of pure water at the surface, via python3-gsw) gives 4219.4 at
	// 0 °C, 4207.5 at 4 °C and 4179.8 at 30 °C [C], so the constant is within
	// 0.8 % over 0-30 °C; the cross-check test asserts 1 %.
	HeatCapacity = 4186.0
	// SchmidtGridM is the largest step, m, of the depth grid on which the
	// temperature profile is interpolated for the column integrals.
	SchmidtGridM = 0.1
	// ThermoclineMinGradient is the default minimum density gradient for a
	// thermocline, kg/m³/m (Read et al. 2011 [M]).
	ThermoclineMinGradient = 0.1
	// Validity ranges checked by Compute.
	minTempC     = -2.0    // °C, lower end of EOS-80's range
	maxTempC     = 40.0    // °C, upper end of CIPM 2001 and EOS-80
	maxSalinity  = 42.0    // EOS-80 range
	maxDepthM    = 10000.0 // m, 10000 dbar, EOS-80 range
	meanVolume   = "volume-weighted"
	meanDepth    = "depth-weighted"
	thermoMethod = "density gradient"
)

// DefaultThresholds returns the default criteria of SCIENCE.md §5: stratified
// when bottom − surface density exceeds 0.1 kg/m³ (Woolway et al. 2021 [M
// threshold]); max_density within ±0.3 °C of Tmd (design choice); inverse when
// the top is at least 0.1 °C colder than the bottom (Pierson et al. 2011);
// thermocline gradient at least 0.1 kg/m³/m (Read et al. 2011 [M]); a sensor
// within the top 2 m, at least 3 sensors, spanning at least half of MaxDepth.
func DefaultThresholds() Thresholds {
	return Thresholds{
		StratDensityDiff:   0.1,
		TmdDelta:           0.3,
		InverseDeltaT:      0.1,
		ThermoclineMinGrad: ThermoclineMinGradient,
		MinSurfaceDepth:    2,
		MinSensors:         3,
		MinCoverage:        0.5,
	}
}

// Compute fills every field of m from the column c with the default
// thermocline gradient ThermoclineMinGradient (0.1 kg/m³/m). It reuses m's
// slices and allocates nothing after warm-up, and returns a descriptive error
// for invalid input (lengths, order, ranges, non-finite values, hypsography).
// Stability metrics use POTENTIAL density (surface pressure, site salinity), so
// that compression does not make a deep isothermal column look stratified; Tmd
// is taken at each sensor's own pressure. The methods (Schmidt stability on a
// 0.1 m grid, box basin without hypsography, N², the density-gradient
// thermocline, heat to Tmd with cp = 4186 J/kg/K [M]) are stated on ComputeWith.
func Compute(c Column, m *Metrics) error {
	return ComputeWith(c, ThermoclineMinGradient, m)
}

// ComputeWith fills every field of m from the column c. minGrad is the smallest
// density gradient, kg/m³/m, that counts as a thermocline (Thresholds.
// ThermoclineMinGrad; 0.1 by default). It reuses m's slices, so once m has held
// a column of the same size it allocates nothing. On error m is left partly
// filled and must not be used.
//
// Methods:
//
//   - Density (DensityKgM3, SurfaceDensity, BottomDensity, DensityDiff, Schmidt
//     stability, N², thermocline) is POTENTIAL density: the density at surface
//     pressure of water at the sensor's temperature and the site's salinity,
//     by Density(s, t, 0) (CIPM 2001 for fresh water, EOS-80 with salinity).
//     In-situ density grows by about 0.05 kg/m³ per 10 m from compression alone
//     [C], which would make every deep isothermal column look stratified; only
//     the potential density says whether water parcels would rise or sink.
//     In-situ temperature stands for potential temperature: the adiabatic
//     correction in fresh water is under 0.01 °C per 100 m [C].
//   - TmdC is Tmd (Chen & Millero 1986) at each sensor's own pressure
//     (PressureDbar), because that is the temperature at which water at that
//     depth is densest.
//   - The column integrals (mean temperature, Schmidt stability, heat to Tmd)
//     run from the surface to the integration depth: MaxDepth, else the deepest
//     hypsography depth, else the deepest sensor. Temperature is interpolated
//     linearly between sensors and held constant above the top sensor and below
//     the bottom one; area is interpolated linearly in the hypsography and held
//     at its last value below it. The integrals use Simpson's rule on a grid of
//     at most SchmidtGridM (0.1 m) whose nodes include every sensor and
//     hypsography depth.
//   - MeanTempC is volume-weighted with a hypsography, else depth-weighted: with
//     no hypsography the basin is taken as a box (constant area), and
//     MeanMethod says which.
//   - SchmidtJM2 (Idso 1973, Limnol. Oceanogr. 18:681-683) is
//     (g/A0) ∫ (z − z_v)·(rho(z) − rho_ref)·A(z) dz, z_v the centre of volume;
//     subtracting rho_ref (the mean sensor density) changes nothing in exact
//     arithmetic since ∫ (z − z_v)·A dz = 0, and keeps the sums accurate.
//     Box basin when there is no hypsography.
//   - N2 between adjacent sensors i, i+1 is (g/rho)·(rho_{i+1} − rho_i)/(z_{i+1} − z_i)
//     with rho the mean of the two densities, s⁻², positive when stable.
//   - Thermocline, by the density-gradient method (Read et al. 2011, Environ.
//     Model. Softw. 26:1325 [M]): the interval between adjacent sensors with the
//     largest density gradient; its depth is the midpoint, refined when both
//     neighbouring intervals exist to (z_i·w_up + z_{i+1}·w_dn)/(w_up + w_dn),
//     w_up = Δz_up/(G − G_up) and w_dn = Δz_dn/(G − G_dn), so that it leans
//     towards the side whose gradient is nearly as large [M: weights as recalled
//     from the published method]. None (NaN) when the largest gradient is below
//     minGrad. The metalimnion top and bottom are where the gradient, taken at
//     interval midpoints and interpolated linearly, falls back to minGrad above
//     and below; the top or bottom sensor when it never does.
//   - HeatToTmdJM2 is the heat the column must lose for every depth to reach its
//     own Tmd, J/m² of surface: (1/A0) ∫ rho·cp·(T − Tmd(z))·A(z) dz, with cp the
//     constant HeatCapacity (4186 J/kg/K [M]). It is a net figure: negative when
//     the column is on the whole colder than Tmd (it must gain heat).
//   - FreezingPointC is FreezingPoint(salinity, 0): the surface, where ice forms.
func ComputeWith(c Column, minGrad float64, m *Metrics) error {
	if m == nil {
		return errors.New("water: nil Metrics")
	}
	zD, err := validate(c)
	if err != nil {
		return err
	}
	if math.IsNaN(minGrad) || minGrad < 0 {
		return fmt.Errorf("water: thermocline minimum gradient %g kg/m³/m must be ≥ 0", minGrad)
	}
	n := len(c.Depths)
	s := c.Salinity
	s15 := s * math.Sqrt(s)

	m.Formula = FormulaCIPM
	if s != 0 {
		m.Formula = FormulaEOS80
	}
	m.PressureMethod = PressureMethod
	m.SensorsUsed = n
	m.IntegrationDepthM = zD
	m.ThermoclineMethod = thermoMethod

	m.DensityKgM3 = m.DensityKgM3[:0]
	m.TmdC = m.TmdC[:0]
	sumRho := 0.0
	for i, z := range c.Depths {
		rho := potentialDensity(s, s15, c.Temps[i])
		sumRho += rho
		m.DensityKgM3 = append(m.DensityKgM3, rho)
		m.TmdC = append(m.TmdC, Tmd(s, PressureDbar(z)))
	}
	m.SurfaceTempC = c.Temps[0]
	m.BottomTempC = c.Temps[n-1]
	m.SurfaceDensity = m.DensityKgM3[0]
	m.BottomDensity = m.DensityKgM3[n-1]
	m.DensityDiff = m.BottomDensity - m.SurfaceDensity
	m.FreezingPointC = FreezingPoint(s, 0)

	m.N2 = m.N2[:0]
	m.MaxN2 = math.NaN()
	for i := 0; i+1 < n; i++ {
		r0, r1 := m.DensityKgM3[i], m.DensityKgM3[i+1]
		n2 := Gravity / (0.5 * (r0 + r1)) * (r1 - r0) / (c.Depths[i+1] - c.Depths[i])
		m.N2 = append(m.N2, n2)
		if i == 0 || n2 > m.MaxN2 {
			m.MaxN2 = n2
		}
	}

	thermocline(c.Depths, m.DensityKgM3, minGrad, m)

	in := integrate(c, zD, s, s15, sumRho/float64(n))
	m.MeanTempC = in.meanT
	m.SchmidtJM2 = in.schmidt
	m.HeatToTmdJM2 = in.heat
	m.MeanMethod = meanDepth
	if len(c.Hypsography.Depths) > 0 {
		m.MeanMethod = meanVolume
	}
	return nil
}

// validate checks c and returns the integration depth, m.
func validate(c Column) (float64, error) {
	n := len(c.Depths)
	if n == 0 {
		return 0, errors.New("water: column has no sensors")
	}
	if len(c.Temps) != n {
		return 0, fmt.Errorf("water: %d depths but %d temperatures", n, len(c.Temps))
	}
	if !finite(c.Salinity) || c.Salinity < 0 || c.Salinity > maxSalinity {
		return 0, fmt.Errorf("water: salinity %g g/kg outside 0-%g", c.Salinity, maxSalinity)
	}
	for i, z := range c.Depths {
		if !finite(z) || z < 0 || z > maxDepthM {
			return 0, fmt.Errorf("water: sensor %d depth %g m outside 0-%g m", i, z, maxDepthM)
		}
		if i > 0 && z <= c.Depths[i-1] {
			return 0, fmt.Errorf("water: sensor depths must be strictly ascending: %g m after %g m", z, c.Depths[i-1])
		}
		t := c.Temps[i]
		if !finite(t) || t < minTempC || t > maxTempC {
			return 0, fmt.Errorf("water: temperature %g °C at %g m outside %g-%g °C", t, z, minTempC, maxTempC)
		}
	}
	h := c.Hypsography
	if len(h.Depths) != len(h.Areas) {
		return 0, fmt.Errorf("water: hypsography has %d depths but %d areas", len(h.Depths), len(h.Areas))
	}
	for i, z := range h.Depths {
		a := h.Areas[i]
		switch {
		case !finite(z) || z < 0 || z > maxDepthM:
			return 0, fmt.Errorf("water: hypsography depth %g m outside 0-%g m", z, maxDepthM)
		case i == 0 && z != 0:
			return 0, fmt.Errorf("water: hypsography must start at 0 m, not %g m", z)
		case i > 0 && z <= h.Depths[i-1]:
			return 0, fmt.Errorf("water: hypsography depths must be strictly ascending: %g m after %g m", z, h.Depths[i-1])
		case !finite(a) || a < 0:
			return 0, fmt.Errorf("water: hypsography area %g m² at %g m must be finite and ≥ 0", a, z)
		case i == 0 && a == 0:
			return 0, errors.New("water: hypsography surface area must be > 0 m²")
		case i > 0 && a > h.Areas[i-1]:
			return 0, fmt.Errorf("water: hypsography areas must not increase with depth: %g m² at %g m after %g m²", a, z, h.Areas[i-1])
		}
	}
	deepest := c.Depths[n-1]
	if !finite(c.MaxDepth) || c.MaxDepth < 0 || c.MaxDepth > maxDepthM {
		return 0, fmt.Errorf("water: maximum depth %g m outside 0-%g m", c.MaxDepth, maxDepthM)
	}
	zD := c.MaxDepth
	if zD == 0 {
		zD = deepest
		if k := len(h.Depths); k > 0 && h.Depths[k-1] > zD {
			zD = h.Depths[k-1]
		}
	}
	if deepest > zD {
		return 0, fmt.Errorf("water: sensor at %g m is deeper than the maximum depth %g m", deepest, zD)
	}
	if zD == 0 {
		return 0, errors.New("water: column has zero depth (single sensor at 0 m and no maximum depth)")
	}
	return zD, nil
}

func finite(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }

// thermocline sets ThermoclineM, MetaTopM and MetaBottomM by the density
// gradient method described on ComputeWith.
func thermocline(z, rho []float64, minGrad float64, m *Metrics) {
	m.ThermoclineM, m.MetaTopM, m.MetaBottomM = math.NaN(), math.NaN(), math.NaN()
	n := len(z)
	if n < 2 {
		return
	}
	grad := func(i int) float64 { return (rho[i+1] - rho[i]) / (z[i+1] - z[i]) }
	mid := func(i int) float64 { return 0.5 * (z[i] + z[i+1]) }
	k, gk := 0, grad(0)
	for i := 1; i+1 < n; i++ {
		if g := grad(i); g > gk {
			k, gk = i, g
		}
	}
	if !(gk >= minGrad) || gk <= 0 {
		return
	}
	td := mid(k)
	if k > 0 && k+2 < n {
		dUp, dDn := gk-grad(k-1), gk-grad(k+1)
		if dUp > 0 && dDn > 0 {
			wUp := (z[k] - z[k-1]) / dUp
			wDn := (z[k+2] - z[k+1]) / dDn
			td = (z[k]*wUp + z[k+1]*wDn) / (wUp + wDn)
		}
	}
	m.ThermoclineM = td

	top := z[0]
	for i := k - 1; i >= 0; i-- {
		if g := grad(i); g < minGrad {
			g1 := grad(i + 1)
			top = mid(i) + (minGrad-g)/(g1-g)*(mid(i+1)-mid(i))
			break
		}
	}
	bottom := z[n-1]
	for i := k + 1; i+1 < n; i++ {
		if g := grad(i); g < minGrad {
			g0 := grad(i - 1)
			bottom = mid(i-1) + (g0-minGrad)/(g0-g)*(mid(i)-mid(i-1))
			break
		}
	}
	m.MetaTopM = math.Min(top, td)
	m.MetaBottomM = math.Max(bottom, td)
}

// integrals holds the results of integrate.
type integrals struct {
	meanT, schmidt, heat float64
}

// integrate computes the column integrals of ComputeWith over [0, zD] with
// Simpson's rule on segments bounded by sensor and hypsography depths.
func integrate(c Column, zD, s, s15, rhoRef float64) integrals {
	zs, ts := c.Depths, c.Temps
	hz, ha := c.Hypsography.Depths, c.Hypsography.Areas
	n, nh := len(zs), len(hz)
	tempAt := cursor{xs: zs, ys: ts}
	areaAt := cursor{xs: hz, ys: ha}

	var sA, sZA, sTA, sRA, sZRA, sH float64
	i, j := 0, 0
	a := 0.0
	ta, aa := tempAt.at(0), areaAt.at(0)
	a0 := aa
	for a < zD {
		b := zD
		for i < n && zs[i] <= a {
			i++
		}
		if i < n && zs[i] < b {
			b = zs[i]
		}
		for j < nh && hz[j] <= a {
			j++
		}
		if j < nh && hz[j] < b {
			b = hz[j]
		}
		tb, ab := tempAt.at(b), areaAt.at(b)
		steps := int(math.Ceil((b - a) / SchmidtGridM))
		if steps < 2 {
			steps = 2
		}
		steps += steps & 1
		h := (b - a) / float64(steps)
		for k := 0; k <= steps; k++ {
			f := float64(k) / float64(steps)
			z := a + (b-a)*f
			t := ta + (tb-ta)*f
			area := aa + (ab-aa)*f
			w := h / 3
			switch {
			case k == 0 || k == steps:
			case k&1 == 1:
				w *= 4
			default:
				w *= 2
			}
			rho := potentialDensity(s, s15, t)
			dr := rho - rhoRef
			wa := w * area
			sA += wa
			sZA += wa * z
			sTA += wa * t
			sRA += wa * dr
			sZRA += wa * z * dr
			sH += wa * rho * (t - Tmd(s, PressureDbar(z)))
		}
		a, ta, aa = b, tb, ab
	}
	zv := sZA / sA
	return integrals{
		meanT:   sTA / sA,
		schmidt: Gravity / a0 * (sZRA - zv*sRA),
		heat:    HeatCapacity * sH / a0,
	}
}

// cursor interpolates ys(xs) linearly, holding the end values outside xs, for
// queries with non-decreasing x. With no points it returns 1 (a box basin).
type cursor struct {
	xs, ys []float64
	i      int
}

func (c *cursor) at(x float64) float64 {
	n := len(c.xs)
	switch {
	case n == 0:
		return 1
	case x <= c.xs[0]:
		return c.ys[0]
	case x >= c.xs[n-1]:
		return c.ys[n-1]
	}
	for c.i+1 < n && c.xs[c.i+1] < x {
		c.i++
	}
	x0, x1 := c.xs[c.i], c.xs[c.i+1]
	return c.ys[c.i] + (c.ys[c.i+1]-c.ys[c.i])*(x-x0)/(x1-x0)
}
