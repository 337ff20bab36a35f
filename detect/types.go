// Package detect is pure computation: column state per profile, per-site seasonal
// detectors with hold times, projections and events. It never touches the network
// or the disk; the same profiles in the same order give the same events at any speed.
package detect

import "time"

// Profile is one site's water column at one instant: depths in metres (ascending,
// positive down) and temperatures in °C, only readings that passed quality control.
// Expected lists the configured sensor depths so detectors can say what is missing.
type Profile struct {
	Site     string
	Time     time.Time // data time (UTC), the start of the assembly interval
	Depths   []float64 // m, ascending
	Temps    []float64 // °C, same length as Depths
	Expected []float64 // m, configured sensor depths (may be empty)
}

// Kind names an event. Values are snake_case and part of the alert schema.
type Kind string

// Event kinds.
const (
	KindStratificationOnset   Kind = "stratification_onset"
	KindOverturn              Kind = "overturn"
	KindMaxDensityReached     Kind = "max_density_reached"
	KindInverseStratification Kind = "inverse_stratification"
	KindIceOn                 Kind = "ice_on"
	KindIceOff                Kind = "ice_off"
	KindIntakeChange          Kind = "intake_change"
	KindIntakeOverturnRisk    Kind = "intake_overturn_risk"
	KindFrazilRisk            Kind = "frazil_risk"
	KindSensorFault           Kind = "sensor_fault"
	KindDegreeDays            Kind = "degree_days"
)

// Status of an event within its episode.
type Status string

const (
	StatusFiring   Status = "firing"   // the condition began
	StatusResolved Status = "resolved" // the condition ended
	StatusUpdate   Status = "update"   // projection or detail update of an open episode
)

// Metric is a number with its unit, e.g. {"schmidt_stability", 120.5, "J/m2"}.
type Metric struct {
	Name  string  `json:"name"`
	Value float64 `json:"value"`
	Unit  string  `json:"unit"`
}

// Projection is a range forecast, e.g. days until the column reaches Tmd.
type Projection struct {
	Name     string  `json:"name"`     // e.g. "days_to_tmd", "days_to_surface_freezing"
	LowDays  float64 `json:"low_days"` // lower end of the range, days from event time
	HighDays float64 `json:"high_days"`
	Method   string  `json:"method"`
}

// Event is what detection raises. Time is data time, never wall-clock time.
type Event struct {
	Time        time.Time         `json:"time"`
	Site        string            `json:"site"`
	Kind        Kind              `json:"kind"`
	Status      Status            `json:"status"`
	Severity    string            `json:"severity"`          // info | warning | critical
	Subject     string            `json:"subject,omitempty"` // e.g. intake name or sensor depth; part of the episode key
	From        string            `json:"from,omitempty"`    // seasonal state before
	To          string            `json:"to,omitempty"`      // seasonal state after
	Season      string            `json:"season,omitempty"`  // fall | spring (overturn)
	Summary     string            `json:"summary"`
	Confidence  string            `json:"confidence"`
	Metrics     []Metric          `json:"metrics"`
	Projections []Projection      `json:"projections,omitempty"`
	Details     map[string]string `json:"details,omitempty"`
}
