package engine

import (
	"math"
	"strings"

	"github.com/influxdata/influxdb-client-go/v2/api/write"

	"holomix/detect"
)

// Measurements of the derived series.
const (
	MeasurementColumn = "water_column"
	MeasurementEvent  = "lake_event"
)

// ColumnPoint returns the derived series point of one profile's column state:
// measurement water_column, tag site, fields
//
//	state               string  instantaneous column state (stratified, mixed, max_density, inverse, unknown)
//	seasonal            string  held seasonal state
//	reason              string  why the state was chosen (when given)
//	surface_temp_c      °C      top sensor
//	bottom_temp_c       °C      bottom sensor
//	mean_temp_c         °C      volume- or depth-weighted mean
//	density_diff_kg_m3  kg/m³   bottom − surface potential density
//	tmd_c               °C      temperature of maximum density at the top sensor
//	schmidt_j_m2        J/m²    Schmidt stability
//	thermocline_m       m       thermocline depth (omitted when there is none)
//	max_n2_s2           s⁻²     largest buoyancy frequency squared
//	heat_to_tmd_j_m2    J/m²    heat the column must lose to reach Tmd
//	<projection>_low/_high days  each projection's range, e.g. days_to_tmd_low
//	sensors_used, sensors_expected  integers
//	ice_inferred        bool    ice inferred from the profile
//
// Non-finite numbers are omitted (InfluxDB rejects them).
func ColumnPoint(c detect.Column) *write.Point {
	m := &c.Metrics
	p := write.NewPointWithMeasurement(MeasurementColumn).
		AddTag("site", c.Site).
		AddField("state", string(c.State)).
		AddField("seasonal", c.Seasonal).
		AddField("sensors_used", int64(c.SensorsUsed)).
		AddField("sensors_expected", int64(c.SensorsExpected)).
		AddField("ice_inferred", c.IceInferred).
		SetTime(c.Time.UTC())
	defer p.SortTags()
	if c.Reason != "" {
		p.AddField("reason", c.Reason)
	}
	if m.SensorsUsed > 0 {
		addFinite(p, "surface_temp_c", m.SurfaceTempC)
		addFinite(p, "bottom_temp_c", m.BottomTempC)
		addFinite(p, "mean_temp_c", m.MeanTempC)
		addFinite(p, "density_diff_kg_m3", m.DensityDiff)
		if len(m.TmdC) > 0 {
			addFinite(p, "tmd_c", m.TmdC[0])
		}
		addFinite(p, "schmidt_j_m2", m.SchmidtJM2)
		addFinite(p, "thermocline_m", m.ThermoclineM)
		addFinite(p, "max_n2_s2", m.MaxN2)
		addFinite(p, "heat_to_tmd_j_m2", m.HeatToTmdJM2)
	}
	for _, pr := range c.Projections {
		name := fieldName(pr.Name)
		addFinite(p, name+"_low", pr.LowDays)
		addFinite(p, name+"_high", pr.HighDays)
	}
	return p
}

// EventPoint returns the derived series point of one event: measurement
// lake_event, tags site and kind, fields status, summary, season, from, to,
// confidence, severity and subject (strings; empty ones omitted except status
// and summary), plus each metric as a number field named after it.
func EventPoint(e detect.Event) *write.Point {
	p := write.NewPointWithMeasurement(MeasurementEvent).
		AddTag("site", e.Site).
		AddTag("kind", string(e.Kind)).
		AddField("status", string(e.Status)).
		AddField("summary", e.Summary).
		SetTime(e.Time.UTC())
	defer p.SortTags()
	for _, f := range [...]struct{ k, v string }{
		{"season", e.Season}, {"from", e.From}, {"to", e.To},
		{"confidence", e.Confidence}, {"severity", e.Severity}, {"subject", e.Subject},
	} {
		if f.v != "" {
			p.AddField(f.k, f.v)
		}
	}
	for _, m := range e.Metrics {
		if n := fieldName(m.Name); n != "" && !reservedEventField(n) {
			addFinite(p, n, m.Value)
		}
	}
	return p
}

func reservedEventField(n string) bool {
	switch n {
	case "status", "summary", "season", "from", "to", "confidence", "severity", "subject":
		return true
	}
	return false
}

func addFinite(p *write.Point, k string, v float64) {
	if !math.IsNaN(v) && !math.IsInf(v, 0) {
		p.AddField(k, v)
	}
}

// fieldName makes a snake_case field key of a name (letters, digits, '_').
func fieldName(s string) string {
	var b strings.Builder
	for _, r := range strings.ToLower(s) {
		switch {
		case r >= 'a' && r <= 'z', r >= '0' && r <= '9', r == '_':
			b.WriteRune(r)
		default:
			b.WriteByte('_')
		}
	}
	return b.String()
}
