package detect

import (
	"fmt"
	"math"
	"time"

	"holomix/detect/water"
)

// Seasonal states of a Site (Column.Seasonal, Event.From/To). The first four
// are the debounced column states of water.Classify; SeasonIce overrides them
// while ice cover is inferred; SeasonUnknown is shown until a state has held
// for the hold time after start.
const (
	SeasonUnknown    = "unknown"
	SeasonStratified = string(water.StateStratified) // direct: warm over cold
	SeasonMixed      = string(water.StateMixed)
	SeasonMaxDensity = string(water.StateMaxDensity) // whole column within ±δ of its Tmd
	SeasonInverse    = string(water.StateInverse)    // lasting cold-over-4 °C layering
	SeasonIce        = "ice"                         // ice cover inferred from water temperatures
)

// Column is the record of one profile: instantaneous state, seasonal state,
// metrics and projections. It is written to InfluxDB as measurement
// water_column. Every slice is owned by the Column (safe to keep).
type Column struct {
	Site        string
	Time        time.Time
	State       water.State // instantaneous state of this profile ("" for an ignored profile)
	Reason      string      // why State (or why the profile was rejected)
	Seasonal    string      // debounced seasonal state, see the Season* constants
	Metrics     water.Metrics
	Projections []Projection
	// SensorsUsed is the number of depths in this profile; SensorsExpected the
	// number of configured depths (or of depths ever seen when none are configured).
	SensorsUsed, SensorsExpected int
	IceInferred                  bool

	// Missing lists expected depths (m) absent from this profile.
	Missing []float64
	// Intakes holds the temperature, rate and thermal units at each intake.
	Intakes []IntakeStatus
	// Ice holds the signals of the ice detector over the last 24 hours.
	Ice IceSignals
	// Rejected is true when the profile was refused as bad input (Reason says why).
	Rejected bool
}

// IntakeStatus is the water at one intake depth in one profile.
type IntakeStatus struct {
	Name   string
	DepthM float64
	// TempC is the temperature interpolated linearly between the two sensors
	// around the intake (or the nearest sensor within NearestSensorMaxM);
	// valid when TempOK.
	TempC  float64
	TempOK bool
	// RateCPerH is the change of TempC over the last 30-90 minutes, °C/h;
	// valid when RateOK.
	RateCPerH float64
	RateOK    bool
	// DegreeDays are the thermal units accumulated through the last complete
	// local day, °C·day above DegreeDaysBaseC (HasDegreeDays when configured).
	DegreeDays      float64
	DegreeDaysBaseC float64
	HasDegreeDays   bool
}

// IceSignals are the water-temperature signatures the ice detector weighs,
// computed from hourly means over the last 24 hours (valid when OK).
type IceSignals struct {
	OK bool
	// TopMinusBottomC: mean top − bottom temperature, °C (Pierson et al. 2011:
	// lasting top-colder-than-bottom ≥ 0.1 °C).
	TopMinusBottomC float64
	// TopChangeCPerH: root-mean-square hour-to-hour change of the top sensor,
	// °C/h: its diel cycle and wind stirring, damped under ice.
	TopChangeCPerH float64
	// ActivityCPerH: mean absolute hour-to-hour change over all depths, °C/h:
	// the stirring of the whole column by wind, absent under ice.
	ActivityCPerH float64
	// TopC is the last hourly mean of the top sensor, °C.
	TopC float64
	// NoiseCPerH is the estimated part of the top sensor's hour-to-hour
	// change that white sensor noise explains, °C/h (RMS), most of which is
	// removed from TopChangeCPerH and ActivityCPerH (see noiseRemoved); 0
	// without sub-hourly data (see noiseStep).
	NoiseCPerH float64
	// DielSwingC is the top sensor's two-way day-night swing, °C: the
	// smaller of its largest rise and its largest fall within the 24 hours
	// (3-hour running means of the hourly means), large when open water
	// warms by day and cools by night. DielSwingMaxC is the largest swing
	// that ice cover allows at the top sensor's depth and noise (see
	// IceDielSwingCM); a larger one rules ice out.
	DielSwingC    float64
	DielSwingMaxC float64
}

// openWaterDiel reports whether the top sensor's day-night swing rules ice
// cover out (see IceDielSwingCM).
func (sig IceSignals) openWaterDiel() bool {
	return sig.DielSwingMaxC > 0 && sig.DielSwingC > sig.DielSwingMaxC
}

// Site follows one lake through the seasons. It is not safe for concurrent
// use; one goroutine owns each Site.
type Site struct {
	cfg   SiteConfig
	gateC float64 // top temperature above which ice is ruled out, °C (see iceGateC)
	tf    float64 // surface freezing point, °C

	st siteState

	// reused per-profile buffers
	col     water.Column
	met     water.Metrics
	present []int // slot index → index in the profile, −1 when absent
}

// NewSite builds a Site; zero values of c take the defaults of DefaultSiteConfig.
// Use SiteConfig.Validate first to report bad configuration.
func NewSite(c SiteConfig) *Site {
	c = c.withDefaults()
	s := &Site{cfg: c}
	s.tf = water.FreezingPoint(c.Salinity, 0)
	s.gateC = iceGateC(c.Salinity)
	s.col = water.Column{Salinity: c.Salinity, MaxDepth: c.MaxDepth, Hypsography: c.Hypsography}
	s.st = newSiteState(c)
	s.present = make([]int, len(s.st.Slots))
	return s
}

// Config returns the effective configuration (defaults applied).
func (s *Site) Config() SiteConfig { return s.cfg }

// Counters are the site's input counters.
type Counters struct {
	Profiles int // accepted profiles
	Ignored  int // older than (or as old as) the last accepted profile
	Rejected int // bad input (unsorted depths, non-finite or out-of-range values, wrong site)
}

// Counters returns the input counters (they survive MarshalState/RestoreState).
func (s *Site) Counters() Counters {
	return Counters{Profiles: s.st.Summary.Profiles, Ignored: s.st.Ignored, Rejected: s.st.Rejected}
}

// ObserveAir records an air temperature (°C) at data time t for the frazil
// risk. Older observations than the last one are ignored.
func (s *Site) ObserveAir(t time.Time, airC float64) {
	if math.IsNaN(airC) || math.IsInf(airC, 0) || (!s.st.Air.Time.IsZero() && t.Before(s.st.Air.Time)) {
		return
	}
	s.st.Air = airObs{Time: t.UTC(), C: airC, OK: true}
}

// Process takes the next profile (in time order) and returns its Column and
// the events it raised (nil when none). A profile not newer than the last one
// is ignored: the zero Column (State "") and no events. A bad profile (depths
// not ascending, non-finite or out-of-range values, another site) is counted
// and returned as a Column with Rejected set and State unknown.
func (s *Site) Process(p Profile) (Column, []Event) {
	t := p.Time.UTC()
	if !s.st.Last.IsZero() && !t.After(s.st.Last) {
		s.st.Ignored++
		return Column{}, nil
	}
	if err := s.checkProfile(p); err != nil {
		s.st.Rejected++
		return Column{Site: s.cfg.ID, Time: t, State: water.StateUnknown, Seasonal: s.seasonal(),
			Reason: "rejected: " + err.Error(), Rejected: true, IceInferred: s.st.Ice.On}, nil
	}
	s.col.Depths, s.col.Temps = p.Depths, p.Temps
	if err := water.ComputeWith(s.col, s.cfg.Thresholds.ThermoclineMinGrad, &s.met); err != nil {
		s.st.Rejected++
		return Column{Site: s.cfg.ID, Time: t, State: water.StateUnknown, Seasonal: s.seasonal(),
			Reason: "rejected: " + err.Error(), Rejected: true, IceInferred: s.st.Ice.On}, nil
	}
	state, reason := water.Classify(s.col, &s.met, s.cfg.Thresholds)

	ev := &evCtx{t: t}
	if !s.st.Last.IsZero() && t.Sub(s.st.Last) > s.cfg.MaxGap {
		s.dataGap(ev, s.st.Last, t)
	}
	s.st.Last = t
	sum := &s.st.Summary
	if sum.First.IsZero() {
		sum.First = t
	}
	sum.Last = t
	sum.Profiles++

	s.matchSlots(p)
	s.expectedFromProfile(p)
	s.checkSensors(ev)

	// Hourly bins: close the previous hour first (ice, trends), then add this profile.
	hour := t.Truncate(time.Hour)
	if s.st.Bin.Start.IsZero() {
		s.st.Bin.Start = hour
	} else if hour.After(s.st.Bin.Start) {
		s.closeHour(ev)
		s.st.Bin.Start = hour
	}
	s.addToBin(p)

	s.stepSeason(ev, state, p)
	intakes := s.stepIntakes(ev, p)
	s.stepFrazil(ev, p)
	proj := s.projections()
	if len(ev.events) > 0 && len(proj) > 0 {
		for i := range ev.events {
			if ev.events[i].Projections == nil && ev.events[i].Kind != KindSensorFault {
				ev.events[i].Projections = append([]Projection(nil), proj...)
			}
		}
	}

	col := Column{
		Site:            s.cfg.ID,
		Time:            t,
		State:           state,
		Reason:          reason,
		Seasonal:        s.seasonal(),
		Metrics:         copyMetrics(&s.met),
		Projections:     proj,
		SensorsUsed:     len(p.Depths),
		SensorsExpected: s.expectedCount(),
		IceInferred:     s.st.Ice.On,
		Missing:         s.missing(),
		Intakes:         intakes,
		Ice:             s.st.Ice.Signals,
	}
	return col, ev.events
}

// dataGap starts the detectors afresh after a silence longer than MaxGap
// (last: the last profile before it, now: the first after it). Nothing
// followed before the gap is carried across it: the seasonal state becomes
// unknown (the first state to hold afterwards is taken silently, as at the
// start of a record), the ice state becomes unknown, and every hold, hourly
// window, trend fit, rate and the seasonal peak restart. No ice_off,
// overturn or other change is invented for the gap. An ice cover inferred
// before it is closed: its period ends at last ("data gap" in the summary)
// and a resolved ice_on event says that the ice can no longer be followed,
// which also closes the alert episode so that the ice of a later winter is
// announced again. Open intake risks stay open (a data gap does not end a
// water-quality risk; the next stable layering closes them); sensors that
// are silent after the gap are watched from now on.
func (s *Site) dataGap(ev *evCtx, last, now time.Time) {
	st := &s.st
	sum := &st.Summary
	sum.Gaps = append(sum.Gaps, DataGap{From: last, To: now})
	gap := now.Sub(last)
	if st.Ice.On {
		n := len(sum.IcePeriods)
		if n > 0 && sum.IcePeriods[n-1].End == "" {
			sum.IcePeriods[n-1].To, sum.IcePeriods[n-1].End = last, IceEndGap
		}
		e := s.event(ev, KindIceOn, StatusResolved, "info", "ice cover",
			fmt.Sprintf("%s: ice cover inferred since about %s can no longer be followed: no data from %s to %s (%s). This does not say that the ice has gone; the detector starts afresh with the new data.",
				s.name(), clock(st.Ice.Onset), clock(last), clock(now), days(gap)))
		e.Confidence += "; no data for " + days(gap)
		e.Details["onset"] = stamp(st.Ice.Onset)
		e.Details["reason"] = "data gap"
		e.Details["last_data"] = stamp(last)
		e.Details["data_resumed"] = stamp(now)
		e.Details["caution"] = CautionIce
		e.Details["method"] = IceMethod
		e.From, e.To = SeasonIce, SeasonUnknown
		e.Metrics = append(e.Metrics, Metric{"gap_days", gap.Hours() / 24, "d"}, Metric{"max_gap_days", s.cfg.MaxGap.Hours() / 24, "d"})
		ev.add(e)
	}
	if st.Season.Current == SeasonStratified && st.Season.StratConfirmed {
		sum.StratifiedTo = append(sum.StratifiedTo, last)
	}
	st.Season = seasonState{MaxDensityArmed: true, InverseArmed: true}
	st.Ice = iceState{}
	st.Peak = peakState{}
	st.Fit = fitState{}
	st.Hours = st.Hours[:0]
	st.Bin = binState{}
	for i := range st.Slots {
		sl := &st.Slots[i]
		sl.BinSum, sl.BinN, sl.PrevOK = 0, 0, false
		sl.resetNoise()
		if !sl.Faulted && !sl.LastSeen.IsZero() {
			sl.LastSeen = now
		}
	}
	for i := range st.Intakes {
		is := &st.Intakes[i]
		is.Ring = rateRing{}
		is.Calm, is.DeepOK, is.WasBelowML = false, false, false
	}
	st.Surface = rateRing{}
	st.Resumed = now
}

// checkProfile refuses input the detectors cannot use.
func (s *Site) checkProfile(p Profile) error {
	if p.Site != "" && p.Site != s.cfg.ID {
		return fmt.Errorf("profile for site %q given to site %q", p.Site, s.cfg.ID)
	}
	if p.Time.IsZero() {
		return fmt.Errorf("profile has no time")
	}
	n := len(p.Depths)
	if n == 0 {
		return fmt.Errorf("profile has no readings")
	}
	if len(p.Temps) != n {
		return fmt.Errorf("profile has %d depths but %d temperatures", n, len(p.Temps))
	}
	for i, z := range p.Depths {
		if math.IsNaN(z) || math.IsInf(z, 0) || z < 0 {
			return fmt.Errorf("depth %g m is not a depth below the surface", z)
		}
		if i > 0 && z <= p.Depths[i-1] {
			return fmt.Errorf("depths must be strictly ascending: %g m after %g m", z, p.Depths[i-1])
		}
		if v := p.Temps[i]; math.IsNaN(v) || math.IsInf(v, 0) {
			return fmt.Errorf("temperature at %g m is not a number", z)
		}
	}
	return nil
}

// seasonal is the seasonal state shown on Column.Seasonal.
func (s *Site) seasonal() string {
	switch {
	case s.st.Ice.On:
		return SeasonIce
	case s.st.Season.Current == "":
		return SeasonUnknown
	}
	return s.st.Season.Current
}

// copyMetrics copies m with its slices in one fresh backing array.
func copyMetrics(m *water.Metrics) water.Metrics {
	c := *m
	nd, nt, nn := len(m.DensityKgM3), len(m.TmdC), len(m.N2)
	buf := make([]float64, nd+nt+nn)
	c.DensityKgM3 = buf[:nd:nd]
	copy(c.DensityKgM3, m.DensityKgM3)
	c.TmdC = buf[nd : nd+nt : nd+nt]
	copy(c.TmdC, m.TmdC)
	c.N2 = buf[nd+nt:]
	copy(c.N2, m.N2)
	return c
}

// evCtx collects the events of one profile.
type evCtx struct {
	t      time.Time
	events []Event
}

func (e *evCtx) add(ev Event) { e.events = append(e.events, ev) }
