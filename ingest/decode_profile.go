package ingest

import (
	"bytes"
	"slices"
	"time"
)

// Format "json-profile": one profile (one site, one instant, many depths) per
// message, in either or both of two shapes:
//
//	{"time": "2024-06-01T12:00:00Z", "site": "calder-mere",
//	 "depths_m": [0.5, 2, 5, 10], "temps_c": [18.1, 17.9, 12.4, 6.2]}
//
//	{"time": 1717243200, "site": "calder-mere", "unit": "F",
//	 "readings": [{"depth_m": 0.5, "temp_c": 64.6},
//	              {"depth_m": 2, "temp_c": 64.2, "time": 1717243190, "sensor": "t2"}]}
//
// Top-level time, site and unit work as in format json (site also from the
// topic or the subscription). An element of "readings" may carry its own time,
// sensor and unit; a site in an element must equal the message's site. The
// arrays must have equal lengths (else length_mismatch) and at most
// MaxReadingsPerMessage readings in total (else too_many).
//
// A null temperature (in "temps_c" or an element's temp) means the sensor at
// that depth sent no value: that depth is skipped, not an error. A message
// that yields no reading at all is missing_field.
type profileDecoder struct {
	base
	f fieldNames
}

func (d *profileDecoder) Decode(topic string, payload []byte, recv time.Time, dst []Reading) ([]Reading, error) {
	n0 := len(dst)
	out, err := d.decode(topic, payload, recv.UTC(), dst)
	if err != nil {
		return dst[:n0], err
	}
	return out, nil
}

func (d *profileDecoder) decode(topic string, payload []byte, recv time.Time, dst []Reading) ([]Reading, error) {
	body, err := d.checkJSON(payload)
	if err != nil {
		return dst, err
	}
	tv, err := d.matchTopic(topic)
	if err != nil {
		return dst, err
	}
	m, ok := objectMembers(body)
	if !ok {
		return dst, decErr(ReasonBadShape, "payload is %s, want an object", kindOf(body))
	}
	var top rawReading
	var depths, temps, list []byte
	for {
		k, v, ok := m.next()
		if !ok {
			break
		}
		switch string(k) {
		case d.f.time:
			top.time = v
		case d.f.site:
			top.site = v
		case d.f.sensor:
			top.sensor = v
		case unitKey:
			top.unit = v
		case d.f.depths:
			depths = v
		case d.f.temps:
			temps = v
		case d.f.readings:
			list = v
		}
	}
	u, err := d.resolveUnit(top.unit)
	if err != nil {
		return dst, err
	}
	ts, qc, err := resolveTime(top.time, recv)
	if err != nil {
		return dst, err
	}
	site, err := d.resolveSite(top.site, &tv)
	if err != nil {
		return dst, err
	}
	sensor, err := resolveSensor(top.sensor, &tv)
	if err != nil {
		return dst, err
	}
	n0 := len(dst)
	hasArrays := kindOf(depths) != kNone || kindOf(temps) != kNone
	hasList := kindOf(list) != kNone && kindOf(list) != kNull
	if !hasArrays && !hasList {
		return dst, decErr(ReasonMissingField, "neither %q/%q nor %q", d.f.depths, d.f.temps, d.f.readings)
	}
	if hasArrays {
		dst, err = d.arrays(depths, temps, u, site, sensor, ts, qc, dst)
		if err != nil {
			return dst, err
		}
	}
	if hasList {
		dst, err = d.list(list, u, site, sensor, ts, qc, &tv, dst, n0)
		if err != nil {
			return dst, err
		}
	}
	if len(dst) == n0 {
		return dst, decErr(ReasonMissingField, "profile has no readings")
	}
	return dst, nil
}

func (d *profileDecoder) arrays(depths, temps []byte, u unit, site, sensor string, ts time.Time, qc QC, dst []Reading) ([]Reading, error) {
	de, ok := arrayElements(depths)
	if !ok {
		if kindOf(depths) == kNone || kindOf(depths) == kNull {
			return dst, decErr(ReasonMissingField, "%q without %q", d.f.temps, d.f.depths)
		}
		return dst, decErr(ReasonBadShape, "%q is %s, want an array", d.f.depths, kindOf(depths))
	}
	te, ok := arrayElements(temps)
	if !ok {
		if kindOf(temps) == kNone || kindOf(temps) == kNull {
			return dst, decErr(ReasonMissingField, "%q without %q", d.f.depths, d.f.temps)
		}
		return dst, decErr(ReasonBadShape, "%q is %s, want an array", d.f.temps, kindOf(temps))
	}
	// One allocation for the profile: about as many readings as commas.
	dst = slices.Grow(dst, min(bytes.Count(temps, []byte{','})+1, MaxReadingsPerMessage))
	for i := 0; ; i++ {
		dv, dok := de.next()
		tvv, tok := te.next()
		if !dok || !tok {
			if dok || tok {
				return dst, decErr(ReasonLengthMismatch, "%q and %q differ in length (first difference at index %d)", d.f.depths, d.f.temps, i)
			}
			return dst, nil
		}
		if i >= MaxReadingsPerMessage {
			return dst, decErr(ReasonTooMany, "more than %d readings", MaxReadingsPerMessage)
		}
		if kindOf(tvv) == kNull {
			continue
		}
		t, err := parseNumber(tvv, d.f.temps)
		if err != nil {
			return dst, err
		}
		if t, err = checkTemp(t, u); err != nil {
			return dst, err
		}
		if kindOf(dv) == kNull {
			return dst, decErr(ReasonMissingField, "%q[%d] is null", d.f.depths, i)
		}
		depth, err := parseNumber(dv, d.f.depths)
		if err != nil {
			return dst, err
		}
		if err := checkDepth(depth); err != nil {
			return dst, err
		}
		dst = append(dst, Reading{Site: site, Sensor: sensor, Depth: depth, Time: ts, TempC: t, QC: qc})
	}
}

func (d *profileDecoder) list(list []byte, u unit, site, sensor string, ts time.Time, qc QC, tv *topicVals, dst []Reading, n0 int) ([]Reading, error) {
	el, ok := arrayElements(list)
	if !ok {
		return dst, decErr(ReasonBadShape, "%q is %s, want an array", d.f.readings, kindOf(list))
	}
	// The topic's {depth} names one sensor; in a profile every element must
	// carry its own depth.
	noDepth := topicVals{}
	count := len(dst) - n0
	for i := 0; ; i++ {
		ev, ok := el.next()
		if !ok {
			return dst, nil
		}
		if count >= MaxReadingsPerMessage {
			return dst, decErr(ReasonTooMany, "more than %d readings", MaxReadingsPerMessage)
		}
		var rr rawReading
		if !d.f.scanReading(ev, &rr) {
			return dst, decErr(ReasonBadShape, "%q[%d] is %s, want an object", d.f.readings, i, kindOf(ev))
		}
		if kindOf(rr.temp) == kNull {
			continue
		}
		eu := u
		if kindOf(rr.unit) != kNone {
			var err error
			if eu, err = d.resolveUnit(rr.unit); err != nil {
				return dst, err
			}
		}
		temp, depth, err := tempDepth(&rr, eu, &noDepth, &d.f)
		if err != nil {
			return dst, err
		}
		r := Reading{Site: site, Sensor: sensor, Depth: depth, Time: ts, TempC: temp, QC: qc}
		if kindOf(rr.time) != kNone {
			if r.Time, r.QC, err = resolveTime(rr.time, ts); err != nil {
				return dst, err
			}
			if r.QC == QCNoTime { // null element time: the message's time stands
				r.QC = qc
			}
		}
		if id, present, err := parseID(rr.site, ReasonBadSite, "site"); err != nil {
			return dst, err
		} else if present && string(id) != site {
			return dst, decErr(ReasonBadSite, "%q[%d] names site %s, the message %q", d.f.readings, i, snippet(id), clip(site))
		}
		if kindOf(rr.sensor) != kNone {
			if r.Sensor, err = resolveSensor(rr.sensor, tv); err != nil {
				return dst, err
			}
		}
		dst = append(dst, r)
		count++
	}
}
