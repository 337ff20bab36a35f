package sim

import (
	"fmt"
	"math"
	"math/rand/v2"
	"sync"
	"time"

	"holomix/detect/water"
	"holomix/ingest"
)

// Interval is a span of model time; a zero End means still open.
type Interval struct {
	Start time.Time `json:"start"`
	End   time.Time `json:"end"`
}

// IceEpisode is one continuous ice cover.
type IceEpisode struct {
	On   time.Time `json:"on"`
	Off  time.Time `json:"off"`   // zero while the ice lasts
	MaxM float64   `json:"max_m"` // greatest thickness, m
	// BottomC is the temperature of the bottom layer when the ice formed, °C:
	// near Tmd for a lake that froze cryostratified, lower for one that kept
	// mixing below Tmd before it froze.
	BottomC float64 `json:"bottom_c"`
	// MixedAfter is the first time after Off that the surface mixed layer
	// reached the bottom (spring overturn), zero if not (yet).
	MixedAfter time.Time `json:"mixed_after"`
}

// SiteTruth is what really happened in one simulated lake, from the model's
// full column (every layer), not from the sensors.
type SiteTruth struct {
	Site string `json:"site"`
	// StratifiedAtStart: bottom − surface potential density > 0.1 kg/m³ with
	// a warmer surface at the start (SCIENCE.md §5 'stratified').
	StratifiedAtStart bool `json:"stratified_at_start"`
	// FallMixed is the first time, after direct stratification and before any
	// ice, that |bottom − surface potential density| < 0.1 kg/m³.
	FallMixed time.Time `json:"fall_mixed"`
	// FallOverturn is the first time, after direct stratification and before
	// any ice, that the surface mixed layer (wind or convection) reached the bottom.
	FallOverturn time.Time `json:"fall_overturn"`
	// MaxDensity is the first time, before any ice, that every layer was
	// within 0.3 °C of its own Tmd (Chen & Millero 1986 at its pressure).
	MaxDensity time.Time `json:"max_density"`
	// Inverse is the first onset of inverse stratification: top layer at least
	// 0.1 °C colder than the bottom layer, bottom ≤ its Tmd.
	Inverse time.Time `json:"inverse"`
	// IceOn and IceOff bound the longest ice episode; SpringOverturn is the
	// first full-depth mixing after it. Zero when it did not happen (yet).
	IceOn          time.Time    `json:"ice_on"`
	IceOff         time.Time    `json:"ice_off"`
	SpringOverturn time.Time    `json:"spring_overturn"`
	MaxIceM        float64      `json:"max_ice_m"`
	IceEpisodes    []IceEpisode `json:"ice_episodes"`
	// Readings counts readings reported; Dropped counts single readings
	// lost; Outages lists times when the whole buoy was silent.
	Readings int        `json:"readings"`
	Dropped  int        `json:"dropped"`
	Outages  []Interval `json:"outages"`
}

// InjectedFault is a configured fault and what became of it.
type InjectedFault struct {
	Fault
	First    time.Time `json:"first"`    // first affected reading delivered (zero: not yet)
	Last     time.Time `json:"last"`     // last affected reading delivered
	Readings int       `json:"readings"` // affected readings delivered
	ValueC   float64   `json:"value_c"`  // stuck: the repeated value; spike: the reported value
}

// Truth is the simulator's record of what really happened.
type Truth struct {
	Start  time.Time       `json:"start"`
	Now    time.Time       `json:"now"`
	Sites  []SiteTruth     `json:"sites"`
	Faults []InjectedFault `json:"faults"`
}

// Budget is the energy bookkeeping of one column (J).
type Budget struct {
	SurfaceInJ      float64 // energy that entered through the surface since the start
	HeatChangeJ     float64 // change in water enthalpy minus latent heat stored in ice
	IceLatentJ      float64 // latent heat stored in the present ice, ρ_ice L h A0
	SurfaceAreaM2   float64
	ColumnVolumeM3  float64
	IceThicknessM   float64
	MixedLayerDepth float64 // m, depth of the surface mixed layer at the last step
}

type siteState struct {
	spec  SiteSpec
	col   *column
	rng   *rand.Rand
	truth SiteTruth

	stratified  bool // has been directly stratified since the last ice
	iceSeen     bool
	outageUntil time.Time
}

// Sim is a running simulation. It is safe for concurrent use.
type Sim struct {
	mu     sync.Mutex
	sc     Scenario
	err    error
	w      *weather
	sites  []*siteState
	byID   map[string]int
	now    time.Time
	steps  int64
	every  int64 // report every this many steps
	faults []InjectedFault
}

// New builds a simulator. An invalid scenario gives a simulator whose Err
// reports the problem and whose Step does nothing; use NewChecked to get the
// error at once.
func New(sc Scenario) *Sim {
	s, err := NewChecked(sc)
	if err != nil {
		return &Sim{err: err, byID: map[string]int{}, now: sc.Start.UTC()}
	}
	return s
}

// NewChecked is New with the scenario's validation error returned.
func NewChecked(sc Scenario) (*Sim, error) {
	sc, err := sc.withDefaults()
	if err != nil {
		return nil, err
	}
	s := &Sim{
		sc:    sc,
		w:     newWeather(sc),
		byID:  map[string]int{},
		now:   sc.Start,
		every: int64(sc.Report / sc.Step),
	}
	for i, spec := range sc.Sites {
		st := &siteState{
			spec:  spec,
			col:   newColumn(spec, sc.SnowResistance),
			rng:   rand.New(rand.NewPCG(uint64(sc.Seed), uint64(1000+i))),
			truth: SiteTruth{Site: spec.ID},
		}
		st.observe(s.now)
		st.truth.StratifiedAtStart = st.stratified
		s.sites = append(s.sites, st)
		s.byID[spec.ID] = i
	}
	for _, f := range sc.Faults {
		s.faults = append(s.faults, InjectedFault{Fault: f})
	}
	return s, nil
}

// Err reports a scenario error from New (nil for a valid scenario).
func (s *Sim) Err() error {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.err
}

// Now returns the model time.
func (s *Sim) Now() time.Time {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.now
}

// Scenario returns the scenario with its defaults applied.
func (s *Sim) Scenario() Scenario {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.sc
}

// Sites returns the site specifications with defaults applied.
func (s *Sim) Sites() []SiteSpec {
	s.mu.Lock()
	defer s.mu.Unlock()
	out := make([]SiteSpec, len(s.sites))
	for i, st := range s.sites {
		out[i] = st.spec
	}
	return out
}

// Step advances the model by one step and returns the new model time and
// the readings the buoys report at that time (none between report times).
func (s *Sim) Step() (time.Time, []ingest.Reading) {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.err != nil {
		return s.now, nil
	}
	dt := s.sc.Step
	s.now = s.now.Add(dt)
	s.steps++
	s.w.advance(s.now, dt)
	for _, st := range s.sites {
		f := forcing{
			airC:   s.w.airC + st.spec.AirOffsetC,
			windMS: s.w.windMS,
			cloud:  s.w.cloudFr,
			swDown: s.w.swDownWm,
			relHum: s.sc.RelHumidity,
		}
		st.col.step(f, dt.Seconds())
		st.observe(s.now)
	}
	if s.steps%s.every != 0 {
		return s.now, nil
	}
	var out []ingest.Reading
	for _, st := range s.sites {
		out = s.report(st, out)
	}
	return s.now, out
}

// observe updates the site's truth from the full model column at time t.
func (st *siteState) observe(t time.Time) {
	c := st.col
	tr := &st.truth
	top, bot := c.T[0], c.T[c.n-1]
	rTop, _ := water.Density(c.sal, top, 0)
	rBot, _ := water.Density(c.sal, bot, 0)
	diff := rBot - rTop
	iceNow := c.ice > 0
	if diff > 0.1 && top > bot && !iceNow {
		st.stratified = true
	}
	if !st.iceSeen && st.stratified {
		if tr.FallMixed.IsZero() && math.Abs(diff) < 0.1 {
			tr.FallMixed = t
		}
		if tr.FallOverturn.IsZero() && c.lastMixedIdx == c.n-1 {
			tr.FallOverturn = t
		}
	}
	if !st.iceSeen && tr.MaxDensity.IsZero() {
		all := true
		for i, v := range c.T {
			if math.Abs(v-c.tmd[i]) > 0.3 {
				all = false
				break
			}
		}
		if all {
			tr.MaxDensity = t
		}
	}
	if tr.Inverse.IsZero() && bot-top >= 0.1 && bot <= c.tmd[c.n-1] {
		tr.Inverse = t
	}
	// Ice episodes.
	n := len(tr.IceEpisodes)
	open := n > 0 && tr.IceEpisodes[n-1].Off.IsZero()
	switch {
	case iceNow && !open:
		tr.IceEpisodes = append(tr.IceEpisodes, IceEpisode{On: t, MaxM: c.ice, BottomC: bot})
		st.iceSeen = true
		st.stratified = false
	case iceNow && open:
		if c.ice > tr.IceEpisodes[n-1].MaxM {
			tr.IceEpisodes[n-1].MaxM = c.ice
		}
	case !iceNow && open:
		tr.IceEpisodes[n-1].Off = t
	case !iceNow && n > 0 && tr.IceEpisodes[n-1].MixedAfter.IsZero() && c.lastMixedIdx == c.n-1:
		tr.IceEpisodes[n-1].MixedAfter = t
	}
	if c.ice > tr.MaxIceM {
		tr.MaxIceM = c.ice
	}
	// The longest episode is the season's ice cover.
	var best *IceEpisode
	var bestLen time.Duration
	for i := range tr.IceEpisodes {
		e := &tr.IceEpisodes[i]
		end := e.Off
		if end.IsZero() {
			end = t
		}
		if l := end.Sub(e.On); best == nil || l > bestLen {
			best, bestLen = e, l
		}
	}
	if best != nil {
		tr.IceOn, tr.IceOff, tr.SpringOverturn = best.On, best.Off, best.MixedAfter
	}
}

// report samples the buoy of one site at s.now.
func (s *Sim) report(st *siteState, out []ingest.Reading) []ingest.Reading {
	t := s.now
	if t.Before(st.outageUntil) {
		return out
	}
	if s.sc.OutageProb > 0 && st.rng.Float64() < s.sc.OutageProb {
		d := time.Hour + time.Duration(st.rng.Float64()*3*float64(time.Hour))
		st.outageUntil = t.Add(d)
		st.truth.Outages = append(st.truth.Outages, Interval{Start: t, End: st.outageUntil})
		return out
	}
	for _, z := range st.spec.SensorDepths {
		v := st.col.sample(z)
		if s.sc.NoiseC > 0 {
			v += s.sc.NoiseC * st.rng.NormFloat64()
		}
		v = math.Round(v*1000) / 1000
		// Draw the dropout for every reading so that faults do not shift the random stream.
		drop := s.sc.DropoutProb > 0 && st.rng.Float64() < s.sc.DropoutProb
		v, faulted := s.applyFaults(st.spec.ID, z, t, v)
		if drop && !faulted {
			st.truth.Dropped++
			continue
		}
		st.truth.Readings++
		out = append(out, ingest.Reading{Site: st.spec.ID, Depth: z, Time: t, TempC: v})
	}
	return out
}

// applyFaults changes the value of a reading that an injected fault affects.
// A faulted reading is never dropped, so every fault shows in the data.
func (s *Sim) applyFaults(site string, depth float64, t time.Time, v float64) (float64, bool) {
	for i := range s.faults {
		f := &s.faults[i]
		if f.Site != site || math.Abs(f.Depth-depth) > 1e-9 || t.Before(f.At) {
			continue
		}
		switch f.Kind {
		case FaultStuck:
			if !t.Before(f.At.Add(f.Duration)) {
				continue
			}
			if f.Readings == 0 {
				f.ValueC = v
				f.First = t
			}
			f.Last = t
			f.Readings++
			return f.ValueC, true
		case FaultSpike:
			if f.Readings > 0 {
				continue
			}
			v = math.Round((v+f.OffsetC)*1000) / 1000
			f.ValueC, f.First, f.Last, f.Readings = v, t, t, 1
			return v, true
		}
	}
	return v, false
}

// Truth returns a copy of what really happened so far.
func (s *Sim) Truth() Truth {
	s.mu.Lock()
	defer s.mu.Unlock()
	tr := Truth{Start: s.sc.Start, Now: s.now}
	for _, st := range s.sites {
		t := st.truth
		t.IceEpisodes = append([]IceEpisode(nil), t.IceEpisodes...)
		t.Outages = append([]Interval(nil), t.Outages...)
		tr.Sites = append(tr.Sites, t)
	}
	tr.Faults = append([]InjectedFault(nil), s.faults...)
	return tr
}

func (s *Sim) site(id string) (*siteState, bool) {
	i, ok := s.byID[id]
	if !ok {
		return nil, false
	}
	return s.sites[i], true
}

// AirTemp returns the air temperature (°C) at the site at the model time,
// NaN for an unknown site.
func (s *Sim) AirTemp(site string) float64 {
	s.mu.Lock()
	defer s.mu.Unlock()
	st, ok := s.site(site)
	if !ok {
		return math.NaN()
	}
	return s.w.airC + st.spec.AirOffsetC
}

// Wind returns the wind speed (m/s) over the site (regional wind times the
// site's exposure), NaN for an unknown site.
func (s *Sim) Wind(site string) float64 {
	s.mu.Lock()
	defer s.mu.Unlock()
	st, ok := s.site(site)
	if !ok {
		return math.NaN()
	}
	return s.w.windMS * st.col.wind
}

// Column returns a copy of the model layer temperatures (°C), top first, or
// nil for an unknown site. Layers gives the matching centre depths.
func (s *Sim) Column(site string) []float64 {
	s.mu.Lock()
	defer s.mu.Unlock()
	st, ok := s.site(site)
	if !ok {
		return nil
	}
	return append([]float64(nil), st.col.T...)
}

// Layers returns the layer centre depths (m), or nil for an unknown site.
func (s *Sim) Layers(site string) []float64 {
	s.mu.Lock()
	defer s.mu.Unlock()
	st, ok := s.site(site)
	if !ok {
		return nil
	}
	return append([]float64(nil), st.col.zc...)
}

// Ice returns the ice thickness (m) at the site (0 for open water or an unknown site).
func (s *Sim) Ice(site string) float64 {
	s.mu.Lock()
	defer s.mu.Unlock()
	st, ok := s.site(site)
	if !ok {
		return 0
	}
	return st.col.ice
}

// Budget returns the energy bookkeeping of the site's column.
func (s *Sim) Budget(site string) (Budget, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	st, ok := s.site(site)
	if !ok {
		return Budget{}, fmt.Errorf("sim: unknown site %q", site)
	}
	c := st.col
	var vol float64
	for _, v := range c.vol {
		vol += v
	}
	return Budget{
		SurfaceInJ:      c.surfaceIn,
		HeatChangeJ:     c.heatContent() - c.heat0,
		IceLatentJ:      rhoIce * latentFus * c.ice * c.area0,
		SurfaceAreaM2:   c.area0,
		ColumnVolumeM3:  vol,
		IceThicknessM:   c.ice,
		MixedLayerDepth: float64(c.lastMixedIdx+1) * c.dz,
	}, nil
}
