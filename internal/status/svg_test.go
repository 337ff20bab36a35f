package status

import (
	"math"
	"testing"
	"time"

	"holomix/detect"
)

// Greyscale and colour-vision safety: relative luminance (WCAG 2.x, sRGB
// transfer of IEC 61966-2-1) must rise strictly along the colour scale, so
// order survives greyscale printing; the ends must differ widely.
func TestViridis_LuminanceMonotonic(t *testing.T) {
	prev := -1.0
	for i := 0; i <= 200; i++ {
		r, g, b := colourAt(float64(i) / 200)
		l := relLuminance(r, g, b)
		if l <= prev {
			t.Fatalf("luminance falls at %d/200: %.4f after %.4f", i, l, prev)
		}
		prev = l
	}
	r0, g0, b0 := colourAt(0)
	r1, g1, b1 := colourAt(1)
	// WCAG contrast ratio (L1+0.05)/(L2+0.05) between the ends.
	if c := (relLuminance(r1, g1, b1) + 0.05) / (relLuminance(r0, g0, b0) + 0.05); c < 7 {
		t.Errorf("contrast between scale ends %.1f:1, want ≥ 7:1", c)
	}
	if colourHex(-1) != "#440154" || colourHex(2) != "#fde725" || colourHex(math.NaN()) != "#440154" {
		t.Error("clamping")
	}
}

func TestNiceRangeAndTicks(t *testing.T) {
	lo, hi, step := niceRange(3.2, 19.7, 1, 6)
	if lo != 0 || hi != 20 || step != 5 {
		t.Errorf("niceRange(3.2, 19.7) = %v %v %v", lo, hi, step)
	}
	lo, hi, step = niceRange(999.883, 999.906, 0.1, 4)
	if hi-lo < 0.1-1e-9 || step != 0.05 || decimals(step) != 2 {
		t.Errorf("density range %v %v %v", lo, hi, step)
	}
	if got := ticksOf(0, 1, 0.2); len(got) != 6 || got[5] != 1 {
		t.Errorf("ticks %v", got)
	}
	if tickLabel(-2, 1) != "−2" || tickLabel(-0.0001, 0.1) != "0.0" {
		t.Errorf("labels %q %q", tickLabel(-2, 1), tickLabel(-0.0001, 0.1))
	}
}

func TestHeatGrid_InterpolatesAndMarksGaps(t *testing.T) {
	hist := []histPoint{
		{t: t0, depths: []float64{1, 3}, temps: []float64{10, 6}},
		{t: t0.Add(time.Hour), depths: []float64{1, 3}, temps: []float64{10, 6}},
		// a four-hour gap
		{t: t0.Add(5 * time.Hour), depths: []float64{1, 3}, temps: []float64{12, 8}},
	}
	g := buildHeatGrid(hist, t0, t0.Add(5*time.Hour), 4, 10, 4) // rows at 0.5, 1.5, 2.5, 3.5 m
	at := func(r, c int) float64 { return g.vals[r*g.cols+c] }
	if v := at(1, 1); math.Abs(v-9) > 1e-9 {
		t.Errorf("1.5 m: %v, want 9 (linear between 10 at 1 m and 6 at 3 m)", v)
	}
	if !math.IsNaN(at(0, 1)) || !math.IsNaN(at(3, 1)) {
		t.Error("rows outside the sensor range are not marked as no data")
	}
	if !math.IsNaN(at(1, 6)) {
		t.Error("gap not marked")
	}
	if v := at(2, 9); math.Abs(v-9) > 1e-9 {
		t.Errorf("last column 2.5 m: %v, want 9", v)
	}
	if g.lo != 7 || g.hi != 11 {
		t.Errorf("range %v-%v", g.lo, g.hi)
	}
	if _, err := g.png(6, 12); err != nil {
		t.Fatal(err)
	}
}

func TestProjectionText(t *testing.T) {
	for _, c := range []struct {
		p    detect.Projection
		want string
	}{
		{detect.Projection{Name: "days_to_tmd", LowDays: 4.2, HighDays: 6.8}, "column reaches Tmd in 4–7 days"},
		{detect.Projection{Name: "days_to_surface_freezing", LowDays: 0.1, HighDays: 0.6}, "surface reaches the freezing point within a day"},
		{detect.Projection{Name: "days_to_tmd", LowDays: 30, HighDays: math.Inf(1)}, "column reaches Tmd in more than 30 days"},
		{detect.Projection{Name: "x_y", LowDays: 2.2, HighDays: 2.9}, "x y in about 3 days"},
	} {
		if got := projectionText(c.p); got != c.want && !(c.p.Name == "x_y" && got == "x y in 2–3 days") {
			t.Errorf("%+v: %q, want %q", c.p, got, c.want)
		}
	}
}
