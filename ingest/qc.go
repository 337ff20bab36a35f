package ingest

import (
	"math"
	"slices"
	"sort"
	"time"

	"holomix/config"
)

// QCConfig holds the quality-control thresholds. Zero values mean the defaults
// (see withDefaults): a threshold of exactly 0 cannot be configured.
type QCConfig struct {
	RangeMin, RangeMax float64              // °C, default -3, 45
	SpikeC             float64              // °C away from the median of the sensor's recent values, default 5
	StuckAfter         time.Duration        // unchanged to 0.001 °C for this long → stuck, default 24h
	FutureTolerance    time.Duration        // default 5m
	DuplicateWindow    int                  // recent timestamps remembered per sensor, default 64 (at most 4096)
	KnownDepths        map[string][]float64 // site → configured sensor depths; a site absent from the map accepts any depth
	DepthTolerance     float64              // m, default 0.01
}

// Quality-control defaults (common practice, no source: the plausible range
// of -3..45 °C covers supercooled brines to hot springs' outflow with margin).
const (
	DefaultRangeMinC       = -3.0
	DefaultRangeMaxC       = 45.0
	DefaultSpikeC          = 5.0
	DefaultStuckAfter      = 24 * time.Hour
	DefaultFutureTolerance = 5 * time.Minute
	DefaultDuplicateWindow = 64
	DefaultDepthTolerance  = 0.01
)

// Fixed parameters of the spike and stuck tests.
const (
	spikeHistory       = 5             // accepted values whose median is the reference
	spikeMinHistory    = 3             // fewer recent values than this: no spike test
	spikeMaxAge        = 6 * time.Hour // reference values must be this recent
	stepConfirm        = 3             // consecutive readings at a new level that confirm a step
	stuckEpsilon       = 0.001         // °C: smaller changes count as "unchanged"
	maxSensors         = 65536         // sensors with state; beyond this new sensors are checked without state
	maxDuplicateWindow = 4096
	qcStateVersion     = 1
)

func (c QCConfig) withDefaults() QCConfig {
	if c.RangeMin == 0 {
		c.RangeMin = DefaultRangeMinC
	}
	if c.RangeMax == 0 {
		c.RangeMax = DefaultRangeMaxC
	}
	if c.SpikeC <= 0 {
		c.SpikeC = DefaultSpikeC
	}
	if c.StuckAfter <= 0 {
		c.StuckAfter = DefaultStuckAfter
	}
	if c.FutureTolerance <= 0 {
		c.FutureTolerance = DefaultFutureTolerance
	}
	if c.DuplicateWindow <= 0 {
		c.DuplicateWindow = DefaultDuplicateWindow
	}
	if c.DuplicateWindow > maxDuplicateWindow {
		c.DuplicateWindow = maxDuplicateWindow
	}
	if c.DepthTolerance <= 0 {
		c.DepthTolerance = DefaultDepthTolerance
	}
	return c
}

// QCConfigFrom reads the thresholds of cfg.Ingest and the sensor depths of
// cfg.Sites (a site with no sensor_depths_m accepts any depth). Zero values
// become the defaults.
func QCConfigFrom(cfg *config.Config) QCConfig {
	c := QCConfig{
		RangeMin:        cfg.Ingest.RangeMinC,
		RangeMax:        cfg.Ingest.RangeMaxC,
		SpikeC:          cfg.Ingest.SpikeC,
		StuckAfter:      cfg.Ingest.StuckAfter.D(),
		FutureTolerance: cfg.Ingest.FutureTolerance.D(),
	}
	for _, s := range cfg.Sites {
		if len(s.Depths) == 0 {
			continue
		}
		if c.KnownDepths == nil {
			c.KnownDepths = make(map[string][]float64)
		}
		c.KnownDepths[s.ID] = append(c.KnownDepths[s.ID], s.Depths...)
	}
	return c.withDefaults()
}

// QualityControl flags readings. It keeps a small state per sensor (site and
// depth): the last few accepted values, the start of the current run of
// unchanged values, and the recent timestamps. Memory per sensor is bounded
// (about 0.6 KiB with the default duplicate window) and so is the number of
// sensors (65536). It is NOT safe for concurrent use.
//
// The tests, in the order Check applies them:
//
//   - Range: temperature outside [RangeMin, RangeMax] (or not finite) → QCRange.
//   - Future: time later than recv + FutureTolerance → QCFuture. Such a reading
//     (its clock is wrong) is remembered for duplicate detection only, so a
//     redelivered copy is still recognised; it touches no spike or stuck state.
//   - Unknown depth: the site has configured depths and none is within
//     DepthTolerance → QCUnknownDepth. Such a reading touches no state, so a
//     stream of odd depths cannot grow memory. A reading within tolerance of a
//     configured depth shares that sensor's state.
//   - Duplicate: the sensor's last DuplicateWindow timestamps include this
//     exact time → QCDuplicate; the reading touches no other state.
//   - Late data: a reading older than the newest one seen for its sensor is
//     only spike-tested, against the reference values within 6 h of its time;
//     it never changes the spike, step or stuck state.
//   - Stuck: the value is within 0.001 °C of the value that opened the current
//     run, and the run started at least StuckAfter before this reading
//     → QCStuck. Any larger change starts a new run.
//   - Spike: with at least 3 accepted values from the 6 h before the reading
//     (the last 5 accepted are kept), a value more than SpikeC from their
//     median → QCSpike. A step that persists is accepted: flagged readings are
//     kept as candidates, and when the third consecutive candidate agrees
//     with the earlier ones (within SpikeC of their median) the new level
//     becomes the reference and that reading is not flagged. The first two
//     readings of a real step therefore stay flagged; a lone outlier never
//     becomes the reference.
//
// Accepted values (the spike reference) are in-order readings with no
// excluding flag. Readings that arrive with excluding flags already set are
// treated like range-flagged ones.
//
// Caution: a sensor reporting at 0.01 °C resolution in a very stable water
// mass (e.g. 4 °C bottom water under ice) can read the same value for days;
// choose StuckAfter with the logger's resolution in mind.
type QualityControl struct {
	c         QCConfig
	known     map[string][]float64 // sorted copies
	sensors   map[sensorKey]*sensorState
	limit     int // most sensors with state (maxSensors; lowered by tests)
	untracked uint64

	// Lookup cache (derived from known and sensors, rebuilt on demand):
	// consecutive readings nearly always share a site and come in depth
	// order, so the last site's entry and a per-site sorted list of its
	// sensors, probed first at the position after the last hit, avoid
	// hashing the site name and depth on every reading.
	sites    map[string]*qcSite
	lastSite *qcSite

	// Change record for WriteStateChunks: the sites whose sensors changed
	// since the last call, or all of them.
	changed SiteChanges // sites whose saved state is out of date
}

// qcSite is the lookup cache of one site: its configured depths and its
// sensors with state, sorted by depth.
type qcSite struct {
	name     string
	known    []float64 // sorted configured depths
	hasKnown bool      // the site has configured depths
	kNext    int       // index of the configured depth of the last reading, +1
	mm       []int64   // depths (mm) of the sensors with state, ascending
	st       []*sensorState
	next     int // index after the last hit
}

// maxSiteCache bounds the lookup cache; when full it is emptied (it holds
// nothing that is not also in known and sensors).
const maxSiteCache = 4096

type sensorKey struct {
	site string
	mm   int64 // depth in millimetres (snapped to the configured depth)
}

type sample struct {
	t int64 // Unix ns
	v float64
}

type sensorState struct {
	hist     [spikeHistory]sample // accepted values, oldest first
	nHist    int
	pend     [stepConfirm - 1]sample // consecutive spike candidates, oldest first
	nPend    int
	latest   int64   // newest in-order time
	seen     bool    // latest is set
	runStart int64   // time of the reading that opened the current run
	runV     float64 // its value
	hasRun   bool
	dups     []int64 // ring of recent timestamps
	dupHead  int     // next write position once the ring is full
	dupMax   int64   // newest timestamp ever remembered (valid when len(dups) > 0)
}

// NewQualityControl builds a QualityControl; zero fields of c take the defaults.
func NewQualityControl(c QCConfig) *QualityControl {
	c = c.withDefaults()
	known := make(map[string][]float64, len(c.KnownDepths))
	for site, ds := range c.KnownDepths {
		if len(ds) == 0 {
			continue
		}
		s := slices.Clone(ds)
		sort.Float64s(s)
		known[site] = s
	}
	c.KnownDepths = known
	return &QualityControl{c: c, known: known, sensors: make(map[sensorKey]*sensorState), limit: maxSensors,
		sites: make(map[string]*qcSite), changed: SiteChanges{all: true}}
}

// site returns the lookup cache entry of a site.
func (q *QualityControl) site(name string) *qcSite {
	if ls := q.lastSite; ls != nil && ls.name == name {
		return ls
	}
	cs := q.sites[name]
	if cs == nil {
		if len(q.sites) >= maxSiteCache {
			clear(q.sites)
		}
		ds, has := q.known[name]
		cs = &qcSite{name: name, known: ds, hasKnown: has}
		q.sites[name] = cs
	}
	q.lastSite = cs
	return cs
}

// resetCache empties the lookup cache (after Restore replaced the sensors).
func (q *QualityControl) resetCache() {
	q.sites = make(map[string]*qcSite)
	q.lastSite = nil
}

// find returns the cached state of the sensor at depth mm, or nil.
func (cs *qcSite) find(mm int64) *sensorState {
	n := len(cs.mm)
	if n == 0 {
		return nil
	}
	i := cs.next
	if i >= n {
		i = 0
	}
	if cs.mm[i] != mm {
		i = sort.Search(n, func(j int) bool { return cs.mm[j] >= mm })
		if i == n || cs.mm[i] != mm {
			return nil
		}
	}
	cs.next = i + 1
	return cs.st[i]
}

// add caches the state of the sensor at depth mm (not yet cached).
func (cs *qcSite) add(mm int64, s *sensorState) {
	i := sort.Search(len(cs.mm), func(j int) bool { return cs.mm[j] >= mm })
	cs.mm = slices.Insert(cs.mm, i, mm)
	cs.st = slices.Insert(cs.st, i, s)
	cs.next = i + 1
}

// Sensors returns the number of sensors with state.
func (q *QualityControl) Sensors() int { return len(q.sensors) }

// Untracked returns how many readings were checked without state because the
// sensor limit was reached.
func (q *QualityControl) Untracked() uint64 { return q.untracked }

// depthKey finds the sensor depth (mm) of a reading at site cs; ok is false
// for an unknown depth at a site with configured depths.
func (q *QualityControl) depthKey(cs *qcSite, depth float64) (int64, bool) {
	if !cs.hasKnown {
		return int64(math.Round(depth * 1000)), true
	}
	ds := cs.known
	// Readings usually come in depth order: try the depth after the last
	// one. It is the answer when it is within tolerance, strictly nearer
	// than the one below and no farther than the one above (the search
	// below prefers the lower of two equally near depths).
	if g := cs.kNext; len(ds) > 0 {
		if g >= len(ds) {
			g = 0
		}
		d := math.Abs(ds[g] - depth)
		if d <= q.c.DepthTolerance && (g == 0 || math.Abs(ds[g-1]-depth) > d) && (g+1 == len(ds) || math.Abs(ds[g+1]-depth) >= d) {
			cs.kNext = g + 1
			return int64(math.Round(ds[g] * 1000)), true
		}
	}
	i := sort.SearchFloat64s(ds, depth)
	best, bestD, bestJ := 0.0, math.Inf(1), 0
	for _, j := range [2]int{i - 1, i} {
		if j >= 0 && j < len(ds) {
			if dd := math.Abs(ds[j] - depth); dd < bestD {
				best, bestD, bestJ = ds[j], dd, j
			}
		}
	}
	if bestD > q.c.DepthTolerance {
		return 0, false
	}
	cs.kNext = bestJ + 1
	return int64(math.Round(best * 1000)), true
}

// Check sets the flags of r (r.QC |= …) and returns the flags it set. recv is
// the receive time.
func (q *QualityControl) Check(r *Reading, recv time.Time) QC {
	var f QC
	v := r.TempC
	if !finite(v) || v < q.c.RangeMin || v > q.c.RangeMax {
		f |= QCRange
	}
	if r.Time.After(recv.Add(q.c.FutureTolerance)) {
		f |= QCFuture
	}
	if !finite(r.Depth) || math.Abs(r.Depth) > MaxDepthM {
		// Decoders never produce such a depth; without a usable key there is no state.
		r.QC |= f
		return f
	}
	cs := q.site(r.Site)
	mm, ok := q.depthKey(cs, r.Depth)
	if !ok {
		f |= QCUnknownDepth
		r.QC |= f
		return f
	}
	s := cs.find(mm)
	if s == nil {
		k := sensorKey{site: r.Site, mm: mm}
		s = q.sensors[k]
		if s == nil {
			if len(q.sensors) >= q.limit {
				q.untracked++
				r.QC |= f
				return f
			}
			s = &sensorState{}
			q.sensors[k] = s
		}
		cs.add(mm, s)
	}
	q.changed.Touch(r.Site)
	f |= s.check(r, &q.c, f|r.QC&Excluding)
	r.QC |= f
	return f
}

// check runs the stateful tests. prior holds the flags already known to
// exclude the reading.
func (s *sensorState) check(r *Reading, c *QCConfig, prior QC) QC {
	tn := r.Time.UnixNano()
	if s.isDuplicate(tn) {
		return QCDuplicate
	}
	s.remember(tn, c.DuplicateWindow)
	if prior&QCFuture != 0 {
		return 0 // a wrong clock: remembered for duplicates only
	}
	v := r.TempC
	var f QC
	if s.seen && tn < s.latest {
		// Late data: spike test only; no state change.
		if prior == 0 {
			if med, ok := median(s.hist[:s.nHist], tn, true, spikeMinHistory); ok && math.Abs(v-med) > c.SpikeC {
				f |= QCSpike
			}
		}
		return f
	}
	s.latest, s.seen = tn, true
	if !finite(v) {
		return f // range-flagged already; a non-finite value opens no run
	}
	if s.hasRun && math.Abs(v-s.runV) < stuckEpsilon {
		if tn-s.runStart >= int64(c.StuckAfter) {
			f |= QCStuck
		}
	} else {
		s.runStart, s.runV, s.hasRun = tn, v, true
	}
	if prior != 0 || f != 0 {
		return f
	}
	cur := sample{t: tn, v: v}
	if s.nearReference(v, tn, c.SpikeC) {
		s.accept(cur)
		s.nPend = 0
		return f
	}
	med, ok := median(s.hist[:s.nHist], tn, false, spikeMinHistory)
	if !ok || math.Abs(v-med) <= c.SpikeC {
		s.accept(cur)
		s.nPend = 0
		return f
	}
	// A candidate spike, or the start of a step. Candidates older than the
	// reference age, or at another level than this reading, are forgotten.
	s.nPend = len(dropOlder(s.pend[:s.nPend], tn-int64(spikeMaxAge)))
	if s.nPend > 0 {
		if pm, _ := median(s.pend[:s.nPend], tn, false, 1); math.Abs(v-pm) > c.SpikeC {
			s.nPend = 0
		}
	}
	if s.nPend >= stepConfirm-1 {
		// Third consecutive reading at the new level: accept the step.
		s.nHist = copy(s.hist[:], s.pend[:s.nPend])
		s.accept(cur)
		s.nPend = 0
		return f
	}
	s.pend[s.nPend] = cur
	s.nPend++
	return f | QCSpike
}

// nearReference is a shortcut of the spike test of an in-order reading:
// true when the test passes without computing the median, because there
// are too few reference values or v is within lim of every one of them (the
// median lies between the smallest and the largest, and rounding is
// monotonic, so |v − median| ≤ lim then holds exactly as computed). False
// means: compute the median.
func (s *sensorState) nearReference(v float64, tn int64, lim float64) bool {
	n := 0
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, x := range s.hist[:s.nHist] {
		if d := tn - x.t; d >= 0 && d <= int64(spikeMaxAge) {
			n++
			lo, hi = min(lo, x.v), max(hi, x.v)
		}
	}
	return n < spikeMinHistory || (v-lo <= lim && hi-v <= lim)
}

func (s *sensorState) accept(x sample) {
	if s.nHist == spikeHistory {
		copy(s.hist[:], s.hist[1:])
		s.nHist--
	}
	s.hist[s.nHist] = x
	s.nHist++
}

// isDuplicate reports whether tn is among the remembered timestamps. Times
// mostly increase: one newer than every timestamp ever remembered cannot be
// among them, which spares the scan.
func (s *sensorState) isDuplicate(tn int64) bool {
	if len(s.dups) == 0 || tn > s.dupMax {
		return false
	}
	for _, t := range s.dups {
		if t == tn {
			return true
		}
	}
	return false
}

func (s *sensorState) remember(tn int64, window int) {
	if len(s.dups) == 0 || tn > s.dupMax {
		s.dupMax = tn
	}
	if len(s.dups) < window {
		if s.dups == nil {
			s.dups = make([]int64, 0, window)
		}
		s.dups = append(s.dups, tn)
		return
	}
	s.dups[s.dupHead] = tn
	s.dupHead = (s.dupHead + 1) % len(s.dups)
}

// median returns the median of the values within spikeMaxAge before tn (on
// either side of tn when either is set, for late data); ok is false with
// fewer than minN such values.
func median(xs []sample, tn int64, either bool, minN int) (float64, bool) {
	var buf [spikeHistory]float64
	n := 0
	for _, x := range xs {
		d := tn - x.t
		if either && d < 0 {
			d = -d
		}
		if d >= 0 && d <= int64(spikeMaxAge) && n < len(buf) {
			buf[n] = x.v
			n++
		}
	}
	if n < minN || n == 0 {
		return 0, false
	}
	// Insertion sort of at most spikeHistory finite values (accepted values
	// and spike candidates are always finite).
	for i := 1; i < n; i++ {
		x := buf[i]
		j := i
		for ; j > 0 && buf[j-1] > x; j-- {
			buf[j] = buf[j-1]
		}
		buf[j] = x
	}
	if n%2 == 1 {
		return buf[n/2], true
	}
	return (buf[n/2-1] + buf[n/2]) / 2, true
}

// dropOlder removes, in place, the samples older than minT.
func dropOlder(xs []sample, minT int64) []sample {
	k := 0
	for _, x := range xs {
		if x.t >= minT {
			xs[k] = x
			k++
		}
	}
	return xs[:k]
}
