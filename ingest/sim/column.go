package sim

import (
	"math"

	"holomix/detect/water"
)

// Physical constants of the column model.
const (
	rhoCp     = 4.186e6 // J m⁻³ K⁻¹: ρ0·c_p of water, 1000 kg/m³ × 4186 J/(kg K) [M]
	rho0      = 1000.0  // kg/m³, reference density of the Boussinesq energy bookkeeping
	gravity   = 9.81    // m/s²
	latentFus = 333.55e3
	rhoIce    = 917.0 // kg/m³, density of lake ice [M]
	kIce      = 2.2   // W/(m K), thermal conductivity of ice near 0 °C [M]
	sigmaSB   = 5.670374419e-8
	emisWater = 0.97 // longwave emissivity of water and ice [M]
	albWater  = 0.07 // shortwave albedo of open water, daily mean [M]
	rhoAir    = 1.25 // kg/m³ [M]
	cpAir     = 1005.0
	latentVap = 2.45e6 // J/kg, latent heat of vaporisation near 15 °C [M]
	cBulk     = 1.3e-3 // bulk transfer coefficient C_D = C_H = C_E at 10 m [M]
	freeConvH = 3.0    // W m⁻² K⁻¹, sensible-heat floor for calm air (free convection) [M, design choice]
	nirFrac   = 0.45   // fraction of net shortwave (near-infrared) absorbed in the top layer [M]

	// Wind mixing: the wind supplies turbulent kinetic energy C_k ρ0 u*³ per
	// unit area and time; stored energy decays with tkeDecay. C_k is a tuning
	// constant of the bulk mixed-layer type (order 0.1-1 in the literature [M]).
	windCk   = 0.5
	tkeDecay = 6 * 3600.0 // s

	// Eddy diffusivity of Hondzo & Stefan (1993, J. Hydraul. Eng. 119:1251) [M]:
	// Kz = 8.17e-4 (A_s/km²)^0.56 (N²/s⁻²)^-0.43 cm²/s with N² ≥ 7.5e-5 s⁻².
	hsCoef  = 8.17e-4 * 1e-4 // m²/s
	hsN2Min = 7.5e-5
	kzMol   = 1.4e-7 // m²/s, molecular thermal diffusivity of water [M]
	// Under ice the wind no longer stirs the water; diffusion falls to a tenth
	// of the open-water value (design choice) but not below the molecular value.
	kzIceFactor = 0.1

	// Ice surface: cold snow-covered ice reflects 75 % and transmits 2 % of
	// the shortwave; wet melting ice 40 % and 15 % [M, order of magnitude].
	albIceCold, albIceMelt = 0.75, 0.40
	trIceCold, trIceMelt   = 0.02, 0.15
	snowFullIceM           = 0.15 // ice thickness (m) from which the snow resistance applies in full (design choice)
)

// column is one lake's water column: n layers of thickness dz, layer 0 at the top.
type column struct {
	sal    float64
	n      int
	dz     float64
	zc     []float64 // layer centre depths, m
	aif    []float64 // area at the n+1 interfaces (top of layer i = aif[i]), m²
	vol    []float64 // layer volumes, m³
	pIf    []float64 // pressure at interfaces, dbar
	tmdIf  []float64 // Tmd at interfaces, °C
	tmd    []float64 // Tmd at layer centres, °C
	T      []float64 // °C
	tf     float64   // freezing point at the surface, °C
	area0  float64   // surface area, m²
	areaKm float64   // for Hondzo-Stefan
	kzCoef float64   // hsCoef·areaKm^0.56, m²/s
	kext   float64   // m⁻¹
	wind   float64   // exposure factor
	snowR  float64   // m² K/W

	ice   float64 // ice thickness, m
	tsIce float64 // ice (snow) surface temperature at the last step, °C
	tke   float64 // stored turbulent kinetic energy for mixing, J

	surfaceIn float64 // J, cumulative energy that entered through the surface
	heat0     float64 // J, heat content at the start

	// scratch
	rho          []float64
	ta, tb, tc   []float64
	td           []float64
	gs, ge       []int
	gT, gV       []float64
	lastMixedIdx int // deepest layer index of the surface mixed layer at the last step
}

func newColumn(s SiteSpec, snowR float64) *column {
	n := int(math.Round(s.MaxDepth / s.LayerM))
	if n < 2 {
		n = 2
	}
	dz := s.MaxDepth / float64(n)
	c := &column{
		sal: s.Salinity, n: n, dz: dz,
		zc: make([]float64, n), aif: make([]float64, n+1), vol: make([]float64, n),
		pIf: make([]float64, n+1), tmdIf: make([]float64, n+1), tmd: make([]float64, n), T: make([]float64, n),
		rho: make([]float64, n), ta: make([]float64, n), tb: make([]float64, n), tc: make([]float64, n), td: make([]float64, n),
		gs: make([]int, n), ge: make([]int, n), gT: make([]float64, n), gV: make([]float64, n),
		kext: s.ExtinctionPerM, wind: s.Wind, snowR: snowR,
	}
	for i := 0; i <= n; i++ {
		z := float64(i) * dz
		c.aif[i] = areaAt(s, z)
		c.pIf[i] = water.PressureDbar(z)
		c.tmdIf[i] = water.Tmd(s.Salinity, c.pIf[i])
	}
	for i := 0; i < n; i++ {
		c.zc[i] = (float64(i) + 0.5) * dz
		c.vol[i] = dz * (c.aif[i] + c.aif[i+1]) / 2
		c.tmd[i] = water.Tmd(s.Salinity, water.PressureDbar(c.zc[i]))
		ip := s.Initial
		c.T[i] = ip.BottomC + (ip.SurfaceC-ip.BottomC)/(1+math.Exp((c.zc[i]-ip.ThermoclineM)/ip.WidthM))
	}
	c.area0 = c.aif[0]
	c.areaKm = s.AreaKm2
	if c.areaKm <= 0 {
		c.areaKm = 1
		if len(s.Hypsography) > 0 {
			c.areaKm = c.area0 / 1e6
		}
	}
	c.kzCoef = hsCoef * math.Pow(c.areaKm, 0.56)
	c.tf = water.FreezingPoint(s.Salinity, 0)
	c.tsIce = c.tf
	c.convect() // start from a statically stable column
	c.heat0 = c.heatContent()
	return c
}

// areaAt interpolates the hypsography linearly; beyond the last point the last
// area holds. Without hypsography the basin is a box of 1 m².
func areaAt(s SiteSpec, z float64) float64 {
	h := s.Hypsography
	if len(h) == 0 {
		return 1
	}
	if z <= h[0].Depth {
		return h[0].Area
	}
	for i := 1; i < len(h); i++ {
		if z <= h[i].Depth {
			f := (z - h[i-1].Depth) / (h[i].Depth - h[i-1].Depth)
			return h[i-1].Area + f*(h[i].Area-h[i-1].Area)
		}
	}
	return h[len(h)-1].Area
}

// heatContent is the column's enthalpy relative to water at 0 °C, minus the
// latent heat stored in the ice (J). The ice's own sensible heat is neglected
// (no heat capacity: the temperature profile in the ice is quasi-steady).
func (c *column) heatContent() float64 {
	var h float64
	for i, t := range c.T {
		h += rhoCp * t * c.vol[i]
	}
	return h - rhoIce*latentFus*c.ice*c.area0
}

// forcing is what the weather gives one site for one step.
type forcing struct {
	airC, windMS, cloud, swDown, relHum float64
}

// stepResult reports what happened in one step.
type stepResult struct {
	mixedTo int // deepest layer index reached by the surface mixed layer
}

// step advances the column by dt seconds.
func (c *column) step(f forcing, dt float64) stepResult {
	if c.ice > 0 {
		return c.stepIce(f, dt)
	}
	return c.stepOpen(f, dt)
}

// airLongwaveIn is the absorbed downwelling longwave radiation (W/m²):
// clear-sky emissivity of Swinbank (1963) ε = 9.365e-6 Ta² [M], raised by
// cloud as (1 + 0.17 C²) (Wunderlich 1972) [M], 3 % reflected [M].
func airLongwaveIn(airC, cloud float64) float64 {
	ta := airC + 273.15
	eps := math.Min(1, 9.365e-6*ta*ta*(1+0.17*cloud*cloud))
	return 0.97 * eps * sigmaSB * ta * ta * ta * ta
}

// qsat is the saturation specific humidity over water (kg/kg) at 1013.25 hPa;
// vapour pressure by Bolton (1980) e = 6.112 exp(17.67 T/(T+243.5)) hPa [M].
func qsat(tC float64) float64 {
	e := 6.112 * math.Exp(17.67*tC/(tC+243.5))
	return 0.622 * e / (1013.25 - 0.378*e)
}

// transferVelocity is C·U plus the free-convection floor, m/s.
func transferVelocity(windMS float64) float64 {
	return cBulk*windMS + freeConvH/(rhoAir*cpAir)
}

// stepOpen: surface fluxes, shortwave, diffusion, wind mixing, convection, ice formation.
func (c *column) stepOpen(f forcing, dt float64) stepResult {
	ts := c.T[0]
	u := f.windMS * c.wind
	cu := transferVelocity(u)
	tk := ts + 273.15
	nonSolar := airLongwaveIn(f.airC, f.cloud) - emisWater*sigmaSB*tk*tk*tk*tk +
		rhoAir*cpAir*cu*(f.airC-ts) +
		rhoAir*latentVap*cu*(f.relHum*qsat(f.airC)-qsat(ts))
	swNet := f.swDown * (1 - albWater)
	e := nonSolar * c.area0 * dt
	c.T[0] += e / (rhoCp * c.vol[0])
	c.surfaceIn += e
	c.absorbShortwave(swNet, nirFrac, dt)

	c.diffuse(dt, 1)
	mixed := c.windMix(u, dt)
	if top := c.convect(); top > mixed {
		mixed = top
	}
	// Water cooled below the freezing point turns into ice (frazil rising to
	// the surface); the latent heat released warms it back to Tf.
	for i := 0; i < c.n; i++ {
		if c.T[i] >= c.tf {
			continue
		}
		deficit := rhoCp * c.vol[i] * (c.tf - c.T[i])
		c.T[i] = c.tf
		c.ice += deficit / (rhoIce * latentFus * c.area0)
	}
	if c.ice > 0 {
		c.tsIce = c.tf
	}
	c.lastMixedIdx = mixed
	return stepResult{mixedTo: mixed}
}

// stepIce: energy balance of the ice surface, conduction through ice and
// snow, shortwave through the ice, the top water layer held at Tf.
//
// Ice grows at its base by the heat conducted up through ice and snow,
// Q_c = (Tf − Ts)/(h/k_ice + R_snow), less the heat F_w the water gives the
// ice: ρ_ice L dh/dt = Q_c − F_w. This is the incremental form of Stefan's
// law dh/dt = k_ice (Tf − Ts)/(ρ_ice L h) (Stefan 1891) [M], with Ts the
// surface temperature from the surface energy balance instead of the air
// temperature, and a snow resistance in series. When the balance asks for
// Ts > 0 °C the surface stays at 0 °C and the surplus melts the top.
func (c *column) stepIce(f forcing, dt float64) stepResult {
	melt := c.meltState()
	alb := albIceCold + (albIceMelt-albIceCold)*melt
	tr := trIceCold + (trIceMelt-trIceCold)*melt
	swAbs := f.swDown * (1 - alb) * (1 - tr)
	swTrans := f.swDown * (1 - alb) * tr
	lwIn := airLongwaveIn(f.airC, f.cloud)
	hs := rhoAir * cpAir * transferVelocity(f.windMS*c.wind)
	fa := func(ts float64) (float64, float64) {
		tk := ts + 273.15
		v := swAbs + lwIn - emisWater*sigmaSB*tk*tk*tk*tk + hs*(f.airC-ts)
		d := -4*emisWater*sigmaSB*tk*tk*tk - hs
		return v, d
	}
	faV := c.iceSurface(fa)
	c.surfaceIn += faV * c.area0 * dt // the transmitted shortwave is counted by absorbShortwave
	c.absorbShortwave(swTrans, 0, dt)
	c.diffuse(dt, kzIceFactor)
	// Heat from the water to the ice: the top layer is held at Tf.
	fw := rhoCp * c.vol[0] * (c.T[0] - c.tf)
	c.T[0] = c.tf
	c.growIce(faV*c.area0*dt, fw)
	c.tke = 0
	top := c.convect()
	c.lastMixedIdx = top
	return stepResult{mixedTo: top}
}

// meltState is 0 for cold ice and 1 for ice whose surface is melting,
// from the surface temperature of the previous step.
func (c *column) meltState() float64 { return clamp(1+c.tsIce/2, 0, 1) }

// iceResistance is the thermal resistance of ice and snow, m² K/W. Snow
// lies only on ice thick enough to bear it and is gone once the surface melts.
func (c *column) iceResistance() float64 {
	snow := c.snowR * math.Min(1, c.ice/snowFullIceM) * (1 - c.meltState())
	return c.ice/kIce + snow
}

// iceSurface solves the surface temperature of the ice for the atmospheric
// flux fa(Ts) (W/m², positive into the ice, with its derivative), stores it
// and returns fa at that temperature.
func (c *column) iceSurface(fa func(float64) (float64, float64)) float64 {
	ts, v := solveIceSurface(fa, c.tf, c.iceResistance(), math.Min(c.tsIce, 0))
	c.tsIce = ts
	return v
}

// growIce changes the ice thickness for atmospheric energy ea (J, positive
// into the ice surface) and heat fw (J) given by the water to the ice base:
// ρ_ice L A0 Δh = −(ea + fw). With the surface below 0 °C, ea balances the
// conduction Q_c A0 dt, so this is ρ_ice L dh/dt = Q_c − F_w, the
// incremental Stefan law. When the ice is gone, the remaining energy warms
// the top layer.
func (c *column) growIce(ea, fw float64) {
	c.ice -= (ea + fw) / (rhoIce * latentFus * c.area0)
	if c.ice <= 0 {
		left := -c.ice * rhoIce * latentFus * c.area0
		c.ice = 0
		c.T[0] += left / (rhoCp * c.vol[0])
	}
}

// solveIceSurface finds the surface temperature Ts ≤ 0 °C that balances the
// atmospheric flux fa(Ts) with the conduction (tf − Ts)/resist by Newton's
// method; it returns Ts and fa(Ts). A zero resistance gives Ts = tf.
func solveIceSurface(fa func(float64) (float64, float64), tf, resist, guess float64) (float64, float64) {
	if resist <= 0 {
		v, _ := fa(tf)
		return tf, v
	}
	ts := guess
	for range 20 {
		v, d := fa(ts)
		g := v + (tf-ts)/resist
		dg := d - 1/resist
		next := ts - g/dg
		if math.Abs(next-ts) < 1e-9 {
			ts = next
			break
		}
		ts = next
	}
	if ts > 0 || math.IsNaN(ts) {
		ts = 0
	}
	v, _ := fa(ts)
	return ts, v
}

// absorbShortwave distributes net shortwave swNet (W/m² at the surface): a
// fraction top is absorbed in the top layer, the rest decays as
// exp(−k z) (Beer-Lambert). With hypsography the flux through the plane at
// depth z is A(z) I(z); what does not pass a layer's lower face (including
// light that reaches the sloping bottom) is absorbed by that layer, and the
// bottom layer absorbs whatever reaches it, so no energy is lost.
func (c *column) absorbShortwave(swNet, top, dt float64) {
	if swNet <= 0 {
		return
	}
	total := swNet * c.area0 * dt
	c.surfaceIn += total
	above := total // J through the top face of layer i
	for i := 0; i < c.n; i++ {
		var below float64
		if i < c.n-1 {
			below = (1 - top) * swNet * math.Exp(-c.kext*float64(i+1)*c.dz) * c.aif[i+1] * dt
		}
		c.T[i] += (above - below) / (rhoCp * c.vol[i])
		above = below
	}
}

// updateDensity fills c.rho with potential density (surface pressure).
func (c *column) updateDensity() {
	for i, t := range c.T {
		c.rho[i], _ = water.Density(c.sal, t, 0)
	}
}

// diffuse applies eddy diffusion implicitly (backward Euler), flux-conservative
// with interface areas: Σ T V is preserved to rounding.
func (c *column) diffuse(dt, factor float64) {
	n := c.n
	c.updateDensity()
	a, b, cc, d := c.ta, c.tb, c.tc, c.td
	for i := 0; i < n; i++ {
		a[i], cc[i] = 0, 0
	}
	for i := 1; i < n; i++ {
		n2 := gravity / rho0 * (c.rho[i] - c.rho[i-1]) / c.dz
		kz := c.kzCoef * math.Pow(math.Max(n2, hsN2Min), -0.43) * factor
		if kz < kzMol {
			kz = kzMol
		}
		coef := c.aif[i] * kz / c.dz * dt // m³ per K of difference
		// rows i-1 and i
		cc[i-1] = -coef / c.vol[i-1]
		a[i] = -coef / c.vol[i]
	}
	for i := 0; i < n; i++ {
		b[i] = 1 - a[i] - cc[i]
		d[i] = c.T[i]
	}
	// Thomas algorithm.
	for i := 1; i < n; i++ {
		m := a[i] / b[i-1]
		b[i] -= m * cc[i-1]
		d[i] -= m * d[i-1]
	}
	c.T[n-1] = d[n-1] / b[n-1]
	for i := n - 2; i >= 0; i-- {
		c.T[i] = (d[i] - cc[i]*c.T[i+1]) / b[i]
	}
}

// windMix deepens the surface mixed layer while the stored wind energy pays
// for the potential energy of mixing (a bulk energy criterion):
// ΔPE(k) = g Σ_{i≤k} (ρ_i − ρ_mix) z_i V_i for mixing layers 0..k completely,
// with potential densities from water.Density. The wind adds
// C_k ρ0 u*³ A0 dt, u* = sqrt(ρ_air C_D U²/ρ0). Returns the deepest mixed index.
func (c *column) windMix(windMS, dt float64) int {
	ustar := math.Sqrt(rhoAir * cBulk * windMS * windMS / rho0)
	c.tke = c.tke*math.Exp(-dt/tkeDecay) + windCk*rho0*ustar*ustar*ustar*c.area0*dt
	c.updateDensity()
	var sumV, sumTV, sumRZV, sumZV, bestCost float64
	best := 0
	for k := 0; k < c.n; k++ {
		v := c.vol[k]
		sumV += v
		sumTV += c.T[k] * v
		sumRZV += c.rho[k] * c.zc[k] * v
		sumZV += c.zc[k] * v
		if k == 0 {
			continue
		}
		rm, _ := water.Density(c.sal, sumTV/sumV, 0)
		cost := gravity * (sumRZV - rm*sumZV)
		if cost > c.tke {
			break
		}
		best, bestCost = k, cost
	}
	if best > 0 {
		var sv, stv float64
		for i := 0; i <= best; i++ {
			sv += c.vol[i]
			stv += c.T[i] * c.vol[i]
		}
		tm := stv / sv
		for i := 0; i <= best; i++ {
			c.T[i] = tm
		}
		c.tke -= math.Max(bestCost, 0)
	}
	return best
}

// unstable reports whether water at tu above water at tl is statically
// unstable at the interface pressure p (dbar) with Tmd tmd there: the upper
// water is denser by the equation of state. Far from Tmd the sign of the
// temperature difference decides (density is monotonic there).
func (c *column) unstable(tu, tl, p, tmd float64) bool {
	if tu == tl {
		return false
	}
	switch {
	case tu > tmd+0.5 && tl > tmd+0.5:
		return tu < tl
	case tu < tmd-0.5 && tl < tmd-0.5:
		return tu > tl
	}
	ru, _ := water.Density(c.sal, tu, p)
	rl, _ := water.Density(c.sal, tl, p)
	return ru > rl
}

// convect removes every static instability by mixing adjacent layers
// (volume-weighted, so heat is conserved), comparing neighbours at their
// common interface pressure. It returns the deepest index of the top group.
func (c *column) convect() int {
	ng := 0
	gs, ge, gT, gV := c.gs, c.ge, c.gT, c.gV
	for j := 0; j < c.n; j++ {
		gs[ng], ge[ng], gT[ng], gV[ng] = j, j, c.T[j], c.vol[j]
		ng++
		for ng > 1 {
			up, lo := ng-2, ng-1
			i := gs[lo]
			if !c.unstable(gT[up], gT[lo], c.pIf[i], c.tmdIf[i]) {
				break
			}
			v := gV[up] + gV[lo]
			gT[up] = (gT[up]*gV[up] + gT[lo]*gV[lo]) / v
			gV[up] = v
			ge[up] = ge[lo]
			ng--
		}
	}
	for g := 0; g < ng; g++ {
		if ge[g] > gs[g] {
			for i := gs[g]; i <= ge[g]; i++ {
				c.T[i] = gT[g]
			}
		}
	}
	return ge[0]
}

// sample interpolates the water temperature at depth z (m) between layer
// centres; a depth inside the ice reads the linear ice temperature profile
// between the surface and Tf at the base (ice draft ≈ 0.92 h floats in water).
func (c *column) sample(z float64) float64 {
	if c.ice > 0 && z < 0.917*c.ice {
		f := z / (0.917 * c.ice)
		return c.tsIce + f*(c.tf-c.tsIce)
	}
	if z <= c.zc[0] {
		return c.T[0]
	}
	if z >= c.zc[c.n-1] {
		return c.T[c.n-1]
	}
	i := int(z/c.dz - 0.5)
	if i >= c.n-1 {
		i = c.n - 2
	}
	f := (z - c.zc[i]) / c.dz
	return c.T[i] + f*(c.T[i+1]-c.T[i])
}
