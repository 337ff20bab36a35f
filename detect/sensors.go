package detect

import (
	"fmt"
	"math"
	"sort"
	"strconv"
	"strings"
	"time"
)

// depthTol is how close (m) two depths must be to name the same sensor.
const depthTol = 0.005

// slotState is one sensor depth the site knows: configured, announced by a
// profile's Expected list, or seen in a profile.
type slotState struct {
	Depth    float64   `json:"depth_m"`
	Expected bool      `json:"expected"`
	LastSeen time.Time `json:"last_seen"` // last profile with this depth (or when watching began)
	Faulted  bool      `json:"faulted"`
	// FaultOnset is when the silence began (the last reading before it).
	FaultOnset time.Time `json:"fault_onset"`
	// Hourly accumulation for the ice detector.
	BinSum   float64 `json:"bin_sum"`
	BinN     int     `json:"bin_n"`
	PrevMean float64 `json:"prev_mean"` // mean of the previous hour
	PrevOK   bool    `json:"prev_ok"`
	// White-noise estimate from sub-hourly readings (see noiseStep): the
	// last two readings, the current hour's sum of squared second
	// differences, and the noise variance of the previous hour's mean (°C²).
	N1T      time.Time `json:"n1_t"`
	N1V      float64   `json:"n1_v"`
	N2T      time.Time `json:"n2_t"`
	N2V      float64   `json:"n2_v"`
	BinD2Sum float64   `json:"bin_d2_sum"`
	BinD2N   int       `json:"bin_d2_n"`
	PrevNV   float64   `json:"prev_nv"`
	PrevNVOK bool      `json:"prev_nv_ok"`
}

// resetNoise forgets the slot's noise estimate (a data gap).
func (sl *slotState) resetNoise() {
	sl.N1T, sl.N1V, sl.N2T, sl.N2V = time.Time{}, 0, time.Time{}, 0
	sl.BinD2Sum, sl.BinD2N = 0, 0
	sl.PrevNV, sl.PrevNVOK = 0, false
}

// slotIndex returns the index of the slot at depth z, or −1.
func (st *siteState) slotIndex(z float64) int {
	i := sort.Search(len(st.Slots), func(i int) bool { return st.Slots[i].Depth >= z-depthTol })
	if i < len(st.Slots) && math.Abs(st.Slots[i].Depth-z) <= depthTol {
		return i
	}
	return -1
}

// insertSlot adds a slot at depth z (sorted) and returns its index.
func (st *siteState) insertSlot(z float64, t time.Time, expected bool) int {
	i := sort.Search(len(st.Slots), func(i int) bool { return st.Slots[i].Depth >= z })
	st.Slots = append(st.Slots, slotState{})
	copy(st.Slots[i+1:], st.Slots[i:])
	st.Slots[i] = slotState{Depth: z, Expected: expected, LastSeen: t}
	return i
}

// matchSlots maps the profile's depths onto slots (adding unknown depths) and
// fills s.present. Both lists are ascending, so one merge pass suffices.
func (s *Site) matchSlots(p Profile) {
	st := &s.st
	j := 0
	for _, z := range p.Depths {
		for j < len(st.Slots) && st.Slots[j].Depth < z-depthTol {
			j++
		}
		if j < len(st.Slots) && math.Abs(st.Slots[j].Depth-z) <= depthTol {
			j++
			continue
		}
		st.insertSlot(z, p.Time.UTC(), false)
		j++
	}
	if cap(s.present) < len(st.Slots) {
		s.present = make([]int, len(st.Slots))
	}
	s.present = s.present[:len(st.Slots)]
	for k := range s.present {
		s.present[k] = -1
	}
	j = 0
	for i, z := range p.Depths {
		for j < len(st.Slots) && st.Slots[j].Depth < z-depthTol {
			j++
		}
		if j < len(st.Slots) {
			s.present[j] = i
			j++
		}
	}
}

// expectedFromProfile marks the profile's Expected depths (when the site has
// no configured list) as expected, adding slots for depths never seen.
func (s *Site) expectedFromProfile(p Profile) {
	if len(s.cfg.Expected) > 0 || len(p.Expected) == 0 {
		return
	}
	added := false
	for _, z := range p.Expected {
		if math.IsNaN(z) || math.IsInf(z, 0) || z < 0 {
			continue
		}
		i := s.st.slotIndex(z)
		if i < 0 {
			i = s.st.insertSlot(z, p.Time.UTC(), true)
			added = true
		}
		s.st.Slots[i].Expected = true
	}
	if added {
		// slot indices moved: rebuild the presence map
		s.matchSlots(p)
	}
}

// expectedCount is the number of depths the site expects: the expected
// slots, or every slot when none is expected.
func (s *Site) expectedCount() int {
	n := 0
	for i := range s.st.Slots {
		if s.st.Slots[i].Expected {
			n++
		}
	}
	if n == 0 {
		return len(s.st.Slots)
	}
	return n
}

// watched reports whether slot i counts towards faults and confidence.
func (s *Site) watched(i int, anyExpected bool) bool {
	return !anyExpected || s.st.Slots[i].Expected
}

func (s *Site) anyExpected() bool {
	for i := range s.st.Slots {
		if s.st.Slots[i].Expected {
			return true
		}
	}
	return false
}

// missing lists the watched depths absent from the current profile (nil when none).
func (s *Site) missing() []float64 {
	ae := s.anyExpected()
	var out []float64
	for i := range s.st.Slots {
		if s.present[i] < 0 && s.watched(i, ae) {
			out = append(out, s.st.Slots[i].Depth)
		}
	}
	return out
}

// confidence describes the sensor coverage of the current profile.
func (s *Site) confidence() string {
	ae := s.anyExpected()
	n, miss := 0, 0
	var names []string
	for i := range s.st.Slots {
		if !s.watched(i, ae) {
			continue
		}
		n++
		if s.present[i] < 0 {
			miss++
			if len(names) < 6 {
				names = append(names, depthName(s.st.Slots[i].Depth))
			}
		}
	}
	if miss == 0 {
		return fmt.Sprintf("all %d sensors reporting", n)
	}
	list := strings.Join(names, ", ")
	if miss > len(names) {
		list += ", …"
	}
	return fmt.Sprintf("%d of %d sensors missing (%s)", miss, n, list)
}

// depthName formats a depth as the Subject of sensor events, e.g. "7.05 m".
func depthName(z float64) string {
	return strconv.FormatFloat(z, 'f', 2, 64) + " m"
}

// checkSensors raises sensor_fault when a watched depth has been silent for
// longer than SensorFaultAfter, and resolves it when the depth reports again.
func (s *Site) checkSensors(ev *evCtx) {
	ae := s.anyExpected()
	t := ev.t
	for i := range s.st.Slots {
		sl := &s.st.Slots[i]
		if s.present[i] >= 0 {
			if sl.Faulted {
				sl.Faulted = false
				silent := t.Sub(sl.FaultOnset)
				e := s.event(ev, KindSensorFault, StatusResolved, "warning", depthName(sl.Depth),
					fmt.Sprintf("%s: sensor at %s reporting again after %s of silence.", s.name(), depthName(sl.Depth), hours(silent)))
				e.Details["onset"] = stamp(sl.FaultOnset)
				e.Details["depth_m"] = strconv.FormatFloat(sl.Depth, 'f', -1, 64)
				e.Metrics = append(e.Metrics, Metric{"silent_hours", silent.Hours(), "h"}, Metric{"sensor_depth_m", sl.Depth, "m"})
				ev.add(e)
			}
			sl.LastSeen = t
			continue
		}
		if !s.watched(i, ae) || sl.Faulted {
			continue
		}
		if sl.LastSeen.IsZero() { // configured depth never seen: watch from the first profile
			sl.LastSeen = t
			continue
		}
		if silent := t.Sub(sl.LastSeen); silent > s.cfg.SensorFaultAfter {
			sl.Faulted = true
			sl.FaultOnset = sl.LastSeen
			s.st.Summary.SensorFaults++
			e := s.event(ev, KindSensorFault, StatusFiring, "warning", depthName(sl.Depth),
				fmt.Sprintf("%s: no reading at %s for %s (limit %s).", s.name(), depthName(sl.Depth), hours(silent), hours(s.cfg.SensorFaultAfter)))
			e.Details["onset"] = stamp(sl.FaultOnset)
			e.Details["depth_m"] = strconv.FormatFloat(sl.Depth, 'f', -1, 64)
			e.Details["last_reading"] = stamp(sl.LastSeen)
			e.Metrics = append(e.Metrics, Metric{"silent_hours", silent.Hours(), "h"}, Metric{"sensor_depth_m", sl.Depth, "m"})
			ev.add(e)
		}
	}
}
