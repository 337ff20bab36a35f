// Package engine is the one detection path that live ingestion and replay
// share: quality-controlled readings are assembled into profiles per site
// (ingest.Assembler) and each profile goes through the site's seasonal
// detectors (detect.Site); column metrics and events go to a Sink. Nothing in
// it knows where the readings came from, so a replayed year gives the same
// events as the live daemon did.
package engine

import (
	"encoding/binary"
	"encoding/json"
	"fmt"
	"iter"
	"math"
	"slices"
	"sort"
	"strings"
	"time"

	"holomix/config"
	"holomix/detect"
	"holomix/ingest"
)

// Sink receives what detection derives. Column is called once per profile;
// the Profile's slices are reused after the call (copy what you keep). Event
// is called for every event, in data-time order per site.
type Sink interface {
	Column(c detect.Column, p detect.Profile)
	Event(e detect.Event)
}

// Stats counts what went through an Engine.
type Stats struct {
	Readings   int64 `json:"readings"`    // readings passed to Add
	Unusable   int64 `json:"unusable"`    // of which carried an excluding QC flag
	Late       int64 `json:"late"`        // of which arrived after their profile was emitted
	Profiles   int64 `json:"profiles"`    // profiles detected
	Events     int64 `json:"events"`      // events raised
	Air        int64 `json:"air"`         // air temperatures passed on to a site
	AirDropped int64 `json:"air_dropped"` // air temperatures for a site with no configuration and no data yet
	Rebuilt    int64 `json:"rebuilt"`     // sites created from data rebuilt for a deeper sensor
}

// Engine assembles and detects. It is not safe for concurrent use: the live
// daemon feeds it from one goroutine.
type Engine struct {
	cfg      *config.Config
	detect   config.Detect
	sink     Sink
	asm      *ingest.Assembler
	conf     map[string]detect.SiteConfig // configured sites by id
	names    map[string]string            // lower-case id and name → id
	resolved map[string]string            // raw site → id (cache of Resolve)
	lastRaw  string                       // the last site Resolve was asked about…
	lastID   string                       // …and its answer (consecutive readings share a site)
	hasLast  bool
	sites    map[string]*site
	emitFn   func(detect.Profile)
	stats    Stats

	// Change record for WriteStateChunks: the sites whose detector or
	// assembly state changed since the last call, or all of them.
	changed ingest.SiteChanges // sites whose saved state is out of date
}

// site is one site's detector.
type site struct {
	det      *detect.Site
	cfg      detect.SiteConfig
	fromData bool // created from the data with defaults
}

// New builds an Engine. cfg may be nil or list no sites: sites are then
// created from the data (see Add). The profile interval and watermark are
// cfg.Detect.ProfileInterval and Watermark (defaults 10 min and 30 min).
func New(cfg *config.Config, sink Sink) (*Engine, error) {
	if sink == nil {
		return nil, fmt.Errorf("engine: nil sink")
	}
	if cfg == nil {
		cfg = &config.Config{}
	}
	e := &Engine{
		cfg:      cfg,
		detect:   cfg.Detect,
		sink:     sink,
		conf:     make(map[string]detect.SiteConfig, len(cfg.Sites)),
		names:    make(map[string]string, 2*len(cfg.Sites)),
		resolved: make(map[string]string),
		sites:    make(map[string]*site),
	}
	e.changed.SetAll() // nothing saved yet
	expected := make(map[string][]float64, len(cfg.Sites))
	for _, s := range cfg.Sites {
		if _, dup := e.conf[s.ID]; dup {
			return nil, fmt.Errorf("engine: site %q configured twice", s.ID)
		}
		sc, err := detect.SiteConfigFrom(cfg.Detect, s)
		if err != nil {
			return nil, fmt.Errorf("engine: %w", err)
		}
		e.conf[s.ID] = sc
		expected[s.ID] = s.Depths
	}
	// Names resolve after ids so that an id always wins over another site's name.
	for _, s := range cfg.Sites {
		if s.Name != "" {
			if _, taken := e.names[strings.ToLower(s.Name)]; !taken {
				e.names[strings.ToLower(s.Name)] = s.ID
			}
		}
	}
	for _, s := range cfg.Sites {
		e.names[strings.ToLower(s.ID)] = s.ID
	}
	// Sites created from the data use the detection thresholds too: check them now.
	if _, err := detect.SiteConfigFrom(cfg.Detect, config.Site{ID: "data"}); err != nil {
		return nil, fmt.Errorf("engine: detection settings: %w", err)
	}
	wm := cfg.Detect.Watermark.D()
	if wm == 0 {
		wm = ingest.DefaultWatermark
	}
	e.asm = ingest.NewAssembler(cfg.Detect.ProfileInterval.D(), wm, expected)
	e.emitFn = e.profile
	return e, nil
}

// Resolve maps a site as named by a source (an id, or a configured site's
// name or id in any letter case) to the configured site id; an unknown site
// is returned unchanged. Callers apply it before quality control, so that QC
// and detection agree on the site.
func (e *Engine) Resolve(raw string) string {
	if e.hasLast && raw == e.lastRaw {
		return e.lastID
	}
	if id, ok := e.resolved[raw]; ok {
		e.lastRaw, e.lastID, e.hasLast = raw, id, true
		return id
	}
	id := raw
	if _, ok := e.conf[raw]; !ok {
		if v, ok := e.names[strings.ToLower(strings.TrimSpace(raw))]; ok {
			id = v
		}
	}
	if len(e.resolved) < 1<<16 {
		e.resolved[raw] = id
	}
	e.lastRaw, e.lastID, e.hasLast = raw, id, true
	return id
}

// Add takes one quality-controlled reading (the caller ran QC so that it could
// store the flags first). Its site is resolved (Resolve); a reading with an
// excluding flag is not detected. It returns true when the reading is late
// (its profile was already emitted): the caller should flag it QCLate before
// storing it. Profiles completed by this reading are detected at once.
func (e *Engine) Add(r ingest.Reading) (late bool) {
	e.stats.Readings++
	if !r.Usable() {
		e.stats.Unusable++
		return false
	}
	r.Site = e.Resolve(r.Site)
	e.changed.Touch(r.Site)
	late = e.asm.Add(r, e.emitFn)
	if late {
		e.stats.Late++
	}
	return late
}

// AddAir passes an air temperature (°C) at time t to a site's detectors (frazil
// risk). A site that is neither configured nor yet seen in the data has no
// detector: the value is counted in Stats.AirDropped.
func (e *Engine) AddAir(siteName string, t time.Time, c float64) {
	id := e.Resolve(siteName)
	s := e.sites[id]
	if s == nil {
		sc, ok := e.conf[id]
		if !ok {
			e.stats.AirDropped++
			return
		}
		s = &site{det: detect.NewSite(sc), cfg: sc}
		e.sites[id] = s
	}
	e.stats.Air++
	e.changed.Touch(id)
	s.det.ObserveAir(t.UTC(), c)
}

// Flush emits and detects every open profile, as at the end of the input.
func (e *Engine) Flush() {
	e.changed.SetAll()
	e.asm.Flush(e.emitFn)
}

// Stats returns the counters.
func (e *Engine) Stats() Stats { return e.stats }

// Assembler exposes the assembler (open intervals, known depths). Changes
// made through it are not tracked site by site: the next WriteStateChunks
// saves every site.
func (e *Engine) Assembler() *ingest.Assembler {
	e.changed.SetAll()
	return e.asm
}

// profile detects one assembled profile.
func (e *Engine) profile(p detect.Profile) {
	s := e.siteFor(p)
	e.changed.Touch(p.Site)
	e.stats.Profiles++
	col, evs := s.det.Process(p)
	e.sink.Column(col, p)
	for _, ev := range evs {
		e.stats.Events++
		e.sink.Event(ev)
	}
}

// siteFor returns the detector of p's site, creating it on first use: from
// the configuration, or with defaults and a maximum depth equal to the
// deepest sensor seen. When a deeper sensor appears later at a site created
// from data, its detector is rebuilt with the new maximum depth, keeping its
// state.
func (e *Engine) siteFor(p detect.Profile) *site {
	s := e.sites[p.Site]
	if s == nil {
		if sc, ok := e.conf[p.Site]; ok {
			s = &site{det: detect.NewSite(sc), cfg: sc}
		} else {
			s = e.dataSite(p.Site, e.deepest(p.Site, p.Depths), nil)
		}
		e.sites[p.Site] = s
		return s
	}
	if s.fromData && len(p.Depths) > 0 && p.Depths[len(p.Depths)-1] > s.cfg.MaxDepth {
		if ns := e.rebuild(p.Site, s, e.deepest(p.Site, p.Depths)); ns != nil {
			e.sites[p.Site] = ns
			s = ns
		}
	}
	return s
}

// deepest returns the deepest depth known at a site (assembler) or in depths.
func (e *Engine) deepest(id string, depths []float64) float64 {
	d := 0.0
	if ds := e.asm.Depths(id); len(ds) > 0 {
		d = ds[len(ds)-1]
	}
	if n := len(depths); n > 0 && depths[n-1] > d {
		d = depths[n-1]
	}
	return d
}

// dataSite builds the detector of an unconfigured site: defaults, the
// configured detection thresholds, fresh water, the given maximum depth.
// state, when non-nil, is restored into it.
func (e *Engine) dataSite(id string, maxDepth float64, state []byte) *site {
	sc, err := detect.SiteConfigFrom(e.detect, config.Site{ID: id, MaxDepth: maxDepth})
	if err != nil {
		// New checked the thresholds, and the depth comes from readings that
		// passed the decoders' checks, so this cannot fail; should it, the
		// defaults still detect the data.
		sc = detect.DefaultSiteConfig(id)
		sc.MaxDepth = maxDepth
	}
	s := &site{det: detect.NewSite(sc), cfg: sc, fromData: true}
	if state != nil {
		if err := s.det.RestoreState(state); err != nil {
			return nil
		}
	}
	return s
}

// rebuild moves a data-created site's state to a detector with a deeper
// maximum depth; nil when the state cannot be carried over (the old detector
// is kept).
func (e *Engine) rebuild(id string, old *site, maxDepth float64) *site {
	st, err := old.det.MarshalState()
	if err != nil {
		return nil
	}
	ns := e.dataSite(id, maxDepth, st)
	if ns != nil {
		e.stats.Rebuilt++
	}
	return ns
}

// Summaries returns each site's season summary, sites sorted by id.
func (e *Engine) Summaries() []detect.SeasonSummary {
	ids := e.SiteIDs()
	out := make([]detect.SeasonSummary, 0, len(ids))
	for _, id := range ids {
		out = append(out, e.sites[id].det.Summary())
	}
	return out
}

// SiteIDs returns the ids of the sites with a detector, sorted.
func (e *Engine) SiteIDs() []string {
	ids := make([]string, 0, len(e.sites))
	for id := range e.sites {
		ids = append(ids, id)
	}
	sort.Strings(ids)
	return ids
}

// SiteName returns the display name of a site (its configured name, else its id).
func (e *Engine) SiteName(id string) string {
	if s := e.sites[id]; s != nil && s.cfg.Name != "" {
		return s.cfg.Name
	}
	if sc, ok := e.conf[id]; ok && sc.Name != "" {
		return sc.Name
	}
	return id
}

// snapshot is the JSON form of Snapshot.
type snapshot struct {
	Version   int             `json:"version"`
	Assembler json.RawMessage `json:"assembler"`
	Sites     []siteSnapshot  `json:"sites"`
	Stats     Stats           `json:"stats"`
}

type siteSnapshot struct {
	ID       string  `json:"id"`
	FromData bool    `json:"from_data"`
	MaxDepth float64 `json:"max_depth_m"`
	State    []byte  `json:"state"` // detect.Site state (base64 in JSON)
}

const snapshotVersion = 1

// Snapshot returns the whole detection state (open profiles and every site's
// detector state) as JSON, for crash recovery with Restore. Fed the same
// readings afterwards, a restored Engine raises the same events as one that
// was never interrupted.
func (e *Engine) Snapshot() ([]byte, error) {
	a, err := e.asm.State()
	if err != nil {
		return nil, fmt.Errorf("engine snapshot: %w", err)
	}
	sn := snapshot{Version: snapshotVersion, Assembler: a, Stats: e.stats, Sites: []siteSnapshot{}}
	for _, id := range e.SiteIDs() {
		s := e.sites[id]
		st, err := s.det.MarshalState()
		if err != nil {
			return nil, fmt.Errorf("engine snapshot: site %q: %w", id, err)
		}
		sn.Sites = append(sn.Sites, siteSnapshot{ID: id, FromData: s.fromData, MaxDepth: s.cfg.MaxDepth, State: st})
	}
	b, err := json.Marshal(sn)
	if err != nil {
		return nil, fmt.Errorf("engine snapshot: %w", err)
	}
	return b, nil
}

// Restore replaces the detection state with a Snapshot. Configured sites take
// their configuration from this Engine's config; sites that were created from
// data are recreated with their saved maximum depth. A site saved as created
// from data that is configured now takes the configuration.
func (e *Engine) Restore(b []byte) error {
	var sn snapshot
	if err := json.Unmarshal(b, &sn); err != nil {
		return fmt.Errorf("engine restore: %w", err)
	}
	if sn.Version != snapshotVersion {
		return fmt.Errorf("engine restore: snapshot version %d, want %d", sn.Version, snapshotVersion)
	}
	sites := make(map[string]*site, len(sn.Sites))
	for _, ss := range sn.Sites {
		var s *site
		if sc, ok := e.conf[ss.ID]; ok {
			s = &site{det: detect.NewSite(sc), cfg: sc}
			if err := s.det.RestoreState(ss.State); err != nil {
				return fmt.Errorf("engine restore: site %q: %w", ss.ID, err)
			}
		} else {
			if math.IsNaN(ss.MaxDepth) || ss.MaxDepth < 0 {
				return fmt.Errorf("engine restore: site %q: max depth %g", ss.ID, ss.MaxDepth)
			}
			s = e.dataSite(ss.ID, ss.MaxDepth, nil)
			if err := s.det.RestoreState(ss.State); err != nil {
				return fmt.Errorf("engine restore: site %q: %w", ss.ID, err)
			}
		}
		sites[ss.ID] = s
	}
	if err := e.asm.Restore(sn.Assembler); err != nil {
		return fmt.Errorf("engine restore: %w", err)
	}
	e.sites = sites
	e.stats = sn.Stats
	e.changed.SetAll()
	return nil
}

// ConfiguredSites returns the ids of the configured sites, sorted.
func (e *Engine) ConfiguredSites() []string {
	ids := make([]string, 0, len(e.conf))
	for id := range e.conf {
		ids = append(ids, id)
	}
	slices.Sort(ids)
	return ids
}

// chunkHead is the JSON form of the head that WriteStateChunks returns.
type chunkHead struct {
	Version    int   `json:"version"`
	IntervalNS int64 `json:"interval_ns"` // the assembler's profile interval
	Stats      Stats `json:"stats"`
}

// Per-site chunk layout (WriteStateChunks): version byte, flag byte, the
// maximum depth (float64 bits, little endian), the detector state's length
// (uvarint) and the detector state (detect.Site.MarshalState), then the
// assembly state (ingest.Assembler.AppendSiteState) to the end.
const chunkVersion = 2

// Flags of a per-site chunk.
const (
	chunkFromData = 1 << iota
	chunkHasDet
	chunkHasAsm
)

// WriteStateChunks saves the detection state in pieces: put is called once
// per site whose detector or assembly state changed since the previous call
// (every site with all set, and after New, Restore, RestoreChunks, Flush or
// Assembler), sites in ascending order; head, returned at the end, holds the
// counters and the profile interval and must be saved with the chunks.
// Together with the chunks of earlier calls for the other sites it is the
// whole state (RestoreChunks). The change record is reset at the start: after
// a failed save call it again with all set. Only one site's encoded state is
// held at a time (chunk is reused between calls).
func (e *Engine) WriteStateChunks(all bool, put ingest.ChunkFunc) (head []byte, err error) {
	changed := e.changed.Take(all)
	var ids []string
	if changed.All {
		seen := make(map[string]struct{}, len(e.sites))
		for id := range e.sites {
			seen[id] = struct{}{}
		}
		for _, id := range e.asm.Sites() {
			seen[id] = struct{}{}
		}
		for id := range seen {
			ids = append(ids, id)
		}
	} else {
		for id := range changed.Sites {
			ids = append(ids, id)
		}
	}
	slices.Sort(ids)
	var buf []byte
	for _, id := range ids {
		buf = append(buf[:0], chunkVersion, 0)
		var flags byte
		maxDepth := 0.0
		var det []byte
		if s := e.sites[id]; s != nil {
			if det, err = s.det.MarshalState(); err != nil {
				return nil, fmt.Errorf("engine state: site %q: %w", id, err)
			}
			flags |= chunkHasDet
			if s.fromData {
				flags |= chunkFromData
			}
			maxDepth = s.cfg.MaxDepth
		}
		buf = binary.LittleEndian.AppendUint64(buf, math.Float64bits(maxDepth))
		buf = binary.AppendUvarint(buf, uint64(len(det)))
		buf = append(buf, det...)
		var ok bool
		if buf, ok, err = e.asm.AppendSiteState(buf, id); err != nil {
			return nil, fmt.Errorf("engine state: %w", err)
		}
		if ok {
			flags |= chunkHasAsm
		}
		if flags&(chunkHasDet|chunkHasAsm) == 0 {
			continue // touched but holds nothing (e.g. only unusable readings)
		}
		buf[1] = flags
		if err := put(id, buf); err != nil {
			return nil, fmt.Errorf("engine state: site %q: %w", id, err)
		}
	}
	head, err = json.Marshal(chunkHead{Version: chunkVersion, IntervalNS: int64(e.asm.Interval()), Stats: e.stats})
	if err != nil {
		return nil, fmt.Errorf("engine state: %w", err)
	}
	return head, nil
}

// RestoreChunks replaces the detection state with one saved by
// WriteStateChunks: head and every site's latest chunk (site id → chunk; the
// slices are not retained). Sites are recreated as Restore does. On error the
// state is left unchanged.
func (e *Engine) RestoreChunks(head []byte, chunks iter.Seq2[string, []byte]) error {
	var h chunkHead
	if err := json.Unmarshal(head, &h); err != nil {
		return fmt.Errorf("engine restore: head: %w", err)
	}
	if h.Version != chunkVersion {
		return fmt.Errorf("engine restore: state version %d, want %d", h.Version, chunkVersion)
	}
	sites := make(map[string]*site)
	asm := make(map[string][]byte)
	for id, b := range chunks {
		if len(b) < 10 || b[0] != chunkVersion {
			return fmt.Errorf("engine restore: site %q: chunk version or length wrong", id)
		}
		flags := b[1]
		maxDepth := math.Float64frombits(binary.LittleEndian.Uint64(b[2:10]))
		n, k := binary.Uvarint(b[10:])
		if k <= 0 || n > uint64(len(b)-10-k) {
			return fmt.Errorf("engine restore: site %q: corrupt chunk", id)
		}
		det := b[10+k : 10+k+int(n)]
		rest := b[10+k+int(n):]
		if flags&chunkHasDet != 0 {
			var s *site
			if sc, ok := e.conf[id]; ok {
				s = &site{det: detect.NewSite(sc), cfg: sc}
			} else {
				if math.IsNaN(maxDepth) || maxDepth < 0 {
					return fmt.Errorf("engine restore: site %q: max depth %g", id, maxDepth)
				}
				s = e.dataSite(id, maxDepth, nil)
			}
			if err := s.det.RestoreState(det); err != nil {
				return fmt.Errorf("engine restore: site %q: %w", id, err)
			}
			sites[id] = s
		}
		if flags&chunkHasAsm != 0 {
			asm[id] = rest
		}
	}
	if err := e.asm.RestoreSites(h.IntervalNS, asm); err != nil {
		return fmt.Errorf("engine restore: %w", err)
	}
	e.sites = sites
	e.stats = h.Stats
	e.changed.SetAll()
	return nil
}
