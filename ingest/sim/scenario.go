// Package sim is a one-dimensional lake simulator that feeds the same
// Reading -> Profile -> detect path as live buoys. Each site is a column of
// horizontal layers (0.25-0.5 m) driven by a synthetic regional weather series:
// the surface energy balance (shortwave absorbed by Beer-Lambert extinction,
// longwave, bulk sensible and latent exchange), eddy diffusion, wind mixing of
// the surface layer by an energy criterion, convective adjustment with the
// project's own equation of state (detect/water), and ice that forms at the
// freezing point, grows by Stefan's law and melts in spring.
//
// The simulator knows the true state of every lake, so it records a Truth
// (overturn, maximum density, ice on and off, injected sensor faults) against
// which detectors can be checked. The buoys report what a thermistor chain
// would: interpolated layer temperatures with noise, occasional dropouts, one
// stuck sensor and one spike.
//
// All sites, names and weather are invented. Constants carry their source in
// their comment; [M] marks a value given from memory, not checked in print.
package sim

import (
	"fmt"
	"math"
	"time"

	"holomix/config"
)

// SiteSpec describes one simulated lake and its buoy.
type SiteSpec struct {
	ID           string              // site id used in topics and readings (no '/', '+', '#')
	Name         string              // display name
	MaxDepth     float64             // m
	Salinity     float64             // g/kg (practical salinity for EOS-80); 0 = fresh
	SensorDepths []float64           // m, ascending, positive down
	Hypsography  []config.HypsoPoint // depth-area curve; empty = box basin of 1 m² per m² of surface
	Intake       *config.Intake      // optional water intake (informational: the column model does not withdraw water)
	Wind         float64             // exposure factor multiplying the regional wind speed; 0 means 1
	// LayerM is the layer thickness in metres; 0 chooses 0.25 m for columns up
	// to 6 m and 0.5 m for deeper ones.
	LayerM float64
	// ExtinctionPerM is the diffuse light extinction coefficient (m⁻¹) of the
	// Beer-Lambert law; 0 means 0.5 m⁻¹ (clear to moderately clear lake water [M]).
	ExtinctionPerM float64
	// AreaKm2 is the lake surface area used by the eddy diffusivity of Hondzo &
	// Stefan (1993); 0 takes it from the hypsography (or 1 km² for a box).
	AreaKm2    float64
	AirOffsetC float64 // local offset added to the regional air temperature, °C
	Initial    InitialProfile
}

// InitialProfile is the column at the start: a logistic thermocline,
// T(z) = Bottom + (Surface-Bottom)/(1+exp((z-Thermocline)/Width)).
type InitialProfile struct {
	SurfaceC     float64 // °C
	BottomC      float64 // °C
	ThermoclineM float64 // m
	WidthM       float64 // m; 0 means 1 m
}

// FaultKind names an injected sensor fault.
type FaultKind string

// Injected fault kinds.
const (
	FaultStuck FaultKind = "stuck" // the sensor repeats its last value for Duration
	FaultSpike FaultKind = "spike" // one reading is offset by OffsetC
)

// Fault is a sensor fault injected into the readings of one depth of one site.
type Fault struct {
	Kind     FaultKind     `json:"kind"`
	Site     string        `json:"site"`
	Depth    float64       `json:"depth_m"`
	At       time.Time     `json:"at"`                 // first affected report (at or after this time)
	Duration time.Duration `json:"duration,omitempty"` // stuck only
	OffsetC  float64       `json:"offset_c,omitempty"` // spike only, °C
}

// Scenario is the whole simulated world: sites, weather and buoy behaviour.
// Zero values take the defaults documented on each field.
type Scenario struct {
	Start time.Time     // model start (UTC)
	Sites []SiteSpec    //
	Seed  int64         // seeds weather, sensor noise and dropouts
	Step  time.Duration // model step; 0 means 10 min
	// Report is the buoy reporting interval, a multiple of Step; 0 means Step.
	Report time.Duration

	LatitudeDeg float64 // for the solar elevation; 0 means 46 °N. Solar noon is taken at 12:00 UTC.

	AirMeanC      float64       // annual mean air temperature, °C (0 is a valid value)
	AirAmpC       float64       // seasonal amplitude, °C (half the July-January difference)
	AirColdestDay int           // day of year of the seasonal minimum; 0 means 18 (mid-January)
	DielAmpC      float64       // half the day-night range, °C; maximum at 15:00 solar time
	WeatherSigmaC float64       // standard deviation of the weather-scale air anomaly, °C
	WeatherMemory time.Duration // e-folding time of the AR(1) weather anomaly; 0 means 4 days
	WindMeanMS    float64       // regional mean wind speed at 10 m, m/s; 0 means 4
	CloudMean     float64       // mean cloud fraction 0..1; 0 means 0.55
	RelHumidity   float64       // relative humidity 0..1 for the latent heat flux; 0 means 0.75

	// SnowResistance is the thermal resistance of the snow on the ice (m² K/W),
	// in series with the ice; about 0.2 equals 6 cm of snow at 0.3 W/(m K) [M].
	// A negative value means no snow.
	SnowResistance float64

	NoiseC      float64 // sensor noise σ, °C; 0 means 0.015, negative means none
	DropoutProb float64 // probability that one reading is lost; 0 means 0.002, negative means none
	OutageProb  float64 // probability per report that a whole buoy goes silent for 1-4 h; 0 means 0.0004, negative none
	Faults      []Fault // injected sensor faults
}

// DefaultScenario returns three invented lakes under one cold-continental
// weather series from 15 September: Larchmere Reservoir (30 m, hatchery intake
// at 18 m), Ottersedge Pond (3 m, freezes early) and Saltwick Lake (12 m,
// salinity 1.5 g/kg). The default climate (annual mean 5.5 °C, amplitude
// 15 °C) is a plausible mid-latitude continental one, not a real station.
func DefaultScenario(seed int64) Scenario {
	start := time.Date(2025, time.September, 15, 0, 0, 0, 0, time.UTC)
	sites := []SiteSpec{
		{
			ID: "larchmere", Name: "Larchmere Reservoir", MaxDepth: 30,
			SensorDepths: []float64{1, 2, 4, 6, 8, 10, 12, 14, 16, 18, 20, 23, 26, 29},
			Hypsography: []config.HypsoPoint{
				{Depth: 0, Area: 3.2e6}, {Depth: 5, Area: 2.7e6}, {Depth: 10, Area: 2.1e6},
				{Depth: 15, Area: 1.5e6}, {Depth: 20, Area: 0.95e6}, {Depth: 25, Area: 0.45e6}, {Depth: 30, Area: 0.05e6},
			},
			Intake:         &config.Intake{Name: "hatchery supply", Depth: 18, MaxRateCPerH: 1},
			Wind:           0.6,
			ExtinctionPerM: 0.45,
			Initial:        InitialProfile{SurfaceC: 19.5, BottomC: 6.5, ThermoclineM: 9, WidthM: 1.5},
		},
		{
			ID: "ottersedge", Name: "Ottersedge Pond", MaxDepth: 3,
			SensorDepths: []float64{0.75, 1.25, 1.75, 2.25, 2.75},
			Hypsography: []config.HypsoPoint{
				{Depth: 0, Area: 22000}, {Depth: 1, Area: 16000}, {Depth: 2, Area: 9000}, {Depth: 3, Area: 1500},
			},
			Wind:           0.3,
			ExtinctionPerM: 1.3,
			Initial:        InitialProfile{SurfaceC: 17.5, BottomC: 15.0, ThermoclineM: 1.8, WidthM: 0.4},
		},
		{
			ID: "saltwick", Name: "Saltwick Lake", MaxDepth: 12, Salinity: 1.5,
			SensorDepths: []float64{1, 2, 3, 4, 5, 6, 8, 10, 11.5},
			Hypsography: []config.HypsoPoint{
				{Depth: 0, Area: 1.4e6}, {Depth: 4, Area: 1.1e6}, {Depth: 8, Area: 0.6e6}, {Depth: 12, Area: 0.1e6},
			},
			Wind:           0.5,
			ExtinctionPerM: 0.7,
			Initial:        InitialProfile{SurfaceC: 18.5, BottomC: 8.5, ThermoclineM: 6, WidthM: 1},
		},
	}
	return Scenario{
		Start:         start,
		Sites:         sites,
		Seed:          seed,
		Step:          10 * time.Minute,
		LatitudeDeg:   46,
		AirMeanC:      8,
		AirAmpC:       15,
		AirColdestDay: 20,
		DielAmpC:      3,
		WeatherSigmaC: 3.5,
		WeatherMemory: 4 * 24 * time.Hour,
		WindMeanMS:    4,
		CloudMean:     0.55,
		RelHumidity:   0.75,
		Faults: []Fault{
			{Kind: FaultStuck, Site: "larchmere", Depth: 12, At: start.Add(20 * 24 * time.Hour), Duration: 24 * time.Hour},
			{Kind: FaultSpike, Site: "saltwick", Depth: 4, At: start.Add(33*24*time.Hour + 7*time.Hour), OffsetC: 8},
		},
	}
}

// withDefaults returns the scenario with every zero field replaced by its
// documented default, or an error for a scenario that cannot run.
func (sc Scenario) withDefaults() (Scenario, error) {
	if sc.Step <= 0 {
		sc.Step = 10 * time.Minute
	}
	if sc.Report <= 0 {
		sc.Report = sc.Step
	}
	if sc.Report%sc.Step != 0 {
		return sc, fmt.Errorf("sim: report interval %v is not a multiple of the step %v", sc.Report, sc.Step)
	}
	if sc.Step > time.Hour {
		return sc, fmt.Errorf("sim: step %v is longer than 1 h (explicit surface fluxes need short steps)", sc.Step)
	}
	if sc.Start.IsZero() {
		return sc, fmt.Errorf("sim: scenario has no start time")
	}
	sc.Start = sc.Start.UTC()
	if sc.LatitudeDeg == 0 {
		sc.LatitudeDeg = 46
	}
	if sc.AirColdestDay == 0 {
		sc.AirColdestDay = 18
	}
	if sc.WeatherMemory <= 0 {
		sc.WeatherMemory = 4 * 24 * time.Hour
	}
	if sc.WindMeanMS == 0 {
		sc.WindMeanMS = 4
	}
	if sc.CloudMean == 0 {
		sc.CloudMean = 0.55
	}
	if sc.RelHumidity == 0 {
		sc.RelHumidity = 0.75
	}
	switch {
	case sc.SnowResistance == 0:
		sc.SnowResistance = 0.2
	case sc.SnowResistance < 0:
		sc.SnowResistance = 0
	}
	sc.NoiseC = defaultOrNone(sc.NoiseC, 0.015)
	sc.DropoutProb = defaultOrNone(sc.DropoutProb, 0.002)
	sc.OutageProb = defaultOrNone(sc.OutageProb, 0.0004)
	if len(sc.Sites) == 0 {
		return sc, fmt.Errorf("sim: scenario has no sites")
	}
	seen := map[string]bool{}
	sites := make([]SiteSpec, len(sc.Sites))
	for i, s := range sc.Sites {
		if err := s.validate(); err != nil {
			return sc, err
		}
		if seen[s.ID] {
			return sc, fmt.Errorf("sim: duplicate site id %q", s.ID)
		}
		seen[s.ID] = true
		if s.Wind == 0 {
			s.Wind = 1
		}
		if s.LayerM <= 0 {
			s.LayerM = 0.5
			if s.MaxDepth <= 6 {
				s.LayerM = 0.25
			}
		}
		if s.ExtinctionPerM <= 0 {
			s.ExtinctionPerM = 0.5
		}
		if s.Initial.WidthM <= 0 {
			s.Initial.WidthM = 1
		}
		s.SensorDepths = append([]float64(nil), s.SensorDepths...)
		s.Hypsography = append([]config.HypsoPoint(nil), s.Hypsography...)
		sites[i] = s
	}
	sc.Sites = sites
	sc.Faults = append([]Fault(nil), sc.Faults...)
	for i, f := range sc.Faults {
		if !seen[f.Site] {
			return sc, fmt.Errorf("sim: fault %d names unknown site %q", i, f.Site)
		}
		sc.Faults[i].At = f.At.UTC()
	}
	return sc, nil
}

func defaultOrNone(v, def float64) float64 {
	switch {
	case v == 0:
		return def
	case v < 0:
		return 0
	}
	return v
}

func (s SiteSpec) validate() error {
	if s.ID == "" {
		return fmt.Errorf("sim: site with empty id")
	}
	if err := checkTopicLevel(s.ID); err != nil {
		return fmt.Errorf("sim: site %q: %w", s.ID, err)
	}
	if !(s.MaxDepth > 0) || s.MaxDepth > 500 {
		return fmt.Errorf("sim: site %q: max depth %v m outside (0, 500]", s.ID, s.MaxDepth)
	}
	if s.Salinity < 0 || s.Salinity > 40 {
		return fmt.Errorf("sim: site %q: salinity %v outside [0, 40]", s.ID, s.Salinity)
	}
	if len(s.SensorDepths) == 0 {
		return fmt.Errorf("sim: site %q has no sensor depths", s.ID)
	}
	prev := math.Inf(-1)
	for _, d := range s.SensorDepths {
		if d < 0 || d > s.MaxDepth || d <= prev {
			return fmt.Errorf("sim: site %q: sensor depths must ascend within [0, %v] m, got %v", s.ID, s.MaxDepth, s.SensorDepths)
		}
		prev = d
	}
	prevD, prevA := math.Inf(-1), math.Inf(1)
	for _, h := range s.Hypsography {
		if h.Depth <= prevD || h.Area < 0 || h.Area > prevA {
			return fmt.Errorf("sim: site %q: hypsography must have ascending depths and non-increasing areas ≥ 0", s.ID)
		}
		prevD, prevA = h.Depth, h.Area
	}
	if len(s.Hypsography) > 0 && (s.Hypsography[0].Depth != 0 || s.Hypsography[0].Area <= 0) {
		return fmt.Errorf("sim: site %q: hypsography must start at depth 0 with a positive area", s.ID)
	}
	return nil
}
