package detect

import (
	"math"
	"strconv"
	"time"
)

// CautionIce is said by every ice message (SCIENCE.md §7).
const CautionIce = "Ice is inferred from water temperatures only; its thickness and strength are unknown. No ice is guaranteed safe: follow local authority guidance (for reference, public guidance asks for at least 15 cm of clear ice for one person on foot, Canadian Red Cross; white ice is about half as strong as clear ice)."

// IceMethod describes the ice detector for messages and documentation.
const IceMethod = "inferred from water temperatures: onset and end of a lasting top-colder-than-bottom gradient of at least 0.1 °C (Pierson et al. 2011), confirmed by a sheltered surface — the top sensor's hour-to-hour change damped and the whole column calm over 24 hours, most of the sensors' white noise removed when readings come more often than hourly, and no open-water day-night swing of the top sensor (a rise by day and a fall by night larger than ice allows at its depth) — and a top sensor cold enough for freezing water to float above it; open water when the gradient ends, wind stirs the column again, or the top warms past that limit"

// name is the site's display name.
func (s *Site) name() string {
	if s.cfg.Name != "" {
		return s.cfg.Name
	}
	return s.cfg.ID
}

// event starts an Event with the column metrics of the current profile.
func (s *Site) event(ev *evCtx, kind Kind, status Status, sev, subject, summary string) Event {
	return Event{
		Time: ev.t, Site: s.cfg.ID, Kind: kind, Status: status, Severity: sev, Subject: subject,
		Summary: summary, Confidence: s.confidence(), Metrics: s.columnMetrics(),
		Details: map[string]string{"site_name": s.name()},
	}
}

// columnMetrics are the metrics every event carries.
func (s *Site) columnMetrics() []Metric {
	m := &s.met
	out := make([]Metric, 0, 12)
	out = append(out,
		Metric{"surface_temp_c", m.SurfaceTempC, "°C"},
		Metric{"bottom_temp_c", m.BottomTempC, "°C"},
		Metric{"mean_temp_c", m.MeanTempC, "°C"},
		Metric{"density_diff_kg_m3", m.DensityDiff, "kg/m3"},
		Metric{"schmidt_stability_j_m2", m.SchmidtJM2, "J/m2"},
	)
	if n := len(s.col.Depths); n > 0 {
		out = append(out, Metric{"top_depth_m", s.col.Depths[0], "m"}, Metric{"bottom_depth_m", s.col.Depths[n-1], "m"})
	}
	if finite(m.ThermoclineM) {
		out = append(out, Metric{"thermocline_depth_m", m.ThermoclineM, "m"})
	}
	return out
}

// intakeEvent starts an intake event with the intake's metrics.
func (s *Site) intakeEvent(ev *evCtx, kind Kind, status Status, sev string, k *IntakeConfig, o *IntakeStatus, summary string) Event {
	e := s.event(ev, kind, status, sev, k.Name, summary)
	e.Details["intake"] = k.Name
	e.Details["intake_depth_m"] = strconv.FormatFloat(k.Depth, 'f', -1, 64)
	e.Metrics = append(e.Metrics, Metric{"intake_depth_m", k.Depth, "m"})
	if o.TempOK {
		e.Metrics = append(e.Metrics, Metric{"intake_temp_c", o.TempC, "°C"})
		e.Details["intake_temp_method"] = "linear interpolation between the sensors around the intake depth (nearest sensor within 1 m outside them)"
	}
	if kind == KindIntakeChange {
		e.Metrics = append(e.Metrics, Metric{"max_rate_c_per_h", k.MaxRateCPerH, "°C/h"})
		if o.RateOK {
			e.Metrics = append(e.Metrics, Metric{"rate_c_per_h", o.RateCPerH, "°C/h"})
		}
		e.Details["rate_method"] = "change of the intake temperature over the last 30-65 minutes"
	}
	return e
}

// iceEvent starts an ice_on/ice_off event with the detector's signals.
func (s *Site) iceEvent(ev *evCtx, kind Kind, sig IceSignals, onset time.Time, summary string) Event {
	e := s.event(ev, kind, StatusFiring, "info", "ice cover", summary)
	e.Confidence += "; ice inferred from water temperatures, thickness unknown; the published gradient method agreed with observers to about 7 days (RMSD 7.1 d ice-on, 6.4 d ice-off, Pierson et al. 2011)"
	e.Details["onset"] = stamp(onset)
	e.Details["caution"] = CautionIce
	e.Details["method"] = IceMethod
	e.Details["held_for"] = hours(s.cfg.IceHold)
	e.Metrics = append(e.Metrics,
		Metric{"top_minus_bottom_c", sig.TopMinusBottomC, "°C"},
		Metric{"top_change_rms_c_per_h", sig.TopChangeCPerH, "°C/h"},
		Metric{"column_activity_c_per_h", sig.ActivityCPerH, "°C/h"},
		Metric{"top_hourly_mean_c", sig.TopC, "°C"},
		Metric{"ice_gate_c", s.gateC, "°C"},
	)
	if sig.NoiseCPerH > 0 {
		e.Metrics = append(e.Metrics, Metric{"top_change_noise_c_per_h", sig.NoiseCPerH, "°C/h"})
	}
	if sig.DielSwingMaxC > 0 {
		e.Metrics = append(e.Metrics, Metric{"top_diel_swing_c", sig.DielSwingC, "°C"}, Metric{"top_diel_swing_limit_c", sig.DielSwingMaxC, "°C"})
	}
	return e
}

func finite(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }

// stamp formats a data time for Details (RFC 3339, UTC).
func stamp(t time.Time) string { return t.UTC().Format(time.RFC3339) }

// clock formats a data time for a summary line.
func clock(t time.Time) string { return t.UTC().Format("2006-01-02 15:04 UTC") }

// hours formats a duration in hours, e.g. "6 h", "1.5 h".
func hours(d time.Duration) string {
	return strconv.FormatFloat(math.Round(d.Hours()*10)/10, 'f', -1, 64) + " h"
}

// days formats a duration in days, e.g. "7 d", "273.9 d".
func days(d time.Duration) string {
	return strconv.FormatFloat(math.Round(d.Hours()/24*10)/10, 'f', -1, 64) + " d"
}
