package water

import "math"

// PressureMethod describes how PressureDbar turns depth into pressure; Compute
// copies it into Metrics.PressureMethod.
const PressureMethod = "gauge pressure, 1 dbar per metre of depth (fresh-water hydrostatic approximation, about 2 % high)"

// PressureDbar is the gauge pressure at depthM metres below the surface, dbar,
// by the hydrostatic approximation of 1 dbar per metre of fresh water: the
// atmosphere is not included (gauge, not absolute, pressure). The exact figure
// for fresh water is rho·g·h = 999.97 · 9.80665 Pa per metre = 0.981 dbar/m [C],
// so this is about 2 % high; at 100 m that moves Tmd by under 0.005 °C [C].
// Negative depths give 0.
func PressureDbar(depthM float64) float64 {
	if depthM <= 0 {
		return 0
	}
	return depthM
}

// Tmd is the temperature of maximum density, °C, of water of salinity s (g/kg)
// at gauge pressure pDbar (dbar), by Chen & Millero 1986 (Limnol. Oceanogr.
// 31:657-662): Tmd = 3.9839 − 1.9911e-2·P − 5.822e-6·P² − (0.2219 + 1.106e-4·P)·S
// with P in bar (pDbar/10) inside. For fresh water it is 3.9839 °C at the surface
// and falls about 0.2 °C per 100 m [C]. The coefficients are as cited in public
// code and not checked against the paper's page [V-weak]. The result is an
// in-situ temperature, comparable with thermistor readings.
func Tmd(s, pDbar float64) float64 {
	p := pDbar / 10
	return 3.9839 - 1.9911e-2*p - 5.822e-6*p*p - (0.2219+1.106e-4*p)*s
}

// TmdEOS80 is the in-situ temperature (°C, ITS-90) at which the UNESCO EOS-80
// in-situ density at salinity s and gauge pressure pDbar (dbar) is greatest,
// found numerically (bisection on the sign of the centred slope of DensityEOS80
// over −2-15 °C, the low end of EOS-80's range; resolution better than 1e-6 °C).
// It is an independent cross-check of Tmd (Chen & Millero 1986): at s = 0 it
// gives 3.9807 °C at 0 dbar and 3.7803 °C at 100 dbar on ITS-90, which are
// 3.9817 and 3.7812 °C on IPTS-68 [C]. NaN when the density has no maximum in
// that range (saline water whose density keeps rising down to its freezing point).
func TmdEOS80(s, pDbar float64) float64 {
	const h = 1e-3 // °C, half-width of the centred difference
	slope := func(t float64) float64 {
		return DensityEOS80(s, t+h, pDbar) - DensityEOS80(s, t-h, pDbar)
	}
	lo, hi := minTempC, 15.0
	if !(slope(lo) > 0 && slope(hi) < 0) {
		return math.NaN()
	}
	for i := 0; i < 80 && hi-lo > 1e-9; i++ {
		mid := 0.5 * (lo + hi)
		if slope(mid) > 0 {
			lo = mid
		} else {
			hi = mid
		}
	}
	return 0.5 * (lo + hi)
}

// FreezingPoint is the freezing point of water, °C, at practical salinity s and
// gauge pressure pDbar (dbar), by the UNESCO 1983 formula (Fofonoff & Millard
// 1983, UNESCO Tech. Pap. Mar. Sci. 44, pp. 29-30):
// Tf = −0.0575·S + 1.710523e-3·S^1.5 − 2.154996e-4·S² − 7.53e-4·p.
// It gives exactly 0 °C for fresh water at the surface; for fresh water at depth
// the pressure term alone gives −7.53e-4 °C per dbar (−0.075 °C at 100 m), an
// extrapolation of a seawater fit that is close to the pure-water melting curve
// at lake pressures [M].
func FreezingPoint(s, pDbar float64) float64 {
	return -0.0575*s + 1.710523e-3*s*math.Sqrt(s) - 2.154996e-4*s*s - 7.53e-4*pDbar
}
