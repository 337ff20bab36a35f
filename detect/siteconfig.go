package detect

import (
	"errors"
	"fmt"
	"math"
	"sort"
	"time"

	"holomix/config"
	"holomix/detect/water"
)

// IntakeConfig is one water intake at a fixed depth.
type IntakeConfig struct {
	Name         string
	Depth        float64          // m below the surface
	MaxRateCPerH float64          // intake_change threshold, °C/h (default 1)
	DD           *DegreeDayConfig // accumulated thermal units at this intake (nil: none)
}

// DegreeDayConfig configures accumulated thermal units (°C·day above BaseC,
// from the daily mean temperature at the intake, days in the site's Location).
type DegreeDayConfig struct {
	Start      time.Time // first day counted (its local midnight)
	BaseC      float64   // base temperature, °C (hatchery ATU practice: 0)
	Thresholds []float64 // °C·day values that raise a degree_days event, ascending
}

// SiteConfig is everything a Site needs. Zero values are replaced by the
// defaults of DefaultSiteConfig when a Site is built.
type SiteConfig struct {
	ID, Name string
	MaxDepth float64 // m; 0 = deepest sensor
	Salinity float64 // g/kg; 0 = fresh water
	// Hypsography is the depth-area curve; empty means a box basin.
	Hypsography water.Hypsography
	// Expected are the configured sensor depths, m (may be empty: then the
	// profile's Expected list, and failing that every depth ever seen, is used).
	Expected []float64
	Intakes  []IntakeConfig

	Thresholds water.Thresholds
	// Hysteresis is the fraction by which a threshold is relaxed before a
	// seasonal state is left again (default 0.5): leaving `stratified` needs
	// the density difference below StratDensityDiff×(1−Hysteresis).
	Hysteresis float64

	Hold             time.Duration // a seasonal state counts after holding this long (6 h)
	IceHold          time.Duration // ice on/off and lasting inverse stratification (24 h)
	SensorFaultAfter time.Duration // an expected depth silent this long is a fault (6 h)
	ProjectionWindow time.Duration // trend window of the projections (5 days, 3-7)
	FrazilMaxC       float64       // near-surface temperature at or below which frazil can form (0.1 °C)
	FrazilAirC       float64       // air temperature at or below which frazil risk is critical (−6 °C)
	Location         *time.Location

	// MaxGap is the longest silence (time between accepted profiles) the
	// detectors bridge (default 7 days). After a longer one nothing followed
	// before it is carried on: the seasonal state and the ice state become
	// unknown, holds, hourly windows and trends restart, and an ice cover
	// inferred before it is closed with a resolved ice_on event whose
	// Details["reason"] is "data gap" (never an ice_off). See Site.Process.
	MaxGap time.Duration
	// MinStratified is how long a stratified stretch must last to count as
	// seasonal stratification (default 7 days). Only a seasonal stretch
	// raises stratification_onset (when it has lasted this long, with the
	// onset at its start) and, when it ends, an overturn (with the intake
	// risks). A shorter stretch is transient: the seasonal state follows it
	// (Column.Seasonal) but no event pair is raised. See stepSeason.
	MinStratified time.Duration
}

// Defaults (SCIENCE.md §5 and §6).
const (
	DefaultHysteresis       = 0.5
	DefaultHold             = 6 * time.Hour
	DefaultIceHold          = 24 * time.Hour
	DefaultSensorFaultAfter = 6 * time.Hour
	DefaultProjectionWindow = 5 * 24 * time.Hour
	DefaultFrazilMaxC       = 0.1  // °C [V-weak, SCIENCE.md §6]
	DefaultFrazilAirC       = -6.0 // °C, rule of thumb [V-weak, SCIENCE.md §6]
	DefaultMaxRateCPerH     = 1.0  // °C/h at an intake
	DefaultMaxGap           = 7 * 24 * time.Hour
	DefaultMinStratified    = 7 * 24 * time.Hour
	minMaxGap               = 2 * time.Hour
	minProjectionWindow     = 3 * 24 * time.Hour
	maxProjectionWindow     = 7 * 24 * time.Hour
)

// DefaultSiteConfig returns the defaults of SCIENCE.md §5: hold 6 h, ice hold
// 24 h, sensor fault after 6 h, projection window 5 days, frazil at or below
// 0.1 °C (critical with air at or below −6 °C), hysteresis 0.5, UTC days;
// and the design choices of this package: data gaps longer than 7 days end
// the seasonal state, seasonal stratification lasts at least 7 days.
func DefaultSiteConfig(id string) SiteConfig {
	return SiteConfig{
		ID:               id,
		Name:             id,
		Thresholds:       water.DefaultThresholds(),
		Hysteresis:       DefaultHysteresis,
		Hold:             DefaultHold,
		IceHold:          DefaultIceHold,
		SensorFaultAfter: DefaultSensorFaultAfter,
		ProjectionWindow: DefaultProjectionWindow,
		FrazilMaxC:       DefaultFrazilMaxC,
		FrazilAirC:       DefaultFrazilAirC,
		Location:         time.UTC,
		MaxGap:           DefaultMaxGap,
		MinStratified:    DefaultMinStratified,
	}
}

// withDefaults replaces zero values by the defaults and sorts the lists.
func (c SiteConfig) withDefaults() SiteConfig {
	d := DefaultSiteConfig(c.ID)
	if c.Name == "" {
		c.Name = c.ID
	}
	th, dt := &c.Thresholds, d.Thresholds
	if th.StratDensityDiff == 0 {
		th.StratDensityDiff = dt.StratDensityDiff
	}
	if th.TmdDelta == 0 {
		th.TmdDelta = dt.TmdDelta
	}
	if th.InverseDeltaT == 0 {
		th.InverseDeltaT = dt.InverseDeltaT
	}
	if th.ThermoclineMinGrad == 0 {
		th.ThermoclineMinGrad = dt.ThermoclineMinGrad
	}
	if th.MinSurfaceDepth == 0 {
		th.MinSurfaceDepth = dt.MinSurfaceDepth
	}
	if th.MinSensors == 0 {
		th.MinSensors = dt.MinSensors
	}
	if th.MinCoverage == 0 {
		th.MinCoverage = dt.MinCoverage
	}
	if c.Hysteresis == 0 {
		c.Hysteresis = d.Hysteresis
	}
	if c.Hold == 0 {
		c.Hold = d.Hold
	}
	if c.IceHold == 0 {
		c.IceHold = d.IceHold
	}
	if c.SensorFaultAfter == 0 {
		c.SensorFaultAfter = d.SensorFaultAfter
	}
	if c.ProjectionWindow == 0 {
		c.ProjectionWindow = d.ProjectionWindow
	}
	if c.FrazilMaxC == 0 {
		c.FrazilMaxC = d.FrazilMaxC
	}
	if c.FrazilAirC == 0 {
		c.FrazilAirC = d.FrazilAirC
	}
	if c.Location == nil {
		c.Location = time.UTC
	}
	if c.MaxGap == 0 {
		c.MaxGap = d.MaxGap
	}
	if c.MinStratified == 0 {
		c.MinStratified = d.MinStratified
	}
	c.Expected = append([]float64(nil), c.Expected...)
	sort.Float64s(c.Expected)
	in := make([]IntakeConfig, len(c.Intakes))
	for i, k := range c.Intakes {
		if k.MaxRateCPerH == 0 {
			k.MaxRateCPerH = DefaultMaxRateCPerH
		}
		if k.DD != nil {
			dd := *k.DD
			dd.Thresholds = append([]float64(nil), dd.Thresholds...)
			sort.Float64s(dd.Thresholds)
			k.DD = &dd
		}
		in[i] = k
	}
	c.Intakes = in
	return c
}

// Validate reports every problem of c (after defaults) at once.
func (c SiteConfig) Validate() error {
	c = c.withDefaults()
	var errs []error
	bad := func(format string, a ...any) { errs = append(errs, fmt.Errorf(format, a...)) }
	if c.ID == "" {
		bad("site id is empty")
	}
	if !finiteNonNeg(c.MaxDepth) {
		bad("site %q: max depth %g m must be finite and ≥ 0", c.ID, c.MaxDepth)
	}
	if !finiteNonNeg(c.Salinity) || c.Salinity > 42 {
		bad("site %q: salinity %g g/kg outside 0-42", c.ID, c.Salinity)
	}
	if len(c.Hypsography.Depths) != len(c.Hypsography.Areas) {
		bad("site %q: hypsography has %d depths but %d areas", c.ID, len(c.Hypsography.Depths), len(c.Hypsography.Areas))
	}
	for _, z := range c.Expected {
		if !finiteNonNeg(z) || (c.MaxDepth > 0 && z > c.MaxDepth) {
			bad("site %q: sensor depth %g m outside 0-%g m", c.ID, z, c.MaxDepth)
		}
	}
	if c.Hysteresis < 0 || c.Hysteresis >= 1 {
		bad("site %q: hysteresis %g must be in [0, 1)", c.ID, c.Hysteresis)
	}
	for _, d := range []struct {
		name string
		d    time.Duration
	}{{"hold", c.Hold}, {"ice hold", c.IceHold}, {"sensor fault time", c.SensorFaultAfter}, {"minimum stratified time", c.MinStratified}} {
		if d.d < 0 {
			bad("site %q: %s %v must be positive", c.ID, d.name, d.d)
		}
	}
	if c.MaxGap < minMaxGap {
		bad("site %q: longest bridged data gap %v must be at least %v", c.ID, c.MaxGap, minMaxGap)
	}
	if c.ProjectionWindow < minProjectionWindow || c.ProjectionWindow > maxProjectionWindow {
		bad("site %q: projection window %v outside 3-7 days", c.ID, c.ProjectionWindow)
	}
	if math.IsNaN(c.FrazilMaxC) || math.IsNaN(c.FrazilAirC) {
		bad("site %q: frazil temperatures must be numbers", c.ID)
	}
	seen := map[string]bool{}
	for i, k := range c.Intakes {
		switch {
		case k.Name == "":
			bad("site %q: intake %d has no name", c.ID, i)
		case seen[k.Name]:
			bad("site %q: intake name %q used twice", c.ID, k.Name)
		}
		seen[k.Name] = true
		if !finiteNonNeg(k.Depth) || (c.MaxDepth > 0 && k.Depth > c.MaxDepth) {
			bad("site %q: intake %q depth %g m outside 0-%g m", c.ID, k.Name, k.Depth, c.MaxDepth)
		}
		if !(k.MaxRateCPerH > 0) || math.IsInf(k.MaxRateCPerH, 0) {
			bad("site %q: intake %q max rate %g °C/h must be > 0", c.ID, k.Name, k.MaxRateCPerH)
		}
		if k.DD != nil {
			if k.DD.Start.IsZero() {
				bad("site %q: intake %q degree days need a start date", c.ID, k.Name)
			}
			if math.IsNaN(k.DD.BaseC) || math.IsInf(k.DD.BaseC, 0) {
				bad("site %q: intake %q degree-day base %g °C must be finite", c.ID, k.Name, k.DD.BaseC)
			}
			for _, v := range k.DD.Thresholds {
				if !(v > 0) || math.IsInf(v, 0) {
					bad("site %q: intake %q degree-day threshold %g must be > 0", c.ID, k.Name, v)
				}
			}
		}
	}
	return errors.Join(errs...)
}

func finiteNonNeg(x float64) bool { return x >= 0 && !math.IsInf(x, 0) }

// SiteConfigFrom builds a site's detector configuration from the YAML schema.
// Zero values in d (and in the site's intakes) take the defaults of
// DefaultSiteConfig. It loads the site's time zone (default UTC) and checks
// the result with Validate.
func SiteConfigFrom(d config.Detect, s config.Site) (SiteConfig, error) {
	c := DefaultSiteConfig(s.ID)
	if s.Name != "" {
		c.Name = s.Name
	}
	c.MaxDepth = s.MaxDepth
	c.Salinity = s.Salinity
	for _, h := range s.Hypsography {
		c.Hypsography.Depths = append(c.Hypsography.Depths, h.Depth)
		c.Hypsography.Areas = append(c.Hypsography.Areas, h.Area)
	}
	c.Expected = append([]float64(nil), s.Depths...)
	sort.Float64s(c.Expected)

	if s.Timezone != "" {
		loc, err := time.LoadLocation(s.Timezone)
		if err != nil {
			return SiteConfig{}, fmt.Errorf("site %q: timezone %q: %w", s.ID, s.Timezone, err)
		}
		c.Location = loc
	}

	th := &c.Thresholds
	setF := func(dst *float64, v float64) {
		if v != 0 {
			*dst = v
		}
	}
	setD := func(dst *time.Duration, v config.Duration) {
		if v != 0 {
			*dst = v.D()
		}
	}
	setF(&th.StratDensityDiff, d.StratDensityDiff)
	setF(&th.TmdDelta, d.TmdDelta)
	setF(&th.InverseDeltaT, d.InverseDeltaT)
	setF(&th.ThermoclineMinGrad, d.ThermoclineMinGrad)
	setF(&th.MinSurfaceDepth, d.MinSurfaceDepth)
	setF(&c.Hysteresis, d.StratHysteresis)
	setF(&c.FrazilMaxC, d.FrazilMaxC)
	setF(&c.FrazilAirC, d.FrazilAirC)
	setD(&c.Hold, d.HoldTime)
	setD(&c.IceHold, d.IceHoldTime)
	setD(&c.SensorFaultAfter, d.SensorFaultAfter)
	setD(&c.ProjectionWindow, d.ProjectionWindow)
	setD(&c.MaxGap, d.MaxGap)
	setD(&c.MinStratified, d.MinStratified)

	for _, in := range s.Intakes {
		k := IntakeConfig{Name: in.Name, Depth: in.Depth, MaxRateCPerH: in.MaxRateCPerH}
		if k.MaxRateCPerH == 0 {
			k.MaxRateCPerH = DefaultMaxRateCPerH
		}
		if in.DegreeDays != nil {
			start, err := time.ParseInLocation("2006-01-02", in.DegreeDays.Start, c.Location)
			if err != nil {
				return SiteConfig{}, fmt.Errorf("site %q: intake %q: degree-day start %q (want YYYY-MM-DD): %w",
					s.ID, in.Name, in.DegreeDays.Start, err)
			}
			th := append([]float64(nil), in.DegreeDays.Thresholds...)
			sort.Float64s(th)
			k.DD = &DegreeDayConfig{Start: start, BaseC: in.DegreeDays.BaseC, Thresholds: th}
		}
		c.Intakes = append(c.Intakes, k)
	}
	if err := c.Validate(); err != nil {
		return SiteConfig{}, err
	}
	return c.withDefaults(), nil
}
