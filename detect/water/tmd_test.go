package water

import (
	"math"
	"testing"
)

// Source: UNESCO 44 (Fofonoff & Millard 1983), pp. 29-30 [V]: Tf(40, 500 dbar) = −2.588567 °C.
func TestFreezingPoint_UNESCO44CheckValue(t *testing.T) {
	near(t, "FreezingPoint(40, 500)", FreezingPoint(40, 500), -2.588567, 1e-6)
}

// Source: UNESCO 44 table [V]: S = 35, p = 0: −1.922 °C.
func TestFreezingPoint_UNESCO44Table(t *testing.T) {
	near(t, "FreezingPoint(35, 0)", FreezingPoint(35, 0), -1.922, 5e-4)
}

// Fresh water at the surface freezes at 0 °C (common practice); at depth the
// formula's pressure term gives −7.53e-4 °C per dbar (UNESCO 44) [C].
func TestFreezingPoint_FreshWater(t *testing.T) {
	if got := FreezingPoint(0, 0); got != 0 {
		t.Errorf("FreezingPoint(0, 0) = %g, want 0", got)
	}
	near(t, "FreezingPoint(0, 100)", FreezingPoint(0, 100), -0.0753, 1e-12)
}

// Chen & Millero 1986 worked values [C] (SCIENCE.md §3).
func TestTmd_ChenMillero1986(t *testing.T) {
	for _, c := range []struct{ s, pDbar, want float64 }{
		{0, 0, 3.9839},    // 0 bar
		{0, 100, 3.7842},  // 10 bar (~100 m)
		{0, 1000, 1.9346}, // 100 bar
		{0.5, 0, 3.8730},
	} {
		near(t, "Tmd", Tmd(c.s, c.pDbar), c.want, 1e-4)
	}
}

// Independent check [C] (SCIENCE.md §3): argmax of EOS-80 density at S = 0 is
// 3.9817 °C at 0 dbar and 3.7812 °C at 100 dbar. Those figures are on the
// IPTS-68 scale of the EOS-80 coefficients; TmdEOS80 returns ITS-90 (in-situ
// thermistor scale), so it is converted with T68 = 1.00024·T90 to compare.
func TestTmdEOS80_ArgmaxCheckValues(t *testing.T) {
	near(t, "TmdEOS80(0, 0) on IPTS-68", ITS90ToIPTS68*TmdEOS80(0, 0), 3.9817, 1e-4)
	near(t, "TmdEOS80(0, 100) on IPTS-68", ITS90ToIPTS68*TmdEOS80(0, 100), 3.7812, 1e-4)
	// It is a maximum of DensityEOS80.
	tm := TmdEOS80(0.2, 30)
	for _, dt := range []float64{-0.05, 0.05} {
		if DensityEOS80(0.2, tm+dt, 30) >= DensityEOS80(0.2, tm, 30) {
			t.Errorf("EOS-80 density at TmdEOS80%+g is not below the maximum", dt)
		}
	}
	// Seawater of 35 has no density maximum above its freezing point.
	if got := TmdEOS80(35, 0); !math.IsNaN(got) {
		t.Errorf("TmdEOS80(35, 0) = %g, want NaN", got)
	}
}

// Rule of thumb [C] (SCIENCE.md §3): Tmd falls about 0.2 °C per 100 m.
func TestTmd_FallsWithDepth(t *testing.T) {
	drop := Tmd(0, PressureDbar(0)) - Tmd(0, PressureDbar(100))
	if drop < 0.18 || drop > 0.22 {
		t.Errorf("Tmd drop over 100 m = %.3f °C, want about 0.2", drop)
	}
}

func TestPressureDbar(t *testing.T) {
	if PressureDbar(0) != 0 || PressureDbar(-1) != 0 || PressureDbar(37.5) != 37.5 {
		t.Errorf("PressureDbar is not 1 dbar per metre, gauge")
	}
}
