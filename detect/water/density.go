package water

import "math"

// Coefficients of the CIPM 2001 density of air-free water at 101 325 Pa
// (Tanaka et al. 2001, Metrologia 38:301-309).
const (
	cipmA1 = -3.983035  // °C
	cipmA2 = 301.797    // °C
	cipmA3 = 522528.9   // °C²
	cipmA4 = 69.34881   // °C
	cipmA5 = 999.974950 // kg/m³, the maximum density
)

// IceDensity is the density of pure ice near 0 °C at atmospheric pressure,
// kg/m³ [M: from memory, about 916.7-917]. Water expands by about 9 % when it
// freezes, so ice floats (common practice, no source).
const IceDensity = 916.7

// ITS90ToIPTS68 is the factor of the linear conversion T68 = 1.00024·T90 used by
// EOS-80 implementations (Saunders 1990, as given in SCIENCE.md §2).
const ITS90ToIPTS68 = 1.00024

// DensityCIPM is the density of air-free pure water at 101 325 Pa, kg/m³, for a
// temperature tC in °C on ITS-90, valid 0-40 °C (Tanaka et al. 2001, Metrologia
// 38:301-309, the CIPM 2001 formula). Its maximum is 999.974950 kg/m³ at
// 3.983035 °C. Slightly supercooled water (down to about −2 °C) is extrapolated
// smoothly by the same formula.
func DensityCIPM(tC float64) float64 {
	d := tC + cipmA1
	return cipmA5 * (1 - d*d*(tC+cipmA2)/(cipmA3*(tC+cipmA4)))
}

// eos80Surface is the one-atmosphere EOS-80 density rho(S, t68, 0), kg/m³, with
// s15 = s^1.5 precomputed (Fofonoff & Millard 1983, UNESCO Tech. Pap. Mar. Sci. 44).
func eos80Surface(s, s15, t float64) float64 {
	rhoW := 999.842594 + t*(6.793952e-2+t*(-9.095290e-3+t*(1.001685e-4+t*(-1.120083e-6+t*6.536332e-9))))
	b := 8.24493e-1 + t*(-4.0899e-3+t*(7.6438e-5+t*(-8.2467e-7+t*5.3875e-9)))
	c := -5.72466e-3 + t*(1.0227e-4+t*-1.6546e-6)
	return rhoW + b*s + c*s15 + 4.8314e-4*s*s
}

// secantBulk is K(S, t68, p) in bar with s15 = s^1.5 precomputed and p in bar.
func secantBulk(s, s15, t, p float64) float64 {
	kw := 19652.21 + t*(148.4206+t*(-2.327105+t*(1.360477e-2+t*-5.155288e-5)))
	k0 := kw + s*(54.6746+t*(-0.603459+t*(1.09987e-2+t*-6.1670e-5))) +
		s15*(7.944e-2+t*(1.6483e-2+t*-5.3009e-4))
	aw := 3.239908 + t*(1.43713e-3+t*(1.16092e-4+t*-5.77905e-7))
	a := aw + s*(2.2838e-3+t*(-1.0981e-5+t*-1.6078e-6)) + 1.91075e-4*s15
	bw := 8.50935e-5 + t*(-6.12293e-6+t*5.2787e-8)
	b := bw + s*(-9.9348e-7+t*(2.0816e-8+t*9.1697e-10))
	return k0 + p*(a+p*b)
}

// SecantBulkModulus is the secant bulk modulus K(S, t, p) of UNESCO EOS-80, bar,
// for practical salinity s, temperature t68 in °C on the IPTS-68 scale and gauge
// (sea) pressure pBar in bar (Fofonoff & Millard 1983, UNESCO Tech. Pap. Mar.
// Sci. 44; the pure-water coefficient of t³ is 1.360477e-2).
func SecantBulkModulus(s, t68, pBar float64) float64 {
	return secantBulk(s, s*math.Sqrt(s), t68, pBar)
}

// DensityEOS80T68 is the in-situ density of UNESCO EOS-80, kg/m³, for practical
// salinity s (0-42), temperature t68 in °C on the IPTS-68 scale (−2-40 °C) and
// gauge pressure pDbar in dbar (0-10000): rho = rho(S,t,0)/(1 − p/K(S,t,p)) with
// p in bar inside (Fofonoff & Millard 1983, UNESCO Tech. Pap. Mar. Sci. 44).
// The published check values are on this scale.
func DensityEOS80T68(s, t68, pDbar float64) float64 {
	s15 := s * math.Sqrt(s)
	rho0 := eos80Surface(s, s15, t68)
	if pDbar == 0 {
		return rho0
	}
	p := pDbar / 10
	return rho0 / (1 - p/secantBulk(s, s15, t68, p))
}

// DensityEOS80 is the in-situ density of UNESCO EOS-80, kg/m³, for practical
// salinity s (0-42), in-situ temperature tC in °C on ITS-90 and gauge pressure
// pDbar in dbar (0-10000). The temperature is converted to IPTS-68 inside with
// T68 = 1.00024·T90 and the pressure to bar (Fofonoff & Millard 1983, UNESCO
// Tech. Pap. Mar. Sci. 44).
func DensityEOS80(s, tC, pDbar float64) float64 {
	return DensityEOS80T68(s, ITS90ToIPTS68*tC, pDbar)
}

// Density is the one entry point for the density of lake water, kg/m³, at
// salinity s (g/kg, taken as practical salinity by EOS-80), in-situ temperature
// tC (°C, ITS-90) and gauge pressure pDbar (dbar). Fresh water at the surface
// (s == 0 and pDbar == 0) uses CIPM 2001 (Tanaka et al. 2001); any salinity or
// pressure uses UNESCO EOS-80 (Fofonoff & Millard 1983). The two agree within
// 0.0016 kg/m³ for fresh water at the surface, 0-40 °C [C]. The formula used is returned.
func Density(s, tC, pDbar float64) (float64, Formula) {
	if s == 0 && pDbar == 0 {
		return DensityCIPM(tC), FormulaCIPM
	}
	return DensityEOS80(s, tC, pDbar), FormulaEOS80
}

// potentialDensity is the density at surface pressure, kg/m³, with the same
// formula choice as Density(s, tC, 0); s15 = s^1.5 precomputed.
func potentialDensity(s, s15, tC float64) float64 {
	if s == 0 {
		return DensityCIPM(tC)
	}
	return eos80Surface(s, s15, ITS90ToIPTS68*tC)
}
