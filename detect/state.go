package detect

import (
	"encoding/json"
	"fmt"
	"time"
)

// stateVersion is the version of the MarshalState format. Version 1 (before
// data gaps, ice periods and seasonal stratification were kept) is still read.
const stateVersion = 2

// SeasonSummary is a site's season as seen by the detectors (for
// `holomix replay`). Times are the estimated onsets of each change.
type SeasonSummary struct {
	Site           string         `json:"site"`
	First          time.Time      `json:"first"` // first accepted profile
	Last           time.Time      `json:"last"`  // last accepted profile
	StratifiedFrom []time.Time    `json:"stratified_from"`
	StratifiedTo   []time.Time    `json:"stratified_to"`
	Overturns      []OverturnInfo `json:"overturns"`
	TmdReached     []time.Time    `json:"tmd_reached"`
	IceOn          []time.Time    `json:"ice_on"`
	IceOff         []time.Time    `json:"ice_off"` // inferred ice-off only (never the end of data)
	// IceDays is the sum of the IcePeriods' days: each period ends at its
	// ice-off, at the last profile before a data gap, or at Last; no period
	// spans a gap. Per-winter figures are in IcePeriods.
	IceDays float64 `json:"ice_days"`
	// IcePeriods lists each stretch of inferred ice cover with how it ended.
	IcePeriods []IcePeriod `json:"ice_periods"`
	// Gaps lists the silences longer than SiteConfig.MaxGap; after each, the
	// detectors started afresh.
	Gaps []DataGap `json:"gaps"`
	// TransientStratified counts stratified stretches shorter than
	// SiteConfig.MinStratified (no stratification_onset or overturn raised).
	TransientStratified int `json:"transient_stratified"`
	SensorFaults        int `json:"sensor_faults"`
	Profiles            int `json:"profiles"`
}

// How an IcePeriod ended.
const (
	IceEndOff    = "ice_off"       // ice-off inferred from the water temperatures
	IceEndGap    = "data gap"      // the data stopped for longer than MaxGap: ice no longer followed
	IceEndRecord = "end of record" // still inferred at the last profile
)

// IcePeriod is one stretch of inferred ice cover. To is the inferred ice-off,
// the last profile before a data gap, or the last profile of the record
// (End says which); Days is To − From in days.
type IcePeriod struct {
	From time.Time `json:"from"`
	To   time.Time `json:"to"`
	End  string    `json:"end"`
	Days float64   `json:"days"`
}

// Ongoing reports whether the ice was still inferred when its data ended
// (at a data gap or at the end of the record).
func (p IcePeriod) Ongoing() bool { return p.End != IceEndOff }

// DataGap is a silence longer than SiteConfig.MaxGap: From is the last
// profile before it, To the first after it.
type DataGap struct {
	From time.Time `json:"from"`
	To   time.Time `json:"to"`
}

// OverturnInfo is one overturn of the season.
type OverturnInfo struct {
	Time     time.Time `json:"time"`     // estimated onset (start of the hold)
	Detected time.Time `json:"detected"` // data time of the event
	Season   string    `json:"season"`   // fall | spring
}

// siteState is everything a Site remembers between profiles; MarshalState
// writes it as JSON. No field may hold NaN (JSON has no NaN): validity is
// carried by the OK flags.
type siteState struct {
	Version  int           `json:"version"`
	Site     string        `json:"site"`
	Last     time.Time     `json:"last"`
	Ignored  int           `json:"ignored"`
	Rejected int           `json:"rejected"`
	Slots    []slotState   `json:"slots"`
	Season   seasonState   `json:"season"`
	Bin      binState      `json:"bin"`
	Hours    []hourRec     `json:"hours"`
	Ice      iceState      `json:"ice"`
	Fit      fitState      `json:"fit"`
	Peak     peakState     `json:"peak"`
	Intakes  []intakeState `json:"intakes"`
	Surface  rateRing      `json:"surface"`
	Frazil   frazilState   `json:"frazil"`
	Air      airObs        `json:"air"`
	Summary  SeasonSummary `json:"summary"`
	// Resumed is the first profile after the last data gap (zero: none).
	Resumed time.Time `json:"resumed"`
}

type airObs struct {
	Time time.Time `json:"time"`
	C    float64   `json:"c"`
	OK   bool      `json:"ok"`
}

func newSiteState(c SiteConfig) siteState {
	st := siteState{Version: stateVersion, Site: c.ID}
	st.Summary.Site = c.ID
	for _, z := range c.Expected {
		if st.slotIndex(z) < 0 {
			st.insertSlot(z, time.Time{}, true)
		}
	}
	st.Season.MaxDensityArmed = true
	st.Season.InverseArmed = true
	for _, k := range c.Intakes {
		st.Intakes = append(st.Intakes, intakeState{Name: k.Name})
	}
	return st
}

// MarshalState returns the site's state as JSON: everything needed for a
// restarted Site (RestoreState) to continue without repeating or missing an
// event, given the profiles after the last one processed.
func (s *Site) MarshalState() ([]byte, error) {
	for i := range s.st.Intakes {
		s.st.Intakes[i].Ring.compact()
	}
	s.st.Surface.compact()
	b, err := json.Marshal(&s.st)
	if err != nil {
		return nil, fmt.Errorf("detect: marshal state of site %q: %w", s.cfg.ID, err)
	}
	return b, nil
}

// RestoreState replaces the site's state with one written by MarshalState.
// Configured sensor depths and intakes are reconciled with the current
// configuration: a new intake starts fresh, a removed one is dropped.
func (s *Site) RestoreState(b []byte) error {
	var st siteState
	if err := json.Unmarshal(b, &st); err != nil {
		return fmt.Errorf("detect: restore state of site %q: %w", s.cfg.ID, err)
	}
	switch st.Version {
	case stateVersion:
	case 1:
		migrateV1(&st)
	default:
		return fmt.Errorf("detect: restore state of site %q: version %d, want %d", s.cfg.ID, st.Version, stateVersion)
	}
	if st.Site != s.cfg.ID {
		return fmt.Errorf("detect: restore state of site %q: state belongs to site %q", s.cfg.ID, st.Site)
	}
	if len(s.cfg.Expected) > 0 {
		for i := range st.Slots {
			st.Slots[i].Expected = false
		}
		for _, z := range s.cfg.Expected {
			i := st.slotIndex(z)
			if i < 0 {
				i = st.insertSlot(z, st.Last, true)
			}
			st.Slots[i].Expected = true
		}
	}
	old := map[string]intakeState{}
	for _, k := range st.Intakes {
		old[k.Name] = k
	}
	st.Intakes = st.Intakes[:0:0]
	for _, k := range s.cfg.Intakes {
		if o, ok := old[k.Name]; ok {
			st.Intakes = append(st.Intakes, o)
		} else {
			st.Intakes = append(st.Intakes, intakeState{Name: k.Name})
		}
	}
	s.st = st
	s.present = make([]int, len(st.Slots))
	for i := range s.present {
		s.present[i] = -1
	}
	return nil
}

// migrateV1 upgrades a version 1 state: a stratified stretch it holds was
// announced under the rules of version 1 (it counts as seasonal), and the ice
// periods are rebuilt from the ice-on and ice-off times.
func migrateV1(st *siteState) {
	st.Version = stateVersion
	if st.Season.Current == SeasonStratified {
		st.Season.StratConfirmed = true
	}
	sum := &st.Summary
	sum.IcePeriods = nil
	for i, on := range sum.IceOn {
		p := IcePeriod{From: on}
		if i < len(sum.IceOff) {
			p.To, p.End = sum.IceOff[i], IceEndOff
		}
		sum.IcePeriods = append(sum.IcePeriods, p)
	}
}

// Summary returns the season so far (a copy).
func (s *Site) Summary() SeasonSummary {
	in := s.st.Summary
	out := in
	out.StratifiedFrom = append([]time.Time(nil), in.StratifiedFrom...)
	out.StratifiedTo = append([]time.Time(nil), in.StratifiedTo...)
	out.Overturns = append([]OverturnInfo(nil), in.Overturns...)
	out.TmdReached = append([]time.Time(nil), in.TmdReached...)
	out.IceOn = append([]time.Time(nil), in.IceOn...)
	out.IceOff = append([]time.Time(nil), in.IceOff...)
	out.Gaps = append([]DataGap(nil), in.Gaps...)
	out.IcePeriods = append([]IcePeriod(nil), in.IcePeriods...)
	days := 0.0
	for i := range out.IcePeriods {
		p := &out.IcePeriods[i]
		if p.End == "" { // still open
			p.To, p.End = in.Last, IceEndRecord
		}
		p.Days = 0
		if p.To.After(p.From) {
			p.Days = p.To.Sub(p.From).Hours() / 24
		}
		days += p.Days
	}
	out.IceDays = days
	return out
}
