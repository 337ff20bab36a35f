// Package status serves the read-only status page and JSON API of holomix:
// server-rendered HTML with inline SVG figures (no JavaScript, nothing loaded
// from outside the machine), fed by an in-memory, bounded Store of the latest
// profile and column of every site, a few days of profiles for a depth-time
// heat map, recent events, open episodes, projections and the alert log.
package status

import (
	"math"
	"sort"
	"sync"
	"time"

	"holomix/config"
	"holomix/detect"
)

// Bounds of the store.
const (
	DefaultHistoryDays = 10
	maxHistoryDays     = 60
	eventsPerSite      = 200
	alertLines         = 200
	maxSites           = 256
	// histPerDay is the most profiles per day kept for the heat map (one per
	// 5 minutes); faster data is thinned to the last profile of each slot.
	histPerDay = 288
)

// SiteMeta is what the page knows about a site before any data arrive.
type SiteMeta struct {
	ID, Name string
	MaxDepth float64 // m; 0 = deepest sensor seen
	Intakes  []config.Intake
	Depths   []float64 // configured sensor depths, m
}

// AlertLine is one line of the alert log: an alert and what became of its delivery.
type AlertLine struct {
	Time      time.Time `json:"time"` // event (data) time
	Site      string    `json:"site"`
	Kind      string    `json:"kind"`
	Status    string    `json:"status"` // firing | resolved | update
	Receiver  string    `json:"receiver"`
	Summary   string    `json:"summary"`
	Delivered bool      `json:"delivered"`
	Error     string    `json:"error,omitempty"` // last delivery error when not delivered
}

// Health is the daemon's own state shown on the overview.
type Health struct {
	BrokerConnected bool
	SpoolDepth      int           // readings waiting in the spool
	SpoolOldest     time.Duration // age of the oldest spooled reading
	DBReachable     bool
	// DBNotConfigured says that no database is configured (readings stay
	// spooled): the page says so instead of flagging it unreachable.
	DBNotConfigured   bool
	PendingDeliveries int
	FailedDeliveries  int
	Extra             map[string]string
}

// Counters count what the store was given and what it refused.
type Counters struct {
	Columns      int `json:"columns"`       // columns accepted
	Ignored      int `json:"ignored"`       // columns of ignored (out-of-order) profiles
	Rejected     int `json:"rejected"`      // columns of rejected profiles (shown as such)
	Events       int `json:"events"`        // events accepted
	Alerts       int `json:"alerts"`        // alert lines accepted
	UnknownSites int `json:"unknown_sites"` // sites added because data named them
	Dropped      int `json:"dropped"`       // inputs refused: no site id, or too many sites
}

type episodeKey struct {
	kind    detect.Kind
	subject string
}

// episodic reports the kinds whose episodes end with a resolved event. Other
// kinds mark a seasonal transition and are shown as the seasonal state.
func episodic(k detect.Kind) bool {
	switch k {
	case detect.KindIntakeChange, detect.KindIntakeOverturnRisk, detect.KindFrazilRisk, detect.KindSensorFault:
		return true
	}
	return false
}

type histPoint struct {
	t      time.Time
	depths []float64
	temps  []float64
}

type siteData struct {
	meta     SiteMeta
	col      detect.Column
	prof     detect.Profile
	has      bool
	received time.Time // wall time the latest column arrived

	rejReason   string
	rejTime     time.Time
	rejReceived time.Time

	seasonal      string
	seasonalSince time.Time // data time the seasonal state last changed

	hist []histPoint // ascending by time

	events  []detect.Event // ring, oldest first after compaction
	open    map[episodeKey]detect.Event
	maxSeen float64 // deepest sensor seen, m
}

// Store holds what the status page shows. It is safe for concurrent use and
// bounded in memory: per site one latest column, at most histPerDay profiles
// per day of history, 200 events; 200 alert lines overall.
type Store struct {
	mu       sync.RWMutex
	now      func() time.Time
	window   time.Duration
	slot     time.Duration
	sites    []*siteData
	byID     map[string]*siteData
	alerts   []AlertLine
	counters Counters
}

// NewStore makes a store for the given sites keeping historyDays days of
// profiles for the heat map (0 or less: DefaultHistoryDays; at most 60).
func NewStore(sites []SiteMeta, historyDays int) *Store {
	if historyDays <= 0 {
		historyDays = DefaultHistoryDays
	}
	if historyDays > maxHistoryDays {
		historyDays = maxHistoryDays
	}
	s := &Store{
		now:    time.Now,
		window: time.Duration(historyDays) * 24 * time.Hour,
		slot:   24 * time.Hour / histPerDay,
		byID:   map[string]*siteData{},
	}
	for _, m := range sites {
		if m.ID == "" || s.byID[m.ID] != nil || len(s.sites) >= maxSites {
			s.counters.Dropped++
			continue
		}
		s.addSite(m)
	}
	return s
}

// SetClock replaces the wall clock used for data freshness (tests, replays).
func (s *Store) SetClock(now func() time.Time) {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.now = now
}

// HistoryWindow is the span of profiles kept for the heat map.
func (s *Store) HistoryWindow() time.Duration { return s.window }

func (s *Store) addSite(m SiteMeta) *siteData {
	m.Intakes = append([]config.Intake(nil), m.Intakes...)
	m.Depths = append([]float64(nil), m.Depths...)
	if m.Name == "" {
		m.Name = m.ID
	}
	d := &siteData{meta: m, open: map[episodeKey]detect.Event{}}
	s.sites = append(s.sites, d)
	s.byID[m.ID] = d
	return d
}

// site returns the site, adding an unknown one (counted) while room is left.
// Callers hold the write lock.
func (s *Store) site(id string) *siteData {
	if id == "" {
		s.counters.Dropped++
		return nil
	}
	if d := s.byID[id]; d != nil {
		return d
	}
	if len(s.sites) >= maxSites {
		s.counters.Dropped++
		return nil
	}
	s.counters.UnknownSites++
	return s.addSite(SiteMeta{ID: id})
}

// ObserveColumn records the column derived from profile p. Ignored columns
// (State "") are counted only; rejected ones are kept as the last rejection.
func (s *Store) ObserveColumn(c detect.Column, p detect.Profile) {
	s.mu.Lock()
	defer s.mu.Unlock()
	id := c.Site
	if id == "" {
		id = p.Site
	}
	if c.State == "" && !c.Rejected {
		s.counters.Ignored++
		return
	}
	d := s.site(id)
	if d == nil {
		return
	}
	now := s.now()
	if c.Rejected {
		s.counters.Rejected++
		d.rejReason, d.rejTime, d.rejReceived = c.Reason, c.Time.UTC(), now
		return
	}
	s.counters.Columns++
	p.Depths = append([]float64(nil), p.Depths...)
	p.Temps = append([]float64(nil), p.Temps...)
	p.Expected = append([]float64(nil), p.Expected...)
	if !d.has || !c.Time.Before(d.col.Time) {
		d.col, d.prof, d.has, d.received = copyColumn(c), p, true, now
	}
	if c.Seasonal != d.seasonal {
		d.seasonal, d.seasonalSince = c.Seasonal, c.Time.UTC()
	}
	for _, z := range p.Depths {
		if z > d.maxSeen {
			d.maxSeen = z
		}
	}
	s.addHistory(d, histPoint{t: c.Time.UTC(), depths: p.Depths, temps: p.Temps})
}

func copyColumn(c detect.Column) detect.Column {
	c.Metrics.DensityKgM3 = append([]float64(nil), c.Metrics.DensityKgM3...)
	c.Metrics.TmdC = append([]float64(nil), c.Metrics.TmdC...)
	c.Metrics.N2 = append([]float64(nil), c.Metrics.N2...)
	c.Projections = append([]detect.Projection(nil), c.Projections...)
	c.Missing = append([]float64(nil), c.Missing...)
	c.Intakes = append([]detect.IntakeStatus(nil), c.Intakes...)
	return c
}

// addHistory appends a profile, thinning to one per slot and dropping what
// falls out of the window.
func (s *Store) addHistory(d *siteData, h histPoint) {
	n := len(d.hist)
	switch {
	case n == 0 || h.t.After(d.hist[n-1].t):
		if n > 0 && h.t.Truncate(s.slot).Equal(d.hist[n-1].t.Truncate(s.slot)) {
			d.hist[n-1] = h
		} else {
			d.hist = append(d.hist, h)
		}
	default:
		// Late profile: insert in order (rare; replays are ordered).
		i := sort.Search(n, func(i int) bool { return !d.hist[i].t.Before(h.t) })
		if i < n && d.hist[i].t.Equal(h.t) {
			d.hist[i] = h
		} else {
			d.hist = append(d.hist, histPoint{})
			copy(d.hist[i+1:], d.hist[i:])
			d.hist[i] = h
		}
	}
	newest := d.hist[len(d.hist)-1].t
	cut := 0
	for cut < len(d.hist) && d.hist[cut].t.Before(newest.Add(-s.window)) {
		cut++
	}
	if cut > 0 {
		d.hist = append(d.hist[:0], d.hist[cut:]...)
	}
	limit := int(s.window/s.slot) + 1
	if len(d.hist) > limit {
		d.hist = append(d.hist[:0], d.hist[len(d.hist)-limit:]...)
	}
}

// ObserveEvent records an event and keeps the site's open episodes.
func (s *Store) ObserveEvent(e detect.Event) {
	s.mu.Lock()
	defer s.mu.Unlock()
	d := s.site(e.Site)
	if d == nil {
		return
	}
	s.counters.Events++
	e = copyEvent(e)
	d.events = append(d.events, e)
	if len(d.events) > eventsPerSite {
		d.events = append(d.events[:0], d.events[len(d.events)-eventsPerSite:]...)
	}
	if !episodic(e.Kind) {
		return
	}
	k := episodeKey{e.Kind, e.Subject}
	switch e.Status {
	case detect.StatusResolved:
		delete(d.open, k)
	default:
		if prev, ok := d.open[k]; ok && e.Status == detect.StatusUpdate {
			// Keep the onset of the episode; show the newest detail.
			if e.Details == nil {
				e.Details = map[string]string{}
			}
			if _, ok := e.Details["episode_start"]; !ok {
				e.Details["episode_start"] = episodeStart(prev).Format(time.RFC3339)
			}
		}
		d.open[k] = e
	}
}

func episodeStart(e detect.Event) time.Time {
	if v, ok := e.Details["episode_start"]; ok {
		if t, err := time.Parse(time.RFC3339, v); err == nil {
			return t
		}
	}
	return e.Time
}

func copyEvent(e detect.Event) detect.Event {
	e.Time = e.Time.UTC()
	e.Metrics = append([]detect.Metric(nil), e.Metrics...)
	e.Projections = append([]detect.Projection(nil), e.Projections...)
	if e.Details != nil {
		m := make(map[string]string, len(e.Details))
		for k, v := range e.Details {
			m[k] = v
		}
		e.Details = m
	}
	return e
}

// ObserveAlert records one alert log line.
func (s *Store) ObserveAlert(a AlertLine) {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.counters.Alerts++
	a.Time = a.Time.UTC()
	s.alerts = append(s.alerts, a)
	if len(s.alerts) > alertLines {
		s.alerts = append(s.alerts[:0], s.alerts[len(s.alerts)-alertLines:]...)
	}
}

// Counters returns the input counters.
func (s *Store) Counters() Counters {
	s.mu.RLock()
	defer s.mu.RUnlock()
	return s.counters
}

// siteView is a consistent copy of one site for rendering, taken under the lock.
type siteView struct {
	Meta          SiteMeta
	Has           bool
	Col           detect.Column
	Prof          detect.Profile
	Received      time.Time
	RejReason     string
	RejTime       time.Time
	Seasonal      string
	SeasonalSince time.Time
	Hist          []histPoint
	Events        []detect.Event // oldest first
	Open          []detect.Event // by onset
	MaxDepth      float64
}

func (s *Store) view(d *siteData, withHistory bool) siteView {
	v := siteView{
		Meta: d.meta, Has: d.has, Col: d.col, Prof: d.prof, Received: d.received,
		RejReason: d.rejReason, RejTime: d.rejTime, Seasonal: d.seasonal, SeasonalSince: d.seasonalSince,
		Events: append([]detect.Event(nil), d.events...),
	}
	if withHistory {
		// histPoint slices are never modified after insertion: sharing them is safe.
		v.Hist = append([]histPoint(nil), d.hist...)
	}
	for _, e := range d.open {
		v.Open = append(v.Open, e)
	}
	sort.Slice(v.Open, func(i, j int) bool {
		a, b := episodeStart(v.Open[i]), episodeStart(v.Open[j])
		if !a.Equal(b) {
			return a.Before(b)
		}
		return v.Open[i].Kind < v.Open[j].Kind
	})
	v.MaxDepth = d.meta.MaxDepth
	if !(v.MaxDepth > 0) {
		v.MaxDepth = math.Max(d.maxSeen, maxOf(d.meta.Depths))
	}
	return v
}

func maxOf(xs []float64) float64 {
	m := 0.0
	for _, x := range xs {
		if x > m {
			m = x
		}
	}
	return m
}

// snapshot copies every site (without history) and the alert log.
func (s *Store) snapshot() ([]siteView, []AlertLine, Counters, time.Time) {
	s.mu.RLock()
	defer s.mu.RUnlock()
	out := make([]siteView, 0, len(s.sites))
	for _, d := range s.sites {
		out = append(out, s.view(d, false))
	}
	return out, append([]AlertLine(nil), s.alerts...), s.counters, s.now()
}

// siteSnapshot copies one site with history, its alert lines, and the clock.
func (s *Store) siteSnapshot(id string) (siteView, []AlertLine, time.Time, bool) {
	s.mu.RLock()
	defer s.mu.RUnlock()
	d := s.byID[id]
	if d == nil {
		return siteView{}, nil, time.Time{}, false
	}
	var al []AlertLine
	for _, a := range s.alerts {
		if a.Site == id {
			al = append(al, a)
		}
	}
	return s.view(d, true), al, s.now(), true
}
