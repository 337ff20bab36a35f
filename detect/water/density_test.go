package water

import (
	"math"
	"testing"
)

func near(t *testing.T, what string, got, want, tol float64) {
	t.Helper()
	if !(math.Abs(got-want) <= tol) {
		t.Errorf("%s = %.9g, want %.9g ± %g (off by %.3g)", what, got, want, tol, got-want)
	}
}

// Source: Tanaka et al. 2001 table as cited in public unit tests [V] (SCIENCE.md §1).
func TestDensityCIPM_Tanaka2001Table(t *testing.T) {
	for _, c := range []struct{ t, rho float64 }{
		{0, 999.8428}, {4, 999.9749}, {10, 999.7027}, {20, 998.2067}, {25, 997.0470},
	} {
		near(t, "DensityCIPM", DensityCIPM(c.t), c.rho, 1e-4)
	}
}

// Source: Tanaka et al. 2001 coefficients [V]: maximum a5 = 999.974950 kg/m³ at 3.983035 °C.
func TestDensityCIPM_Tanaka2001Maximum(t *testing.T) {
	near(t, "DensityCIPM(3.983035)", DensityCIPM(3.983035), 999.974950, 1e-9)
	for _, dt := range []float64{-0.5, -0.01, 0.01, 0.5} {
		if DensityCIPM(3.983035+dt) >= DensityCIPM(3.983035) {
			t.Errorf("CIPM density at 3.983035%+g °C is not below the maximum", dt)
		}
	}
}

// Source: UNESCO 44 check values as used in public seawater test suites [V]
// (SCIENCE.md §2), IPTS-68 scale; the K of the last row is [C].
func TestEOS80_UNESCO44CheckValues(t *testing.T) {
	for _, c := range []struct{ s, t68, pDbar, rho, k float64 }{
		{0, 5, 0, 999.96675, 20337.80375},
		{0, 5, 10000, 1044.12802, 23643.52599},
		{0, 25, 0, 997.04796, 22100.72106},
		{35, 5, 0, 1027.67547, 22185.93358},
		{35, 25, 10000, 1062.53817, 27108.94504},
	} {
		near(t, "DensityEOS80T68", DensityEOS80T68(c.s, c.t68, c.pDbar), c.rho, 1e-5)
		near(t, "SecantBulkModulus", SecantBulkModulus(c.s, c.t68, c.pDbar/10), c.k, 1e-5)
	}
}

// DensityEOS80 takes ITS-90 and converts with T68 = 1.00024·T90 (SCIENCE.md §2).
func TestEOS80_ITS90Conversion(t *testing.T) {
	near(t, "DensityEOS80(35, 5/1.00024, 0)", DensityEOS80(35, 5/1.00024, 0), 1027.67547, 1e-5)
	near(t, "DensityEOS80(0, 25/1.00024, 0)", DensityEOS80(0, 25/1.00024, 0), 997.04796, 1e-5)
}

func TestDensity_FormulaChoice(t *testing.T) {
	rho, f := Density(0, 10, 0)
	if f != FormulaCIPM || rho != DensityCIPM(10) {
		t.Errorf("Density(0,10,0) = %g %s, want CIPM %g", rho, f, DensityCIPM(10))
	}
	rho, f = Density(0.3, 10, 0)
	if f != FormulaEOS80 || rho != DensityEOS80(0.3, 10, 0) {
		t.Errorf("Density(0.3,10,0) = %g %s, want EOS-80", rho, f)
	}
	rho, f = Density(0, 10, 50)
	if f != FormulaEOS80 || rho != DensityEOS80(0, 10, 50) {
		t.Errorf("Density(0,10,50) = %g %s, want EOS-80", rho, f)
	}
	// The two formulas agree closely for fresh water at the surface [C]: the
	// switch between them is no step a detector could notice.
	for tc := 0.0; tc <= 40; tc += 0.5 {
		near(t, "EOS-80 − CIPM at the surface", DensityEOS80(0, tc, 0), DensityCIPM(tc), 2.5e-3)
	}
}

// Common practice, no source: fresh water is densest near 4 °C.
func TestFact_DensestNear4C(t *testing.T) {
	best, bestT := 0.0, 0.0
	for tc := 0.0; tc <= 30; tc += 0.01 {
		if r := DensityCIPM(tc); r > best {
			best, bestT = r, tc
		}
	}
	if bestT < 3.9 || bestT > 4.1 {
		t.Errorf("CIPM density peaks at %.2f °C, want near 4 °C", bestT)
	}
}

// Common practice, no source: ice (~917 kg/m³) floats on water (~1000 kg/m³);
// water expands by about 9 % when it freezes.
func TestFact_IceFloats(t *testing.T) {
	water := DensityCIPM(0)
	if IceDensity >= water {
		t.Fatalf("IceDensity %g is not below water at 0 °C %g", IceDensity, water)
	}
	expansion := water/IceDensity - 1
	if expansion < 0.08 || expansion > 0.10 {
		t.Errorf("volume expansion on freezing %.3f, want about 0.09", expansion)
	}
}
