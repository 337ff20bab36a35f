package detect

import (
	"fmt"
	"math"
	"time"

	"holomix/detect/water"
)

// seasonState is the debounced seasonal column state.
type seasonState struct {
	Current      string    `json:"current"` // "" until a state has held once
	Since        time.Time `json:"since"`
	Pending      string    `json:"pending"`
	PendingSince time.Time `json:"pending_since"`
	// One max_density_reached per passage through Tmd and one
	// inverse_stratification per winter: re-armed by stratification or ice-off.
	MaxDensityArmed bool `json:"max_density_armed"`
	InverseArmed    bool `json:"inverse_armed"`
	// StratConfirmed: the current stratified stretch counts as seasonal (it
	// has lasted MinStratified, or it was under way when the record began or
	// resumed after a data gap).
	StratConfirmed bool   `json:"strat_confirmed"`
	StratFrom      string `json:"strat_from"` // seasonal state before the stretch
}

// holdFor is the time a candidate state must hold before it counts: the ice
// hold for inverse stratification (only lasting winter layering counts),
// the hold otherwise.
func (s *Site) holdFor(state string) time.Duration {
	if state == SeasonInverse {
		return s.cfg.IceHold
	}
	return s.cfg.Hold
}

// effective turns the instantaneous state into the candidate seasonal state.
//
// Hysteresis: the current seasonal state is kept while the profile is within
// the relaxed threshold of that state:
//   - stratified stays while bottom − surface density > StratDensityDiff×(1−h)
//     with the surface warmer;
//   - max_density stays while every sensor is within TmdDelta×(1+h) of its Tmd;
//   - inverse stays while the top is InverseDeltaT×(1−h) colder and lighter than
//     the bottom, the bottom at most TmdDelta above its Tmd.
//
// Two readings differ from water.Classify (design choices): a column with
// every sensor within ±TmdDelta of its Tmd counts as max_density even when
// its top is slightly colder than its bottom (density differences there are
// below 0.001 kg/m³ [C], and a night's cooling of the top must not break the
// hold); and entering inverse accepts a bottom up to TmdDelta×h (0.15 °C)
// above its Tmd where Classify asks for at or below Tmd: under ice the bottom
// sits at Tmd, and sensor noise of a few hundredths of a degree would
// otherwise break every hold.
func (s *Site) effective(inst water.State, p Profile) string {
	m, th, h := &s.met, s.cfg.Thresholds, s.cfg.Hysteresis
	n := len(m.TmdC)
	if n == 0 {
		return string(inst)
	}
	worst := worstTmdDeparture(p.Temps, m.TmdC)
	notStrat := inst == water.StateMixed || inst == water.StateMaxDensity || inst == water.StateInverse
	inverseLike := func(dT, bottomAllow float64) bool {
		return notStrat && m.BottomTempC-m.SurfaceTempC >= dT && m.SurfaceDensity < m.BottomDensity &&
			m.BottomTempC <= m.TmdC[n-1]+bottomAllow
	}
	switch s.st.Season.Current {
	case SeasonStratified:
		if inst != water.StateStratified && m.DensityDiff > th.StratDensityDiff*(1-h) && m.SurfaceTempC > m.BottomTempC {
			return SeasonStratified
		}
	case SeasonMaxDensity:
		if notStrat && worst <= th.TmdDelta*(1+h) {
			return SeasonMaxDensity
		}
	case SeasonInverse:
		if worst > th.TmdDelta && inverseLike(th.InverseDeltaT*(1-h), th.TmdDelta) {
			return SeasonInverse
		}
	}
	switch {
	case notStrat && worst <= th.TmdDelta:
		return SeasonMaxDensity
	case inverseLike(th.InverseDeltaT, th.TmdDelta*h):
		return SeasonInverse
	}
	return string(inst)
}

func worstTmdDeparture(temps, tmd []float64) float64 {
	w := 0.0
	for i, t := range temps {
		if d := math.Abs(t - tmd[i]); d > w {
			w = d
		}
	}
	return w
}

// stepSeason debounces the instantaneous state into the seasonal state. A
// candidate state must be seen on every profile for holdFor(candidate) of
// data time; unknown profiles (too few sensors) neither confirm nor break a
// hold. The first state to hold after start (or after a data gap longer than
// MaxGap) is taken silently.
//
// Seasonal versus transient stratification. In spring, and in warm spells in
// fall, a lake's surface warms on calm days and stratifies for a day or a
// few, and the next windy or cold spell mixes it to the bottom again: Lake
// Mendota's buoy (NTL-LTER, EDI knb-lter-ntl.130) shows four such stretches
// of 1.0-2.0 days and one of 5.0 days between 20 April and 8 May 2019 before
// the lake stratified for the summer on 10-11 May, its bottom water warming
// at every mixing. The rule: the seasonal state follows every stretch (with
// the hold and hysteresis above), but a stratified stretch counts as
// seasonal only once it has lasted MinStratified (default 7 days, measured
// from its onset to the last profile still stratified, i.e. to the start of
// a pending departure). Only then is stratification_onset raised (onset: the
// start of the stretch; the event is MinStratified later), the intake risks
// of the previous overturn or ice-off closed, and the max-density and
// inverse detectors re-armed; only the end of a seasonal stretch is an
// overturn (with intake_overturn_risk), and the mixed layer deepening past an
// intake opens a risk only during seasonal stratification. A transient
// stretch ends silently (counted in SeasonSummary.TransientStratified); an
// intake risk already open stays open through it. A stretch under way when
// the record begins (or resumes after a data gap) counts as seasonal at once,
// silently: its length is unknown, and missing a fall overturn at an intake
// would be worse than one needless alert.
//
// Why 7 days (design choice, not a published value): weather systems pass
// every few days (the synoptic time scale, about 3-7 days, common practice,
// no source), so stratification that outlasts one has survived at least one
// windy or cold spell; and deep water cut off for a few days in cool spring
// water has had little time to lose its oxygen, which is what makes an
// overturn matter at an intake. For a shallow, warm, nutrient-rich
// (polymictic) lake whose bottom water can lose its oxygen within days, set
// MinStratified shorter.
func (s *Site) stepSeason(ev *evCtx, inst water.State, p Profile) {
	ss := &s.st.Season
	if ss.Current == SeasonStratified && !ss.StratConfirmed {
		end := ev.t
		if ss.Pending != "" {
			end = ss.PendingSince
		}
		if end.Sub(ss.Since) >= s.cfg.MinStratified {
			s.confirmStratified(ev)
		}
	}
	if inst == water.StateUnknown || inst == "" {
		return
	}
	cand := s.effective(inst, p)
	if cand == ss.Current {
		ss.Pending = ""
		return
	}
	if cand != ss.Pending {
		ss.Pending, ss.PendingSince = cand, ev.t
	}
	if ev.t.Sub(ss.PendingSince) < s.holdFor(cand) {
		return
	}
	from, onset := ss.Current, ss.PendingSince
	seasonal := from == SeasonStratified && ss.StratConfirmed
	ss.Current, ss.Since, ss.Pending = cand, onset, ""
	ss.StratConfirmed, ss.StratFrom = from == "", from
	if from == "" {
		return
	}
	s.transition(ev, from, cand, onset, seasonal, p)
}

// confirmStratified makes the current stratified stretch seasonal (it has
// lasted MinStratified) and raises stratification_onset.
func (s *Site) confirmStratified(ev *evCtx) {
	ss := &s.st.Season
	ss.StratConfirmed = true
	m := &s.met
	onset := ss.Since
	e := s.event(ev, KindStratificationOnset, StatusFiring, "info", "column",
		fmt.Sprintf("%s: the column stratified: bottom water %.3f kg/m³ denser than the surface (%.1f °C over %.1f °C), lasting since about %s.",
			s.name(), m.DensityDiff, m.SurfaceTempC, m.BottomTempC, clock(onset)))
	e.From, e.To = ss.StratFrom, SeasonStratified
	e.Details["onset"] = stamp(onset)
	e.Details["held_for"] = hours(ev.t.Sub(onset))
	e.Details["criterion"] = fmt.Sprintf("bottom − surface density above %.3g kg/m³ with the surface warmer, held for %s, and stratified (within the hysteresis) for at least %s: shorter stretches are transient and raise no event",
		s.cfg.Thresholds.StratDensityDiff, hours(s.cfg.Hold), days(s.cfg.MinStratified))
	ev.add(e)
	s.st.Summary.StratifiedFrom = append(s.st.Summary.StratifiedFrom, onset)
	ss.MaxDensityArmed, ss.InverseArmed = true, true
	s.closeIntakeRisks(ev, "the column stratified again")
}

// transition raises the events of a seasonal change. seasonal is true when
// the change ends a seasonal (confirmed) stratified stretch.
func (s *Site) transition(ev *evCtx, from, to string, onset time.Time, seasonal bool, p Profile) {
	m := &s.met
	sum := &s.st.Summary
	ss := &s.st.Season
	held := s.holdFor(to)
	if from == SeasonStratified && !seasonal {
		sum.TransientStratified++
	}
	if seasonal {
		season, basis := s.overturnSeason()
		sev := "info"
		if len(s.cfg.Intakes) > 0 {
			sev = "warning"
		}
		e := s.event(ev, KindOverturn, StatusFiring, sev, "column",
			fmt.Sprintf("%s: %s overturn: stratification ended and the column is mixing (surface %.1f °C, bottom %.1f °C, bottom − surface density %.3f kg/m³) since about %s.",
				s.name(), season, m.SurfaceTempC, m.BottomTempC, m.DensityDiff, clock(onset)))
		e.From, e.To, e.Season = from, to, season
		e.Details["onset"] = stamp(onset)
		e.Details["held_for"] = hours(held)
		e.Details["season_basis"] = basis
		e.Details["criterion"] = fmt.Sprintf("bottom − surface density fell below %.3g kg/m³ (threshold %.3g × (1 − hysteresis %.2g)) and stayed there for %s",
			s.cfg.Thresholds.StratDensityDiff*(1-s.cfg.Hysteresis), s.cfg.Thresholds.StratDensityDiff, s.cfg.Hysteresis, hours(held))
		ev.add(e)
		sum.StratifiedTo = append(sum.StratifiedTo, onset)
		sum.Overturns = append(sum.Overturns, OverturnInfo{Time: onset, Detected: ev.t, Season: season})
		for i := range s.cfg.Intakes {
			s.openIntakeRisk(ev, i, season+" overturn", onset)
		}
	}
	switch to {
	case SeasonMaxDensity:
		if !ss.MaxDensityArmed {
			return
		}
		ss.MaxDensityArmed = false
		s.maxDensityEvent(ev, from, onset, p,
			fmt.Sprintf("every sensor within ±%.2g °C of its Tmd, held for %s", s.cfg.Thresholds.TmdDelta, hours(held)))
	case SeasonInverse:
		if !ss.InverseArmed {
			return
		}
		ss.InverseArmed = false
		e := s.event(ev, KindInverseStratification, StatusFiring, "info", "column",
			fmt.Sprintf("%s: lasting inverse stratification: top %.2f °C over bottom %.2f °C (near its maximum density), since about %s.",
				s.name(), m.SurfaceTempC, m.BottomTempC, clock(onset)))
		e.From, e.To = from, to
		e.Details["onset"] = stamp(onset)
		e.Details["held_for"] = hours(held)
		e.Details["criterion"] = fmt.Sprintf("top at least %.2g °C colder and lighter than the bottom, bottom at or below its Tmd, for %s (Pierson et al. 2011)",
			s.cfg.Thresholds.InverseDeltaT, hours(held))
		ev.add(e)
		if !seasonal { // a risk opened by this very overturn stays open
			s.closeIntakeRisks(ev, "the column is stably layered (inverse stratification)")
		}
	}
}

// maxDensityEvent raises max_density_reached with the given onset; basis
// says which rule found it (the held band, or the crossing of
// stepTmdCrossing).
func (s *Site) maxDensityEvent(ev *evCtx, from string, onset time.Time, p Profile, basis string) {
	m := &s.met
	n := len(m.TmdC)
	worst := worstTmdDeparture(p.Temps, m.TmdC)
	e := s.event(ev, KindMaxDensityReached, StatusFiring, "info", "column",
		fmt.Sprintf("%s: the whole column is within ±%.2g °C of its temperature of maximum density (%.2f-%.2f °C by depth); mean %.2f °C, since about %s.",
			s.name(), s.cfg.Thresholds.TmdDelta, m.TmdC[n-1], m.TmdC[0], m.MeanTempC, clock(onset)))
	e.From, e.To = from, SeasonMaxDensity
	e.Details["onset"] = stamp(onset)
	e.Details["held_for"] = hours(ev.t.Sub(onset))
	e.Details["criterion"] = basis
	e.Details["tmd_method"] = "Chen & Millero 1986 at each sensor's pressure and the site's salinity"
	e.Metrics = append(e.Metrics, Metric{"tmd_surface_c", m.TmdC[0], "°C"}, Metric{"tmd_bottom_c", m.TmdC[n-1], "°C"},
		Metric{"largest_departure_c", worst, "°C"})
	ev.add(e)
	s.st.Summary.TmdReached = append(s.st.Summary.TmdReached, onset)
}

// stepTmdCrossing recognises a uniform column passing through its
// temperature of maximum density faster than the held band can see it.
//
// The band rule (every sensor within ±TmdDelta of its Tmd for Hold) needs
// the column to linger: a shallow pond cooling 0.1 °C an hour under a cold
// night crosses the ±0.3 °C band in about 6 hours and can be through it
// before the hold is over (the 3 m pond of the simulator did so in 2 of 20
// seasons). The crossing rule (design choice, no published method): at the
// end of each hour, when the hourly column mean, less the mean Tmd of the
// sensors, changes sign from the previous contiguous hour, and in both hours
// the sensors' departures from their own Tmd differ by at most TmdDelta
// (the column is uniform, so every sensor passes through its Tmd with the
// mean) and the chain covers the column (MinCoverage), the column has
// reached its maximum density. The onset is the crossing time interpolated
// between the two hours' midpoints, or the start of a pending band hold
// when that is earlier. It raises the same max_density_reached, once per
// passage (the same arming as the band rule, so never twice), not under
// inferred ice and not while seasonally stratified. A column that is
// layered when its mean passes Tmd (a lake freezing with its bottom at 5-6 °C
// and inversely layered beneath the ice) is not uniform and raises nothing.
// The seasonal state is left to the band rule: the column is only passing
// through.
func (s *Site) stepTmdCrossing(ev *evCtx, contiguous bool) {
	ss := &s.st.Season
	n := len(s.st.Hours)
	if !contiguous || n < 2 || !ss.MaxDensityArmed || s.st.Ice.On || ss.Current == SeasonStratified || len(s.met.TmdC) == 0 {
		return
	}
	prev, cur := &s.st.Hours[n-2], &s.st.Hours[n-1]
	if !prev.TmdOK || !cur.TmdOK || prev.TmdSpread > s.cfg.Thresholds.TmdDelta || cur.TmdSpread > s.cfg.Thresholds.TmdDelta {
		return
	}
	if (prev.TmdDev > 0) == (cur.TmdDev > 0) {
		return
	}
	f := prev.TmdDev / (prev.TmdDev - cur.TmdDev)
	onset := prev.Start.Add(30*time.Minute + time.Duration(f*float64(time.Hour)))
	if ss.Pending == SeasonMaxDensity && ss.PendingSince.Before(onset) {
		onset = ss.PendingSince
	}
	ss.MaxDensityArmed = false
	dir := "cooling"
	if cur.TmdDev > 0 {
		dir = "warming"
	}
	from := ss.Current
	if from == "" {
		from = SeasonUnknown
	}
	s.maxDensityEvent(ev, from, onset, Profile{Temps: s.col.Temps},
		fmt.Sprintf("uniform column (sensor departures from Tmd within %.2g °C of each other) whose hourly mean passed through its Tmd, %s from %+.2f to %+.2f °C, faster than a %s hold in the ±%.2g °C band",
			s.cfg.Thresholds.TmdDelta, dir, prev.TmdDev, cur.TmdDev, hours(s.cfg.Hold), s.cfg.Thresholds.TmdDelta))
}

// overturnSeason says whether an overturn is a fall or a spring one, from
// the column's own record (no calendar, so either hemisphere):
//   - fall when the column is past its seasonal peak: its mean at least 1 °C
//     below the warmest hourly mean since the column was last at or below
//     Tmd + δ (or since ice-off, the start, or a gap of more than 30 days),
//     that peak being at least 10 days old ("after midsummer");
//   - spring when the column rose to a peak on record less than 10 days ago
//     (it is still warming towards its summer);
//   - otherwise, when no peak is on record — the warmest mean is the first
//     day of the record (or of the data after a gap): the record began on
//     the cooling limb, as a buoy deployed in autumn does — by the trend of
//     the column mean over the projection window (least-squares slope over at
//     least 24 hourly means): cooling is fall, warming is spring;
//   - spring when there is no trend either.
func (s *Site) overturnSeason() (season, basis string) {
	pk := s.st.Peak
	now := s.st.Last
	if pk.OK && pk.MaxC-s.met.MeanTempC >= 1 && now.Sub(pk.Time) >= 10*24*time.Hour {
		return "fall", fmt.Sprintf("column mean %.1f °C below its warmest %.1f °C of %s", pk.MaxC-s.met.MeanTempC, pk.MaxC, pk.Time.Format("2006-01-02"))
	}
	recStart := s.st.Summary.First
	if !s.st.Resumed.IsZero() {
		recStart = s.st.Resumed
	}
	onRecord := pk.OK && pk.Time.Sub(recStart) >= 24*time.Hour
	if onRecord && now.Sub(pk.Time) < 10*24*time.Hour {
		return "spring", fmt.Sprintf("column mean near its warmest so far (%.1f °C on %s)", pk.MaxC, pk.Time.Format("2006-01-02"))
	}
	f := s.st.Fit.Mean
	if f.OK && f.N >= 24 && f.Slope < 0 {
		return "fall", fmt.Sprintf("no seasonal peak on record; column mean cooling at %.2f °C/day over the last %.1f days", -f.Slope, f.SpanDays)
	}
	if f.OK && f.N >= 24 && f.Slope > 0 {
		return "spring", fmt.Sprintf("no seasonal peak on record; column mean warming at %.2f °C/day over the last %.1f days", f.Slope, f.SpanDays)
	}
	return "spring", "column mean not past a seasonal peak and no trend on record"
}
