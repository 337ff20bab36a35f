package engine

import (
	"math"
	"strconv"
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
	p := write.NewPointWithMeasurement(MeasurementColumn).AddTag("site", c.Site).SetTime(c.Time.UTC())
	columnFields(c, func(k string, v any) { p.AddField(k, v) })
	return p
}

// AppendColumnLine appends the line protocol of ColumnPoint(c) (same
// measurement, tag, fields, and a nanosecond timestamp; no trailing
// newline) to b. It is what the daemon spools for every profile: encoding
// straight into a buffer costs a fraction of building a write.Point and
// formatting it (the client library formats each field through fmt).
func AppendColumnLine(b []byte, c detect.Column) []byte {
	b = append(b, MeasurementColumn+",site="...)
	b = appendLPKey(b, c.Site)
	b = append(b, ' ')
	first := true
	columnFields(c, func(k string, v any) {
		if !first {
			b = append(b, ',')
		}
		first = false
		b = appendLPKey(b, k)
		b = append(b, '=')
		switch v := v.(type) {
		case string:
			b = append(b, '"')
			for i := 0; i < len(v); i++ {
				if v[i] == '\\' || v[i] == '"' {
					b = append(b, '\\')
				}
				b = append(b, v[i])
			}
			b = append(b, '"')
		case float64:
			b = strconv.AppendFloat(b, v, 'g', -1, 64)
		case int64:
			b = strconv.AppendInt(b, v, 10)
			b = append(b, 'i')
		case bool:
			b = strconv.AppendBool(b, v)
		}
	})
	b = append(b, ' ')
	return strconv.AppendInt(b, c.Time.UnixNano(), 10)
}

// appendLPKey escapes a tag value or field key for line protocol as the
// client library does: comma, equals sign and space get a backslash; tab,
// newline and carriage return become \t, \n and \r.
func appendLPKey(b []byte, s string) []byte {
	for i := 0; i < len(s); i++ {
		switch c := s[i]; c {
		case ',', '=', ' ':
			b = append(b, '\\', c)
		case '\n':
			b = append(b, `\\n`...)
		case '\r':
			b = append(b, `\\r`...)
		case '\t':
			b = append(b, `\\t`...)
		default:
			b = append(b, c)
		}
	}
	return b
}

// columnFields hands each field of a column's point to add (values are
// string, float64, int64 or bool; non-finite numbers are skipped), in a
// fixed order.
func columnFields(c detect.Column, add func(k string, v any)) {
	m := &c.Metrics
	add("state", string(c.State))
	add("seasonal", c.Seasonal)
	add("sensors_used", int64(c.SensorsUsed))
	add("sensors_expected", int64(c.SensorsExpected))
	add("ice_inferred", c.IceInferred)
	if c.Reason != "" {
		add("reason", c.Reason)
	}
	finite := func(k string, v float64) {
		if !math.IsNaN(v) && !math.IsInf(v, 0) {
			add(k, v)
		}
	}
	if m.SensorsUsed > 0 {
		finite("surface_temp_c", m.SurfaceTempC)
		finite("bottom_temp_c", m.BottomTempC)
		finite("mean_temp_c", m.MeanTempC)
		finite("density_diff_kg_m3", m.DensityDiff)
		if len(m.TmdC) > 0 {
			finite("tmd_c", m.TmdC[0])
		}
		finite("schmidt_j_m2", m.SchmidtJM2)
		finite("thermocline_m", m.ThermoclineM)
		finite("max_n2_s2", m.MaxN2)
		finite("heat_to_tmd_j_m2", m.HeatToTmdJM2)
	}
	for _, pr := range c.Projections {
		name := fieldName(pr.Name)
		finite(name+"_low", pr.LowDays)
		finite(name+"_high", pr.HighDays)
	}
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
