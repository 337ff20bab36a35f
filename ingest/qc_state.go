package ingest

import (
	"cmp"
	"encoding/json"
	"fmt"
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
	return nil
}
