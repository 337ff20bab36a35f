package ingest

import (
	"encoding/json"
	"fmt"
	"math"
	"slices"
	"sort"
	"time"

	"holomix/detect"
)

// Assembly defaults (config detect.profile_interval and detect.watermark).
const (
	DefaultProfileInterval = 10 * time.Minute
	DefaultWatermark       = 30 * time.Minute
	asmStateVersion        = 1
)

// Assembler groups usable readings into profiles: one profile per site and
// interval of event time (the interval start is the profile's time; intervals
// are aligned to multiples of the interval since 1970-01-01T00:00:00Z, so a
// 10-minute interval starts at :00, :10, …).
//
// Several readings of one depth within one interval are AVERAGED (arithmetic
// mean): a 1-minute logger gives 10-minute means, which damps sensor noise
// without hiding any change that lasts longer than the interval.
//
// A profile is emitted, in time order per site, as soon as either
//
//   - it is complete: every expected depth (the site's configured sensor
//     depths, or every depth seen so far at the site when none are configured)
//     is settled. A depth is settled when its sensor has reported a time at
//     or after the interval end, or when its latest reading in the interval
//     plus the sensor's sampling step (the smaller of its last two gaps
//     between readings) reaches the interval end, so that no further reading
//     of that sensor is due within the interval. A logger sampling once per
//     interval thus gets its profile emitted on the reading of its last depth;
//     a faster logger on the last sample of the interval; or
//   - the site's watermark passes the interval end: the watermark is the
//     latest event time seen at the site minus the configured watermark
//     duration. What has arrived by then is emitted, complete or not.
//
// A reading whose interval was already emitted (or lies entirely behind the
// watermark) is late: Add returns true and the reading is not assembled (the
// caller flags it QCLate and still stores it). Readings that are not Usable
// are ignored entirely (they do not move the watermark either).
//
// Depths are matched to the known depths within DefaultDepthTolerance (the
// same tolerance quality control snaps configured depths with); a new depth
// at a site is added to the site's depth list.
//
// Memory and speed: the state is per site and per open interval and is reused,
// so Add allocates nothing in steady state. The Profile passed to emit shares
// buffers with the Assembler: its Depths and Temps are overwritten by the next
// emit and Expected must not be modified. A consumer that keeps any of them
// past the call must copy them.
//
// An Assembler is not safe for concurrent use.
type Assembler struct {
	interval  int64 // ns
	watermark int64 // ns
	tol       float64
	expected  map[string][]float64
	sites     map[string]*asmSite
	last      *asmSite
}

// asmSite is one site's assembly state.
type asmSite struct {
	id       string
	expected []float64 // configured depths, sorted (nil: none configured)
	depths   []float64 // known depths, sorted: expected ∪ seen
	required []bool    // per depth: needed for completeness
	lastSeen []int64   // per depth: latest reading time (ns); math.MinInt64 when none
	gap1     []int64   // per depth: the last positive gap between readings (ns), 0 unknown
	gap2     []int64   // the gap before that
	maxT     int64     // latest usable reading time at the site
	hasMax   bool
	next     int64 // intervals starting before next are closed
	hasNext  bool
	open     []*asmBucket // open intervals, ascending by start
	free     []*asmBucket
	hint     int // index of the depth of the previous reading
	outD     []float64
	outT     []float64
}

// asmBucket accumulates one interval.
type asmBucket struct {
	start int64
	sum   []float64
	n     []int32
	last  []int64 // latest reading time per depth within the interval
}

// NewAssembler returns an Assembler. interval <= 0 means DefaultProfileInterval
// and watermark < 0 means DefaultWatermark (0 is a valid watermark: emit when a
// reading of a later interval arrives). expected maps a site id to its
// configured sensor depths (m); it is copied.
func NewAssembler(interval, watermark time.Duration, expected map[string][]float64) *Assembler {
	if interval <= 0 {
		interval = DefaultProfileInterval
	}
	if watermark < 0 {
		watermark = DefaultWatermark
	}
	a := &Assembler{
		interval:  int64(interval),
		watermark: int64(watermark),
		tol:       DefaultDepthTolerance,
		expected:  make(map[string][]float64, len(expected)),
		sites:     make(map[string]*asmSite),
	}
	for id, ds := range expected {
		if len(ds) == 0 {
			continue
		}
		e := slices.Clone(ds)
		sort.Float64s(e)
		e = slices.Compact(e)
		a.expected[id] = e
	}
	return a
}

// Interval returns the profile interval.
func (a *Assembler) Interval() time.Duration { return time.Duration(a.interval) }

// Watermark returns the watermark duration.
func (a *Assembler) Watermark() time.Duration { return time.Duration(a.watermark) }

// Sites returns the ids of the sites with assembly state, in no particular order.
func (a *Assembler) Sites() []string {
	ids := make([]string, 0, len(a.sites))
	for id := range a.sites {
		ids = append(ids, id)
	}
	return ids
}

// Open returns the number of intervals still open over all sites.
func (a *Assembler) Open() int {
	n := 0
	for _, s := range a.sites {
		n += len(s.open)
	}
	return n
}

func (a *Assembler) site(id string) *asmSite {
	if s := a.last; s != nil && s.id == id {
		return s
	}
	s := a.sites[id]
	if s == nil {
		s = a.newSite(id)
		a.sites[id] = s
	}
	a.last = s
	return s
}

func (a *Assembler) newSite(id string) *asmSite {
	s := &asmSite{id: id}
	if e := a.expected[id]; len(e) > 0 {
		s.expected = e
		for _, d := range e {
			if k, ok := s.find(d, a.tol); !ok {
				s.insertDepth(k, d, true)
			}
		}
	}
	return s
}

// floorDiv returns the largest multiple of iv not above t.
func floorDiv(t, iv int64) int64 {
	q := t / iv
	if t%iv != 0 && t < 0 {
		q--
	}
	return q * iv
}

// Add assembles one reading and calls emit for every profile it completes, in
// time order. It returns true when the reading is late (its interval was
// already emitted): the caller sets QCLate. Unusable readings return false and
// change nothing.
func (a *Assembler) Add(r Reading, emit func(detect.Profile)) (late bool) {
	if !r.Usable() || !finite(r.TempC) || !finite(r.Depth) {
		return false
	}
	s := a.site(r.Site)
	t := r.Time.UnixNano()
	start := floorDiv(t, a.interval)
	// The sensor's depth and timing are learnt even from a late reading, so
	// that a new sensor whose first reading comes after its interval closed
	// is waited for in the following intervals.
	k, ok := s.find(r.Depth, a.tol)
	if !ok {
		s.insertDepth(k, r.Depth, s.expected == nil)
	}
	if t > s.lastSeen[k] {
		if s.lastSeen[k] != math.MinInt64 {
			s.gap2[k], s.gap1[k] = s.gap1[k], t-s.lastSeen[k]
		}
		s.lastSeen[k] = t
	}
	if (s.hasNext && start < s.next) || (s.hasMax && start+a.interval <= s.maxT-a.watermark) {
		return true
	}
	b := s.bucket(start, a.interval)
	b.sum[k] += r.TempC
	b.n[k]++
	if t > b.last[k] || b.n[k] == 1 {
		b.last[k] = t
	}
	if !s.hasMax || t > s.maxT {
		s.maxT, s.hasMax = t, true
	}
	check := s.required[k] && s.settled(s.open[0], k, a.interval)
	s.drain(a, check, emit)
	return false
}

// drain emits the oldest open intervals while they are complete or behind the
// watermark. check says whether the completeness of the oldest must be tested.
func (s *asmSite) drain(a *Assembler, check bool, emit func(detect.Profile)) {
	for len(s.open) > 0 {
		b := s.open[0]
		end := b.start + a.interval
		if end <= s.maxT-a.watermark || (check && s.complete(b, a.interval)) {
			s.emit(b, a.interval, emit)
			check = true
			continue
		}
		return
	}
}

// find returns the index of depth d among the known depths (within tol), or
// the insertion index and false.
func (s *asmSite) find(d, tol float64) (int, bool) {
	n := len(s.depths)
	if h := s.hint; h < n && math.Abs(s.depths[h]-d) <= tol {
		return h, true
	}
	if h := s.hint + 1; h < n && math.Abs(s.depths[h]-d) <= tol {
		s.hint = h
		return h, true
	}
	if n > 0 && math.Abs(s.depths[0]-d) <= tol {
		s.hint = 0
		return 0, true
	}
	i := sort.SearchFloat64s(s.depths, d)
	best, bestD := -1, math.Inf(1)
	for _, j := range [2]int{i - 1, i} {
		if j >= 0 && j < n {
			if dd := math.Abs(s.depths[j] - d); dd <= tol && dd < bestD {
				best, bestD = j, dd
			}
		}
	}
	if best >= 0 {
		s.hint = best
		return best, true
	}
	return i, false
}

// insertDepth adds depth d at index k of every per-depth array.
func (s *asmSite) insertDepth(k int, d float64, required bool) {
	s.depths = slices.Insert(s.depths, k, d)
	s.required = slices.Insert(s.required, k, required)
	s.lastSeen = slices.Insert(s.lastSeen, k, int64(math.MinInt64))
	s.gap1 = slices.Insert(s.gap1, k, 0)
	s.gap2 = slices.Insert(s.gap2, k, 0)
	for _, b := range s.open {
		b.sum = slices.Insert(b.sum, k, 0)
		b.n = slices.Insert(b.n, k, 0)
		b.last = slices.Insert(b.last, k, 0)
	}
	s.hint = k
}

// bucket returns the open interval starting at start, opening it if needed.
func (s *asmSite) bucket(start, iv int64) *asmBucket {
	// Readings almost always belong to the newest open interval.
	if n := len(s.open); n > 0 && s.open[n-1].start == start {
		return s.open[n-1]
	}
	i := sort.Search(len(s.open), func(i int) bool { return s.open[i].start >= start })
	if i < len(s.open) && s.open[i].start == start {
		return s.open[i]
	}
	var b *asmBucket
	if n := len(s.free); n > 0 {
		b = s.free[n-1]
		s.free = s.free[:n-1]
	} else {
		b = &asmBucket{}
	}
	nd := len(s.depths)
	b.start = start
	b.sum = resize(b.sum, nd)
	b.n = resize(b.n, nd)
	b.last = resize(b.last, nd)
	s.open = slices.Insert(s.open, i, b)
	return b
}

// resize returns xs with length n, all zero, reusing its array when possible.
func resize[T any](xs []T, n int) []T {
	if cap(xs) < n {
		return make([]T, n)
	}
	xs = xs[:n]
	clear(xs)
	return xs
}

// settled reports whether depth k needs nothing more within interval b.
func (s *asmSite) settled(b *asmBucket, k int, iv int64) bool {
	end := b.start + iv
	if s.lastSeen[k] >= end {
		return true
	}
	if b.n[k] == 0 {
		return false
	}
	step := s.gap1[k]
	if g := s.gap2[k]; g > 0 && (step == 0 || g < step) {
		step = g
	}
	return step > 0 && b.last[k]+step >= end
}

// complete reports whether every required depth of b is settled.
func (s *asmSite) complete(b *asmBucket, iv int64) bool {
	found := false
	for k, req := range s.required {
		if !req {
			continue
		}
		if !s.settled(b, k, iv) {
			return false
		}
		found = true
	}
	return found
}

// emit builds the profile of the oldest open interval b, passes it to fn and
// recycles b.
func (s *asmSite) emit(b *asmBucket, iv int64, fn func(detect.Profile)) {
	s.outD, s.outT = s.outD[:0], s.outT[:0]
	for k, n := range b.n {
		if n > 0 {
			s.outD = append(s.outD, s.depths[k])
			s.outT = append(s.outT, b.sum[k]/float64(n))
		}
	}
	s.open = slices.Delete(s.open, 0, 1)
	s.free = append(s.free, b)
	s.next, s.hasNext = b.start+iv, true
	if len(s.outD) == 0 || fn == nil {
		return
	}
	fn(detect.Profile{
		Site:     s.id,
		Time:     time.Unix(0, b.start).UTC(),
		Depths:   s.outD,
		Temps:    s.outT,
		Expected: s.expected,
	})
}

// Flush emits every open interval of every site (sites in id order), as at the
// end of the input.
func (a *Assembler) Flush(emit func(detect.Profile)) {
	ids := make([]string, 0, len(a.sites))
	for id := range a.sites {
		ids = append(ids, id)
	}
	sort.Strings(ids)
	for _, id := range ids {
		s := a.sites[id]
		for len(s.open) > 0 {
			s.emit(s.open[0], a.interval, emit)
		}
	}
}

// asmState is the JSON form of the Assembler (State/Restore). Times are Unix
// nanoseconds, depths metres, sums °C.
type asmState struct {
	Version     int            `json:"version"`
	IntervalNS  int64          `json:"interval_ns"`
	WatermarkNS int64          `json:"watermark_ns"`
	Sites       []asmSiteState `json:"sites"`
}

type asmSiteState struct {
	Site     string           `json:"site"`
	Depths   []float64        `json:"depths_m"`
	LastSeen []int64          `json:"last_seen_ns"`
	Gap1     []int64          `json:"gap1_ns"`
	Gap2     []int64          `json:"gap2_ns"`
	MaxT     *int64           `json:"max_time_ns,omitempty"`
	Next     *int64           `json:"next_ns,omitempty"`
	Open     []asmBucketState `json:"open,omitempty"`
}

type asmBucketState struct {
	Start int64     `json:"start_ns"`
	Sum   []float64 `json:"sum_c"`
	N     []int32   `json:"n"`
	Last  []int64   `json:"last_ns"`
}

// state returns the saved form of one site.
func (s *asmSite) state() asmSiteState {
	ss := asmSiteState{
		Site:     s.id,
		Depths:   slices.Clone(s.depths),
		LastSeen: slices.Clone(s.lastSeen),
		Gap1:     slices.Clone(s.gap1),
		Gap2:     slices.Clone(s.gap2),
	}
	if s.hasMax {
		v := s.maxT
		ss.MaxT = &v
	}
	if s.hasNext {
		v := s.next
		ss.Next = &v
	}
	for _, b := range s.open {
		ss.Open = append(ss.Open, asmBucketState{
			Start: b.start, Sum: slices.Clone(b.sum), N: slices.Clone(b.n), Last: slices.Clone(b.last),
		})
	}
	return ss
}

// AppendSiteState appends the JSON state of one site (the form of one entry
// of State's sites) to dst; ok is false, and dst is returned unchanged, when
// the Assembler has no state for the site. RestoreSites reads it back.
func (a *Assembler) AppendSiteState(dst []byte, id string) (_ []byte, ok bool, err error) {
	s := a.sites[id]
	if s == nil {
		return dst, false, nil
	}
	b, err := json.Marshal(s.state())
	if err != nil {
		return dst, false, fmt.Errorf("assembler state: site %q: %w", id, err)
	}
	return append(dst, b...), true, nil
}

// RestoreSites replaces the assembly state with per-site states written by
// AppendSiteState of an Assembler whose profile interval was intervalNS (ns),
// keyed by site id (the slices are not retained). Like Restore it rejects
// another interval length than this Assembler's; on error the state is left
// unchanged.
func (a *Assembler) RestoreSites(intervalNS int64, states map[string][]byte) error {
	if intervalNS != a.interval {
		return fmt.Errorf("assembler state: saved with a %s profile interval, configured %s",
			time.Duration(intervalNS), time.Duration(a.interval))
	}
	sites := make(map[string]*asmSite, len(states))
	for id, b := range states {
		var ss asmSiteState
		if err := json.Unmarshal(b, &ss); err != nil {
			return fmt.Errorf("assembler state: site %q: %w", id, err)
		}
		if ss.Site != id {
			return fmt.Errorf("assembler state: site %q saved under %q", ss.Site, id)
		}
		s, err := a.restoreSite(ss)
		if err != nil {
			return err
		}
		sites[id] = s
	}
	a.sites, a.last = sites, nil
	return nil
}

// State returns the assembly state (open intervals, per-sensor timing,
// watermarks) as JSON, for crash recovery with Restore. Sites are sorted by id.
func (a *Assembler) State() ([]byte, error) {
	st := asmState{Version: asmStateVersion, IntervalNS: a.interval, WatermarkNS: a.watermark, Sites: []asmSiteState{}}
	ids := make([]string, 0, len(a.sites))
	for id := range a.sites {
		ids = append(ids, id)
	}
	sort.Strings(ids)
	for _, id := range ids {
		st.Sites = append(st.Sites, a.sites[id].state())
	}
	b, err := json.Marshal(st)
	if err != nil {
		return nil, fmt.Errorf("assembler state: %w", err)
	}
	return b, nil
}

// Restore replaces the assembly state with one returned by State. The
// interval and watermark are those of this Assembler (the saved ones are
// informational); the configured depths are this Assembler's, merged with
// the saved depths. Open intervals are kept as they were; an interval saved
// with another interval length than this Assembler's is rejected.
func (a *Assembler) Restore(data []byte) error {
	var st asmState
	if err := json.Unmarshal(data, &st); err != nil {
		return fmt.Errorf("assembler state: %w", err)
	}
	if st.Version != asmStateVersion {
		return fmt.Errorf("assembler state: version %d, want %d", st.Version, asmStateVersion)
	}
	if st.IntervalNS != a.interval {
		return fmt.Errorf("assembler state: saved with a %s profile interval, configured %s",
			time.Duration(st.IntervalNS), time.Duration(a.interval))
	}
	sites := make(map[string]*asmSite, len(st.Sites))
	for _, ss := range st.Sites {
		if _, dup := sites[ss.Site]; dup {
			return fmt.Errorf("assembler state: site %q twice", ss.Site)
		}
		s, err := a.restoreSite(ss)
		if err != nil {
			return err
		}
		sites[ss.Site] = s
	}
	a.sites, a.last = sites, nil
	return nil
}

// restoreSite rebuilds one site from its saved form.
func (a *Assembler) restoreSite(ss asmSiteState) (*asmSite, error) {
	nd := len(ss.Depths)
	if len(ss.LastSeen) != nd || len(ss.Gap1) != nd || len(ss.Gap2) != nd {
		return nil, fmt.Errorf("assembler state: site %q: per-depth arrays of unequal length", ss.Site)
	}
	s := a.newSite(ss.Site)
	for _, d := range ss.Depths {
		if !finite(d) {
			return nil, fmt.Errorf("assembler state: site %q: depth %g", ss.Site, d)
		}
		if k, ok := s.find(d, a.tol); !ok {
			s.insertDepth(k, d, s.expected == nil)
		}
	}
	// Indices are resolved after every insertion, which shifts them.
	idx := make([]int, nd)
	for i, d := range ss.Depths {
		k, _ := s.find(d, a.tol)
		idx[i] = k
		s.lastSeen[k] = max(s.lastSeen[k], ss.LastSeen[i])
		s.gap1[k], s.gap2[k] = ss.Gap1[i], ss.Gap2[i]
	}
	if ss.MaxT != nil {
		s.maxT, s.hasMax = *ss.MaxT, true
	}
	if ss.Next != nil {
		s.next, s.hasNext = *ss.Next, true
	}
	prev := int64(math.MinInt64)
	for _, bs := range ss.Open {
		if len(bs.Sum) != nd || len(bs.N) != nd || len(bs.Last) != nd {
			return nil, fmt.Errorf("assembler state: site %q: open interval arrays of unequal length", ss.Site)
		}
		if bs.Start <= prev || floorDiv(bs.Start, a.interval) != bs.Start {
			return nil, fmt.Errorf("assembler state: site %q: open interval %d out of order or misaligned", ss.Site, bs.Start)
		}
		prev = bs.Start
		b := s.bucket(bs.Start, a.interval)
		for i, k := range idx {
			b.sum[k] += bs.Sum[i]
			b.n[k] += bs.N[i]
			b.last[k] = max(b.last[k], bs.Last[i])
		}
	}
	s.hint = 0
	return s, nil
}

// Depths returns a copy of the depths (m, ascending) known at a site: its
// configured depths and every depth seen in a usable reading.
func (a *Assembler) Depths(site string) []float64 {
	if s := a.sites[site]; s != nil {
		return slices.Clone(s.depths)
	}
	return slices.Clone(a.expected[site])
}
