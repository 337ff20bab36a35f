// Package water holds the physics of a lake's water column: density (CIPM 2001
// for fresh water, UNESCO EOS-80 with salinity or pressure), the temperature of
// maximum density (Chen & Millero 1986), the freezing point (UNESCO 1983),
// Schmidt stability (Idso 1973), buoyancy frequency, thermocline depth, heat
// content relative to Tmd, and the instantaneous column state. Pure functions,
// no I/O. Units and published sources are stated on every exported function.
package water

// Formula names the equation of state used for a density.
type Formula string

// Equations of state.
const (
	FormulaCIPM  Formula = "CIPM-2001"     // Tanaka et al. 2001, fresh water, 101 325 Pa
	FormulaEOS80 Formula = "UNESCO-EOS-80" // Fofonoff & Millard 1983, UNESCO Tech. Pap. Mar. Sci. 44
)

// State is the instantaneous state of one profile.
type State string

// Column states (SCIENCE.md §5).
const (
	StateStratified State = "stratified" // direct: warm, light water over cold, dense water
	StateMixed      State = "mixed"
	StateMaxDensity State = "max_density" // mixed, every sensor within ±δ of its own Tmd
	StateInverse    State = "inverse"     // top colder and lighter than bottom, bottom ≤ Tmd
	StateUnknown    State = "unknown"     // not enough sensors to say
)

// Hypsography is a depth-area curve: depths in m ascending from 0, areas in m²
// non-increasing. A nil or empty Hypsography means a box (constant-area) basin.
type Hypsography struct {
	Depths []float64 // m
	Areas  []float64 // m²
}

// Thresholds are the configurable criteria of Classify (defaults DefaultThresholds).
type Thresholds struct {
	StratDensityDiff   float64 // kg/m³; bottom − surface density above this → stratified (0.1)
	TmdDelta           float64 // °C; every sensor within ±δ of its Tmd → max_density (0.3)
	InverseDeltaT      float64 // °C; top at least this much colder than bottom → inverse candidate (0.1)
	ThermoclineMinGrad float64 // kg/m³/m; minimum density gradient for a thermocline (0.1)
	MinSurfaceDepth    float64 // m; a sensor must lie at or above this depth (2)
	MinSensors         int     // at least this many depths (3)
	MinCoverage        float64 // fraction of MaxDepth the sensors must span (0.5)
}

// Column is the input for one profile.
type Column struct {
	Depths      []float64 // m, ascending, positive down
	Temps       []float64 // °C (ITS-90, in situ)
	Salinity    float64   // g/kg (practical salinity for EOS-80); 0 = fresh
	MaxDepth    float64   // m, the site's maximum depth (0 = use the deepest sensor)
	Hypsography Hypsography
}

// Metrics is everything Compute derives from one Column. Field names carry their
// units; the JSON keys are part of the documented output of `holomix column`.
type Metrics struct {
	Formula        Formula   `json:"formula"`
	PressureMethod string    `json:"pressure_method"`
	DensityKgM3    []float64 `json:"density_kg_m3"` // potential density (surface pressure) at each sensor
	TmdC           []float64 `json:"tmd_c"`         // Tmd at each sensor's own pressure
	SurfaceTempC   float64   `json:"surface_temp_c"`
	BottomTempC    float64   `json:"bottom_temp_c"`
	SurfaceDensity float64   `json:"surface_density_kg_m3"`
	BottomDensity  float64   `json:"bottom_density_kg_m3"`
	DensityDiff    float64   `json:"density_diff_kg_m3"` // bottom − surface
	MeanTempC      float64   `json:"mean_temp_c"`        // volume-weighted (hypsography) or depth-weighted
	MeanMethod     string    `json:"mean_method"`        // "volume-weighted" | "depth-weighted"
	SchmidtJM2     float64   `json:"schmidt_j_m2"`
	N2             []float64 `json:"n2_s2"` // between adjacent sensors, len-1 values
	MaxN2          float64   `json:"max_n2_s2"`
	ThermoclineM   float64   `json:"thermocline_m"` // NaN when none (JSON: null)
	MetaTopM       float64   `json:"metalimnion_top_m"`
	MetaBottomM    float64   `json:"metalimnion_bottom_m"`
	HeatToTmdJM2   float64   `json:"heat_to_tmd_j_m2"` // heat the column must lose to reach Tmd, per unit surface area
	FreezingPointC float64   `json:"freezing_point_c"` // at the surface
	SensorsUsed    int       `json:"sensors_used"`

	// Added with Compute: the depth the column integrals run to (MaxDepth, else
	// the deepest hypsography depth, else the deepest sensor) and the name of
	// the thermocline method.
	IntegrationDepthM float64 `json:"integration_depth_m"`
	ThermoclineMethod string  `json:"thermocline_method"`
}
