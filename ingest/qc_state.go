package ingest

import (
	"cmp"
	"encoding/binary"
	"encoding/json"
	"fmt"
	"iter"
	"math"
	"slices"
)

// qcState is the JSON form of the QualityControl memory (State/Restore).
// Times are Unix nanoseconds, temperatures °C, depths millimetres.
type qcState struct {
	Version int             `json:"version"`
	Sensors []qcSensorState `json:"sensors"`
}

type qcSensorState struct {
	Site     string    `json:"site"`
	DepthMM  int64     `json:"depth_mm"`
	HistT    []int64   `json:"hist_t,omitempty"` // accepted values, oldest first
	HistV    []float64 `json:"hist_v,omitempty"`
	PendT    []int64   `json:"pend_t,omitempty"` // spike candidates, oldest first
	PendV    []float64 `json:"pend_v,omitempty"`
	Seen     bool      `json:"seen"`
	Latest   int64     `json:"latest"`
	RunStart int64     `json:"run_start"`
	RunV     float64   `json:"run_v"`
	HasRun   bool      `json:"has_run"`
	Times    []int64   `json:"times,omitempty"` // recent timestamps, oldest first
}

// State returns the spike, step, stuck and duplicate memory as JSON, so it
// survives a restart (see Restore). Sensors are sorted by site and depth.
func (q *QualityControl) State() ([]byte, error) {
	st := qcState{Version: qcStateVersion, Sensors: make([]qcSensorState, 0, len(q.sensors))}
	for k, s := range q.sensors {
		ss := qcSensorState{
			Site: k.site, DepthMM: k.mm,
			Seen: s.seen, Latest: s.latest, RunStart: s.runStart, RunV: s.runV, HasRun: s.hasRun,
		}
		for _, x := range s.hist[:s.nHist] {
			ss.HistT = append(ss.HistT, x.t)
			ss.HistV = append(ss.HistV, x.v)
		}
		for _, x := range s.pend[:s.nPend] {
			ss.PendT = append(ss.PendT, x.t)
			ss.PendV = append(ss.PendV, x.v)
		}
		if len(s.dups) > 0 {
			// oldest first: the ring's write position holds the oldest once full
			ss.Times = append(ss.Times, s.dups[s.dupHead:]...)
			ss.Times = append(ss.Times, s.dups[:s.dupHead]...)
		}
		st.Sensors = append(st.Sensors, ss)
	}
	slices.SortFunc(st.Sensors, func(a, b qcSensorState) int {
		if c := cmp.Compare(a.Site, b.Site); c != 0 {
			return c
		}
		return cmp.Compare(a.DepthMM, b.DepthMM)
	})
	b, err := json.Marshal(st)
	if err != nil {
		return nil, fmt.Errorf("qc state: %w", err)
	}
	return b, nil
}

// Restore replaces the memory with one saved by State. Lists longer than this
// QualityControl keeps (for instance after lowering DuplicateWindow) are cut
// to their newest entries. On error the memory is left unchanged.
func (q *QualityControl) Restore(data []byte) error {
	var st qcState
	if err := json.Unmarshal(data, &st); err != nil {
		return fmt.Errorf("qc state: %w", err)
	}
	if st.Version != qcStateVersion {
		return fmt.Errorf("qc state: version %d, want %d", st.Version, qcStateVersion)
	}
	if len(st.Sensors) > q.limit {
		return fmt.Errorf("qc state: %d sensors, limit %d", len(st.Sensors), q.limit)
	}
	sensors := make(map[sensorKey]*sensorState, len(st.Sensors))
	for i, ss := range st.Sensors {
		if e := checkID(ss.Site); e != "" {
			return fmt.Errorf("qc state: sensor %d: site: %s", i, e)
		}
		if len(ss.HistT) != len(ss.HistV) || len(ss.PendT) != len(ss.PendV) {
			return fmt.Errorf("qc state: sensor %d (%s): time and value lists differ in length", i, ss.Site)
		}
		if !finite(ss.RunV) {
			return fmt.Errorf("qc state: sensor %d (%s): run value not finite", i, ss.Site)
		}
		k := sensorKey{site: ss.Site, mm: ss.DepthMM}
		if _, dup := sensors[k]; dup {
			return fmt.Errorf("qc state: sensor %s at %d mm listed twice", ss.Site, ss.DepthMM)
		}
		s := &sensorState{seen: ss.Seen, latest: ss.Latest, runStart: ss.RunStart, runV: ss.RunV, hasRun: ss.HasRun}
		for j := max(0, len(ss.HistT)-spikeHistory); j < len(ss.HistT); j++ {
			if !finite(ss.HistV[j]) {
				return fmt.Errorf("qc state: sensor %d (%s): value not finite", i, ss.Site)
			}
			s.accept(sample{t: ss.HistT[j], v: ss.HistV[j]})
		}
		for j := max(0, len(ss.PendT)-len(s.pend)); j < len(ss.PendT); j++ {
			if !finite(ss.PendV[j]) {
				return fmt.Errorf("qc state: sensor %d (%s): value not finite", i, ss.Site)
			}
			s.pend[s.nPend] = sample{t: ss.PendT[j], v: ss.PendV[j]}
			s.nPend++
		}
		for _, t := range ss.Times[max(0, len(ss.Times)-q.c.DuplicateWindow):] {
			s.remember(t, q.c.DuplicateWindow)
		}
		sensors[k] = s
	}
	q.sensors = sensors
	q.resetCache()
	q.changed.SetAll()
	return nil
}

// ChunkFunc receives one site's share of saved state. chunk is only valid
// during the call (the caller's buffer is reused): copy it to keep it.
type ChunkFunc func(site string, chunk []byte) error

// qcChunkVersion is the first byte of a per-site quality-control chunk.
const qcChunkVersion = 2

// WriteStateChunks encodes the memory of every site whose sensors changed
// since the previous call (all sites with all set, after New and after
// Restore or RestoreChunks) and calls put once per site, sites in ascending
// order, the chunk holding the site's sensors in a compact binary form (see
// RestoreChunks). The change record is reset before the first put: after a
// failed save the caller must call it again with all set. A site whose
// chunk was saved before and did not change since has the same state.
func (q *QualityControl) WriteStateChunks(all bool, put ChunkFunc) error {
	changed := q.changed.Take(all)
	bySite := make(map[string][]chunkEntry[int64, *sensorState])
	for k, s := range q.sensors {
		if changed.Has(k.site) {
			bySite[k.site] = append(bySite[k.site], chunkEntry[int64, *sensorState]{k.mm, s})
		}
	}
	return writeSiteChunks("qc state", qcChunkVersion, bySite,
		func(b []byte, mm int64, s *sensorState) []byte { return s.appendState(b, mm) }, put)
}

// Flags of a sensor in a quality-control chunk.
const (
	qcChunkSeen = 1 << iota
	qcChunkHasRun
)

// appendState appends one sensor: the depth (mm, varint), a flag byte, the
// newest in-order time (Unix ns, varint), the run's start (varint, relative
// to the newest time) and value (float64 bits) when it has a run, then the
// accepted values and the spike candidates (uvarint count; per sample the
// time relative to the newest time as varint and the float64 bits), then the
// remembered timestamps oldest first (uvarint count; each as a varint
// difference from the one before, the first from the newest time).
func (s *sensorState) appendState(b []byte, mm int64) []byte {
	b = binary.AppendVarint(b, mm)
	var fl byte
	if s.seen {
		fl |= qcChunkSeen
	}
	if s.hasRun {
		fl |= qcChunkHasRun
	}
	b = append(b, fl)
	b = binary.AppendVarint(b, s.latest)
	if s.hasRun {
		b = binary.AppendVarint(b, s.runStart-s.latest)
		b = binary.LittleEndian.AppendUint64(b, math.Float64bits(s.runV))
	}
	for _, xs := range [2][]sample{s.hist[:s.nHist], s.pend[:s.nPend]} {
		b = binary.AppendUvarint(b, uint64(len(xs)))
		for _, x := range xs {
			b = binary.AppendVarint(b, x.t-s.latest)
			b = binary.LittleEndian.AppendUint64(b, math.Float64bits(x.v))
		}
	}
	b = binary.AppendUvarint(b, uint64(len(s.dups)))
	prev := s.latest
	for i := range s.dups {
		t := s.dups[(s.dupHead+i)%len(s.dups)]
		b = binary.AppendVarint(b, t-prev)
		prev = t
	}
	return b
}

// chunkReader decodes the varints and fixed-size fields of a chunk.
type chunkReader struct {
	p   []byte
	bad bool
}

func (r *chunkReader) varint() int64 {
	v, k := binary.Varint(r.p)
	if k <= 0 {
		r.bad, r.p = true, nil
		return 0
	}
	r.p = r.p[k:]
	return v
}

func (r *chunkReader) uvarint(limit uint64) int {
	v, k := binary.Uvarint(r.p)
	if k <= 0 || v > limit {
		r.bad, r.p = true, nil
		return 0
	}
	r.p = r.p[k:]
	return int(v)
}

func (r *chunkReader) byte1() byte {
	if len(r.p) < 1 {
		r.bad = true
		return 0
	}
	c := r.p[0]
	r.p = r.p[1:]
	return c
}

func (r *chunkReader) float() float64 {
	if len(r.p) < 8 {
		r.bad, r.p = true, nil
		return 0
	}
	v := math.Float64frombits(binary.LittleEndian.Uint64(r.p))
	r.p = r.p[8:]
	return v
}

// RestoreChunks replaces the memory with the chunks written by
// WriteStateChunks (site → chunk; the chunks are not retained). Lists longer
// than this QualityControl keeps are cut to their newest entries, as in
// Restore. On error the memory is left unchanged.
func (q *QualityControl) RestoreChunks(chunks iter.Seq2[string, []byte]) error {
	sensors := make(map[sensorKey]*sensorState)
	for site, chunk := range chunks {
		if err := q.restoreChunk(sensors, site, chunk); err != nil {
			return err
		}
	}
	q.sensors = sensors
	q.resetCache()
	q.changed.SetAll()
	return nil
}

func (q *QualityControl) restoreChunk(sensors map[sensorKey]*sensorState, site string, chunk []byte) error {
	if e := checkID(site); e != "" {
		return fmt.Errorf("qc state: site %q: %s", site, e)
	}
	if len(chunk) < 1 || chunk[0] != qcChunkVersion {
		return fmt.Errorf("qc state: site %q: chunk version %d, want %d", site, firstByte(chunk), qcChunkVersion)
	}
	r := &chunkReader{p: chunk[1:]}
	n := r.uvarint(uint64(len(chunk)))
	corrupt := fmt.Errorf("qc state: site %q: truncated or corrupt chunk", site)
	for i := 0; i < n && !r.bad; i++ {
		if len(sensors) >= q.limit {
			return fmt.Errorf("qc state: more than %d sensors", q.limit)
		}
		mm := r.varint()
		fl := r.byte1()
		s := &sensorState{seen: fl&qcChunkSeen != 0, hasRun: fl&qcChunkHasRun != 0}
		s.latest = r.varint()
		if s.hasRun {
			s.runStart = s.latest + r.varint()
			s.runV = r.float()
			if !finite(s.runV) {
				return fmt.Errorf("qc state: site %q: run value not finite", site)
			}
		}
		for list := range 2 {
			m := r.uvarint(uint64(len(r.p)))
			keep := spikeHistory
			if list == 1 {
				keep = len(s.pend)
			}
			for j := 0; j < m && !r.bad; j++ {
				x := sample{t: s.latest + r.varint(), v: r.float()}
				if !finite(x.v) && !r.bad {
					return fmt.Errorf("qc state: site %q: value not finite", site)
				}
				if j < m-keep { // older than what is kept
					continue
				}
				if list == 0 {
					s.accept(x)
				} else {
					s.pend[s.nPend] = x
					s.nPend++
				}
			}
		}
		m := r.uvarint(uint64(len(r.p)))
		prev := s.latest
		for j := 0; j < m && !r.bad; j++ {
			t := prev + r.varint()
			prev = t
			if j >= m-q.c.DuplicateWindow {
				s.remember(t, q.c.DuplicateWindow)
			}
		}
		if r.bad {
			break
		}
		k := sensorKey{site: site, mm: mm}
		if _, dup := sensors[k]; dup {
			return fmt.Errorf("qc state: sensor %s at %d mm listed twice", site, mm)
		}
		sensors[k] = s
	}
	if r.bad || len(r.p) != 0 {
		return corrupt
	}
	return nil
}
