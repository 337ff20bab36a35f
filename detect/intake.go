package detect

import (
	"fmt"
	"math"
	"strconv"
	"time"
)

// Intake settings.
const (
	// NearestSensorMaxM: an intake above the top sensor or below the bottom one
	// takes that sensor's temperature when it is at most this far (m) away.
	NearestSensorMaxM = 1.0
	rateMinAge        = 30 * time.Minute // rate needs a reference sample at least this old
	rateMaxAge        = 65 * time.Minute // and at most this old (hourly data with a little jitter)
	changeCalmFor     = time.Hour        // intake_change resolves after this long below the relaxed limit
	airMaxAge         = 3 * time.Hour    // an air temperature counts for frazil this long
	frazilClearC      = 0.1              // frazil risk resolves when the top is this much above FrazilMaxC
)

// CautionWaterQuality is the water-quality caution of intake alerts (SCIENCE.md §6).
const CautionWaterQuality = "Overturn can carry bottom water that is low in dissolved oxygen and may hold hydrogen sulphide, ammonia, dissolved iron and manganese up to the intake; hatchery fish kills have followed (Noell et al. 1978; Horne 2019). Check water quality at the intake (dissolved oxygen first) before relying on it. Temperatures alone cannot measure water quality: follow your own testing and local rules."

// CautionFrazil is the caution of frazil alerts (SCIENCE.md §6).
const CautionFrazil = "Frazil ice forms in turbulent, slightly supercooled open water, mostly on clear cold nights, and can block intake racks (Daly 1991). From temperatures alone only a risk can be flagged: watch intake screens and flow, and follow your site's procedures."

// rateSample is one intake temperature.
type rateSample struct {
	T time.Time `json:"t"`
	C float64   `json:"c"`
}

// rateRing holds the recent samples of one temperature series for its rate of
// change. Lo and Hi are the sensor depths the value came from: when they
// change, the series restarts (an interpolation between other sensors is not
// the same measurement).
type rateRing struct {
	Lo   float64      `json:"lo_m"`
	Hi   float64      `json:"hi_m"`
	S    []rateSample `json:"s"`
	head int
}

// push adds a sample and returns the rate of change, °C/h, against the oldest
// sample between rateMinAge and rateMaxAge old.
func (r *rateRing) push(t time.Time, c, lo, hi float64) (float64, bool) {
	if r.Lo != lo || r.Hi != hi {
		r.S, r.head = r.S[:0], 0
		r.Lo, r.Hi = lo, hi
	}
	for r.head < len(r.S) && t.Sub(r.S[r.head].T) > rateMaxAge {
		r.head++
	}
	rate, ok := 0.0, false
	if r.head < len(r.S) {
		ref := r.S[r.head]
		if age := t.Sub(ref.T); age >= rateMinAge {
			rate, ok = (c-ref.C)/age.Hours(), true
		}
	}
	if r.head > 32 && 2*r.head > len(r.S) {
		r.compact()
	}
	r.S = append(r.S, rateSample{T: t, C: c})
	return rate, ok
}

func (r *rateRing) compact() {
	if r.head == 0 {
		return
	}
	n := copy(r.S, r.S[r.head:])
	r.S, r.head = r.S[:n], 0
}

// intakeState is what a Site remembers about one intake.
type intakeState struct {
	Name string   `json:"name"`
	Ring rateRing `json:"ring"`

	ChangeOpen  bool      `json:"change_open"`
	ChangeOnset time.Time `json:"change_onset"`
	ChangeSev   string    `json:"change_severity"`
	Calm        bool      `json:"calm"`
	CalmSince   time.Time `json:"calm_since"`

	RiskOpen   bool      `json:"risk_open"`
	RiskOnset  time.Time `json:"risk_onset"`
	RiskReason string    `json:"risk_reason"`
	WasBelowML bool      `json:"was_below_mixed_layer"`
	DeepOK     bool      `json:"deepening"`
	DeepSince  time.Time `json:"deepening_since"`

	DD ddState `json:"degree_days"`
}

type ddState struct {
	Started     bool      `json:"started"`
	Accum       float64   `json:"accum"`
	DaySum      float64   `json:"day_sum"`
	DayN        int       `json:"day_n"`
	DayEnd      time.Time `json:"day_end"`
	Next        int       `json:"next"` // index of the next threshold
	MissingDays int       `json:"missing_days"`
}

// interpAt returns the temperature at depth z: linear between the sensors
// around it, or the nearest sensor within NearestSensorMaxM above the top or
// below the bottom. lo and hi are the sensor depths used.
func interpAt(depths, temps []float64, z float64) (t, lo, hi float64, ok bool) {
	n := len(depths)
	if n == 0 {
		return 0, 0, 0, false
	}
	if z <= depths[0] {
		if depths[0]-z <= NearestSensorMaxM {
			return temps[0], depths[0], depths[0], true
		}
		return 0, 0, 0, false
	}
	if z >= depths[n-1] {
		if z-depths[n-1] <= NearestSensorMaxM {
			return temps[n-1], depths[n-1], depths[n-1], true
		}
		return 0, 0, 0, false
	}
	for i := 1; i < n; i++ {
		if z <= depths[i] {
			z0, z1 := depths[i-1], depths[i]
			w := (z - z0) / (z1 - z0)
			return temps[i-1] + w*(temps[i]-temps[i-1]), z0, z1, true
		}
	}
	return 0, 0, 0, false
}

// stepIntakes updates every intake: temperature and rate (intake_change),
// the deepening mixed layer (intake_overturn_risk) and degree-days.
func (s *Site) stepIntakes(ev *evCtx, p Profile) []IntakeStatus {
	if len(s.cfg.Intakes) == 0 {
		return nil
	}
	out := make([]IntakeStatus, len(s.cfg.Intakes))
	h := s.cfg.Hysteresis
	for i := range s.cfg.Intakes {
		k := &s.cfg.Intakes[i]
		is := &s.st.Intakes[i]
		o := &out[i]
		o.Name, o.DepthM = k.Name, k.Depth
		temp, lo, hi, ok := interpAt(p.Depths, p.Temps, k.Depth)
		if ok {
			o.TempC, o.TempOK = temp, true
			o.RateCPerH, o.RateOK = is.Ring.push(ev.t, temp, lo, hi)
		}
		if o.RateOK {
			r := math.Abs(o.RateCPerH)
			switch {
			case !is.ChangeOpen && r > k.MaxRateCPerH:
				sev := "warning"
				if r >= 2*k.MaxRateCPerH {
					sev = "critical"
				}
				is.ChangeOpen, is.ChangeOnset, is.ChangeSev, is.Calm = true, ev.t, sev, false
				e := s.intakeEvent(ev, KindIntakeChange, StatusFiring, sev, k, o,
					fmt.Sprintf("%s intake %q (%.1f m): temperature changing %+.2f °C/h (limit %.2g °C/h), now %.2f °C.",
						s.name(), k.Name, k.Depth, o.RateCPerH, k.MaxRateCPerH, temp))
				e.Details["onset"] = stamp(ev.t)
				ev.add(e)
			case is.ChangeOpen && r <= k.MaxRateCPerH*(1-h):
				if !is.Calm {
					is.Calm, is.CalmSince = true, ev.t
				}
				if ev.t.Sub(is.CalmSince) >= changeCalmFor {
					is.ChangeOpen, is.Calm = false, false
					e := s.intakeEvent(ev, KindIntakeChange, StatusResolved, is.ChangeSev, k, o,
						fmt.Sprintf("%s intake %q (%.1f m): temperature steady again (%+.2f °C/h for %s), now %.2f °C.",
							s.name(), k.Name, k.Depth, o.RateCPerH, hours(changeCalmFor), temp))
					e.Details["onset"] = stamp(is.ChangeOnset)
					ev.add(e)
				}
			case is.ChangeOpen:
				is.Calm = false
			}
		}
		s.stepDeepening(ev, i)
		if k.DD != nil {
			s.stepDegreeDays(ev, i, o)
			o.DegreeDays, o.DegreeDaysBaseC, o.HasDegreeDays = is.DD.Accum, k.DD.BaseC, true
		}
	}
	return out
}

// stepDeepening opens intake_overturn_risk when, during seasonal
// stratification (see stepSeason), the mixed layer (down to the top of the
// metalimnion) deepens past an intake that was below it, and stays past it
// for the hold time. The intake's position is followed during a transient
// stratified stretch too, but a risk opens only once the stretch counts as
// seasonal: water cut off below a day-old thermocline is not the deep water
// whose quality an overturn threatens.
func (s *Site) stepDeepening(ev *evCtx, i int) {
	is := &s.st.Intakes[i]
	k := &s.cfg.Intakes[i]
	mt := s.met.MetaTopM
	if s.st.Season.Current != SeasonStratified {
		is.WasBelowML, is.DeepOK = false, false
		return
	}
	if math.IsNaN(mt) || math.IsInf(mt, 0) {
		return
	}
	if k.Depth > mt {
		is.WasBelowML, is.DeepOK = true, false
		return
	}
	if !is.WasBelowML || is.RiskOpen {
		return
	}
	if !is.DeepOK {
		is.DeepOK, is.DeepSince = true, ev.t
	}
	if ev.t.Sub(is.DeepSince) >= s.cfg.Hold && s.st.Season.StratConfirmed {
		s.openIntakeRisk(ev, i, fmt.Sprintf("the mixed layer deepened past the intake (metalimnion top %.1f m)", mt), is.DeepSince)
		is.DeepOK = false
	}
}

// openIntakeRisk raises intake_overturn_risk for intake i unless one is open.
func (s *Site) openIntakeRisk(ev *evCtx, i int, reason string, onset time.Time) {
	is := &s.st.Intakes[i]
	if is.RiskOpen {
		return
	}
	k := &s.cfg.Intakes[i]
	is.RiskOpen, is.RiskOnset, is.RiskReason = true, onset, reason
	o := s.intakeNow(i)
	e := s.intakeEvent(ev, KindIntakeOverturnRisk, StatusFiring, "warning", k, &o,
		fmt.Sprintf("%s intake %q (%.1f m): %s; water from deeper layers can reach the intake depth: check water quality.",
			s.name(), k.Name, k.Depth, reason))
	e.Details["onset"] = stamp(onset)
	e.Details["reason"] = reason
	e.Details["caution"] = CautionWaterQuality
	ev.add(e)
}

// closeIntakeRisks resolves every open intake_overturn_risk.
func (s *Site) closeIntakeRisks(ev *evCtx, why string) {
	for i := range s.st.Intakes {
		is := &s.st.Intakes[i]
		if !is.RiskOpen {
			continue
		}
		is.RiskOpen = false
		k := &s.cfg.Intakes[i]
		o := s.intakeNow(i)
		e := s.intakeEvent(ev, KindIntakeOverturnRisk, StatusResolved, "warning", k, &o,
			fmt.Sprintf("%s intake %q (%.1f m): mixing risk over: %s.", s.name(), k.Name, k.Depth, why))
		e.Details["onset"] = stamp(is.RiskOnset)
		e.Details["reason"] = is.RiskReason
		e.Details["caution"] = CautionWaterQuality
		ev.add(e)
	}
}

// intakeNow is the intake's temperature in the current profile.
func (s *Site) intakeNow(i int) IntakeStatus {
	k := &s.cfg.Intakes[i]
	o := IntakeStatus{Name: k.Name, DepthM: k.Depth}
	if t, _, _, ok := interpAt(s.col.Depths, s.col.Temps, k.Depth); ok {
		o.TempC, o.TempOK = t, true
	}
	return o
}

// stepDegreeDays accumulates thermal units at intake i: each local day (site
// Location) with data adds max(0, daily mean − BaseC) °C·day when the day is
// over; days without data add nothing and are counted. Crossing a threshold
// raises degree_days.
func (s *Site) stepDegreeDays(ev *evCtx, i int, o *IntakeStatus) {
	k := &s.cfg.Intakes[i]
	dd := &s.st.Intakes[i].DD
	t := ev.t
	if t.Before(k.DD.Start) {
		return
	}
	loc := s.cfg.Location
	if !dd.Started {
		dd.Started = true
		dd.DayEnd = nextMidnight(t, loc)
		dd.MissingDays += civilDays(k.DD.Start, t, loc)
	}
	if !t.Before(dd.DayEnd) {
		if dd.DayN > 0 {
			dd.Accum += math.Max(0, dd.DaySum/float64(dd.DayN)-k.DD.BaseC)
		} else {
			dd.MissingDays++
		}
		dd.MissingDays += civilDays(dd.DayEnd, t, loc)
		dd.DaySum, dd.DayN = 0, 0
		closed := dd.DayEnd
		dd.DayEnd = nextMidnight(t, loc)
		for dd.Next < len(k.DD.Thresholds) && dd.Accum >= k.DD.Thresholds[dd.Next] {
			thr := k.DD.Thresholds[dd.Next]
			dd.Next++
			sub := k.Name + " " + strconv.FormatFloat(thr, 'f', -1, 64) + " °C·day"
			e := s.event(ev, KindDegreeDays, StatusFiring, "info", sub,
				fmt.Sprintf("%s intake %q (%.1f m): %g °C·day above %g °C reached since %s (%.1f °C·day through the day ending %s).",
					s.name(), k.Name, k.Depth, thr, k.DD.BaseC, k.DD.Start.In(loc).Format("2006-01-02"), dd.Accum, closed.In(loc).Format("2006-01-02 15:04 MST")))
			e.Details["onset"] = stamp(closed)
			e.Details["intake"] = k.Name
			e.Details["threshold"] = strconv.FormatFloat(thr, 'f', -1, 64) + " °C·day"
			e.Details["base_c"] = strconv.FormatFloat(k.DD.BaseC, 'f', -1, 64)
			e.Details["start"] = k.DD.Start.In(loc).Format("2006-01-02")
			e.Details["method"] = "sum over local days (" + loc.String() + ") of max(0, daily mean temperature at the intake − base) × 1 day; days without data add nothing"
			e.Details["days_without_data"] = strconv.Itoa(dd.MissingDays)
			e.Metrics = append(e.Metrics, Metric{"degree_days", dd.Accum, "°C·day"}, Metric{"threshold_degree_days", thr, "°C·day"},
				Metric{"base_temp_c", k.DD.BaseC, "°C"}, Metric{"intake_depth_m", k.Depth, "m"})
			ev.add(e)
		}
	}
	if o.TempOK {
		dd.DaySum += o.TempC
		dd.DayN++
	}
}

// nextMidnight is the first local midnight after t.
func nextMidnight(t time.Time, loc *time.Location) time.Time {
	y, m, d := t.In(loc).Date()
	return time.Date(y, m, d+1, 0, 0, 0, 0, loc).UTC()
}

// civilDays counts local calendar days from a's date to b's date (≥ 0).
func civilDays(a, b time.Time, loc *time.Location) int {
	ya, ma, da := a.In(loc).Date()
	yb, mb, db := b.In(loc).Date()
	n := int(time.Date(yb, mb, db, 0, 0, 0, 0, time.UTC).Sub(time.Date(ya, ma, da, 0, 0, 0, 0, time.UTC)).Hours() / 24)
	if n < 0 {
		return 0
	}
	return n
}

type frazilState struct {
	Open     bool      `json:"open"`
	Onset    time.Time `json:"onset"`
	Severity string    `json:"severity"`
}

// stepFrazil raises frazil_risk in open water when the top sensor (within
// MinSurfaceDepth) is at or below FrazilMaxC and falling; critical when the
// last air temperature (≤ 3 h old) is at or below FrazilAirC. It escalates
// with an update when the air turns cold, and resolves when the top warms
// FrazilMaxC + 0.1 °C or ice cover is inferred.
func (s *Site) stepFrazil(ev *evCtx, p Profile) {
	if len(p.Depths) == 0 || p.Depths[0] > s.cfg.Thresholds.MinSurfaceDepth {
		return
	}
	z, temp := p.Depths[0], p.Temps[0]
	rate, rok := s.st.Surface.push(ev.t, temp, z, z)
	if s.st.Ice.On {
		return
	}
	fz := &s.st.Frazil
	air := s.st.Air
	airCold := air.OK && absDur(ev.t.Sub(air.Time)) <= airMaxAge && air.C <= s.cfg.FrazilAirC
	sev := "warning"
	if airCold {
		sev = "critical"
	}
	build := func(status Status, summary string) Event {
		e := s.event(ev, KindFrazilRisk, status, sev, "surface", summary)
		e.Details["onset"] = stamp(fz.Onset)
		e.Details["caution"] = CautionFrazil
		e.Details["criterion"] = fmt.Sprintf("open water (no ice inferred), top sensor at or below %.2g °C and falling; critical with air at or below %.3g °C", s.cfg.FrazilMaxC, s.cfg.FrazilAirC)
		e.Metrics = append(e.Metrics, Metric{"top_temp_c", temp, "°C"}, Metric{"top_depth_m", z, "m"})
		if rok {
			e.Metrics = append(e.Metrics, Metric{"top_rate_c_per_h", rate, "°C/h"})
		}
		if air.OK {
			e.Metrics = append(e.Metrics, Metric{"air_temp_c", air.C, "°C"})
			e.Details["air_time"] = stamp(air.Time)
		}
		return e
	}
	switch {
	case !fz.Open && temp <= s.cfg.FrazilMaxC && rok && rate < 0:
		fz.Open, fz.Onset, fz.Severity = true, ev.t, sev
		ev.add(build(StatusFiring, fmt.Sprintf("%s: frazil ice risk: open water at %.2f °C at %.2f m and falling (%+.2f °C/h)%s.",
			s.name(), temp, z, rate, airText(air, absDur(ev.t.Sub(air.Time)) <= airMaxAge))))
	case fz.Open && temp > s.cfg.FrazilMaxC+frazilClearC:
		fz.Open = false
		sev = fz.Severity
		ev.add(build(StatusResolved, fmt.Sprintf("%s: frazil ice risk over: top water warmed to %.2f °C at %.2f m.", s.name(), temp, z)))
	case fz.Open && sev == "critical" && fz.Severity != "critical":
		fz.Severity = sev
		ev.add(build(StatusUpdate, fmt.Sprintf("%s: frazil ice risk raised: air %.1f °C over open water at %.2f °C.", s.name(), air.C, temp)))
	}
}

// resolveFrazil ends an open frazil risk (ice cover inferred).
func (s *Site) resolveFrazil(ev *evCtx, why string) {
	fz := &s.st.Frazil
	if !fz.Open {
		return
	}
	fz.Open = false
	e := s.event(ev, KindFrazilRisk, StatusResolved, fz.Severity, "surface",
		fmt.Sprintf("%s: frazil ice risk over: %s (from water temperatures; thickness unknown).", s.name(), why))
	e.Details["onset"] = stamp(fz.Onset)
	e.Details["caution"] = CautionFrazil
	ev.add(e)
}

func airText(a airObs, recent bool) string {
	if !a.OK || !recent {
		return ""
	}
	return fmt.Sprintf(", air %.1f °C", a.C)
}

func absDur(d time.Duration) time.Duration {
	if d < 0 {
		return -d
	}
	return d
}
