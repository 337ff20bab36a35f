package ingest

import (
	"bytes"
	"fmt"
	"math"
	"time"
)

// Format "senml": SenML JSON (RFC 8428), an array of records such as
//
//	[{"bn": "urn:dev:mac:0024befffe804ff1:", "bt": 1717243200, "bu": "Cel"},
//	 {"n": "t0.5", "v": 18.1}, {"n": "t2", "v": 17.9, "t": -30}]
//
// Resolution follows RFC 8428 §4.6: base fields (bn, bt, bu, bv) apply to the
// record carrying them and to all later records until replaced; the name is
// bn+n, the time bt+t, the value bv+v, the unit u or else bu. A resolved time
// below 2^28 s is relative to the receive time (§4.5.3), otherwise it is
// seconds since 1970-01-01 UTC. A record with neither bt nor t in force gets
// the receive time and QCNoTime.
//
// Units: "Cel" and "K" (RFC 8428 §12.1) and "degF" (RFC 8798); any other unit
// is bad_unit. A record with no unit uses the subscription's unit (default °C).
//
// Depths: the subscription's senml_depths maps names to depths in metres. The
// full resolved name (bn+n) is looked up first, then the record's own n (the
// part after bn); a name found in neither is unknown_senml_name. The matching
// key becomes Reading.Sensor.
//
// Site: {site} of the topic template, else the subscription's site, else taken
// from bn: the last non-empty part of bn split at ':' and '/'
// ("urn:dev:mac:0024befffe804ff1:" → "0024befffe804ff1", "calder-mere/" →
// "calder-mere").
//
// Strictness: the whole pack is rejected when any record is unusable, so no
// record is dropped silently. A record holding only base fields (no n, no v)
// is a header and yields nothing. Records with string, boolean or data values
// (vs, vb, vd) are bad_number; a record without v is missing_field; fields
// whose names end in "_" (must-understand, §4.4) are bad_shape. Other fields
// (s, bs, ut, bver, extensions) are ignored.
type senmlDecoder struct {
	base
	names map[string]senmlName
}

type senmlName struct {
	key   string // the senml_depths key (reused as Reading.Sensor)
	depth float64
}

// senmlRelativeLimit is 2^28 s: smaller resolved times are relative (RFC 8428 §4.5.3).
const senmlRelativeLimit = 1 << 28

// senmlMaxPast bounds relative times (s): 4e9 s is about 127 years.
const senmlMaxPast = 4e9

func senmlNamesFrom(m map[string]float64) (map[string]senmlName, error) {
	if len(m) == 0 {
		return nil, fmt.Errorf("format senml needs senml_depths (record name → depth in metres)")
	}
	out := make(map[string]senmlName, len(m))
	for k, d := range m {
		if k == "" {
			return nil, fmt.Errorf("empty record name")
		}
		if err := checkDepth(d); err != nil {
			return nil, fmt.Errorf("name %q: %w", k, err)
		}
		out[k] = senmlName{key: k, depth: d}
	}
	return out, nil
}

// senmlRecord holds the raw fields of one record.
type senmlRecord struct {
	bn, bt, bu, bv, n, u, v, t []byte
	other                      []byte // vs, vb or vd
	base                       bool   // any base field present
}

func scanSenMLRecord(obj []byte, r *senmlRecord) error {
	m, _ := objectMembers(obj)
	for {
		k, v, ok := m.next()
		if !ok {
			return nil
		}
		switch string(k) {
		case "bn":
			r.bn, r.base = v, true
		case "bt":
			r.bt, r.base = v, true
		case "bu":
			r.bu, r.base = v, true
		case "bv":
			r.bv, r.base = v, true
		case "bs", "bver":
			r.base = true
		case "n":
			r.n = v
		case "u":
			r.u = v
		case "v":
			r.v = v
		case "t":
			r.t = v
		case "vs", "vb", "vd":
			r.other = k
		default:
			if len(k) > 0 && k[len(k)-1] == '_' {
				return decErr(ReasonBadShape, "must-understand field %s is not supported", snippet(k))
			}
		}
	}
}

// senmlString reads a string field (nil for absent or null).
func senmlString(v []byte, reason, what string) ([]byte, error) {
	switch kindOf(v) {
	case kNone, kNull:
		return nil, nil
	case kString:
		return unquote(v), nil
	}
	return nil, decErr(reason, "%s is %s, want a string", what, kindOf(v))
}

// senmlNumber reads a number field; present is false for absent or null.
func senmlNumber(v []byte, reason, what string) (f float64, present bool, err error) {
	switch kindOf(v) {
	case kNone, kNull:
		return 0, false, nil
	case kNumber:
		f, err = parseNumber(v, what)
		return f, true, err
	}
	return 0, true, decErr(reason, "%s is %s, want a number", what, kindOf(v))
}

func (d *senmlDecoder) Decode(topic string, payload []byte, recv time.Time, dst []Reading) ([]Reading, error) {
	n0 := len(dst)
	out, err := d.decode(topic, payload, recv.UTC(), dst)
	if err != nil {
		return dst[:n0], err
	}
	return out, nil
}

func (d *senmlDecoder) decode(topic string, payload []byte, recv time.Time, dst []Reading) ([]Reading, error) {
	body, err := d.checkJSON(payload)
	if err != nil {
		return dst, err
	}
	tv, err := d.matchTopic(topic)
	if err != nil {
		return dst, err
	}
	el, ok := arrayElements(body)
	if !ok {
		return dst, decErr(ReasonBadShape, "SenML pack is %s, want an array of records", kindOf(body))
	}
	var (
		bn, bu       []byte
		bt, bv       float64
		btSet        bool
		lastBN       []byte
		lastBNSite   string
		nameBuf      [128]byte
		count        int
		configSite   = d.site
		recvNS       = recv.UnixNano()
		topicHasSite = tv.hasSite
	)
	if topicHasSite {
		configSite = tv.site
	}
	for i := 0; ; i++ {
		ev, ok := el.next()
		if !ok {
			break
		}
		if kindOf(ev) != kObject {
			return dst, decErr(ReasonBadShape, "record %d is %s, want an object", i, kindOf(ev))
		}
		var rec senmlRecord
		if err := scanSenMLRecord(ev, &rec); err != nil {
			return dst, err
		}
		// Base fields first: they apply to this record too.
		if rec.bn != nil {
			if bn, err = senmlString(rec.bn, ReasonBadShape, "bn"); err != nil {
				return dst, err
			}
		}
		if rec.bu != nil {
			if bu, err = senmlString(rec.bu, ReasonBadUnit, "bu"); err != nil {
				return dst, err
			}
		}
		if rec.bt != nil {
			f, present, err := senmlNumber(rec.bt, ReasonBadTime, "bt")
			if err != nil {
				return dst, err
			}
			bt, btSet = f, present
		}
		if rec.bv != nil {
			f, _, err := senmlNumber(rec.bv, ReasonBadNumber, "bv")
			if err != nil {
				return dst, err
			}
			bv = f
		}
		if rec.other != nil {
			return dst, decErr(ReasonBadNumber, "record %d carries %s, want a numeric v", i, snippet(rec.other))
		}
		n, err := senmlString(rec.n, ReasonBadShape, "n")
		if err != nil {
			return dst, err
		}
		v, hasV, err := senmlNumber(rec.v, ReasonBadNumber, "v")
		if err != nil {
			return dst, err
		}
		if !hasV {
			if rec.n == nil && rec.base && rec.u == nil && rec.t == nil {
				continue // header record: base fields only
			}
			return dst, decErr(ReasonMissingField, "record %d has no numeric value v", i)
		}
		if count >= MaxReadingsPerMessage {
			return dst, decErr(ReasonTooMany, "more than %d readings", MaxReadingsPerMessage)
		}
		// Name → depth.
		full := append(nameBuf[:0], bn...)
		full = append(full, n...)
		if len(full) == 0 {
			return dst, decErr(ReasonMissingField, "record %d has no name (bn+n)", i)
		}
		nm, ok := d.names[string(full)]
		if !ok {
			if nm, ok = d.names[string(n)]; !ok {
				return dst, decErr(ReasonUnknownSenMLName, "record %d name %s is not in senml_depths", i, snippet(bytes.Clone(full))) // a copy keeps nameBuf on the stack
			}
		}
		// Unit and value.
		ub := bu
		if rec.u != nil {
			if ub, err = senmlString(rec.u, ReasonBadUnit, "u"); err != nil {
				return dst, err
			}
			if ub == nil {
				ub = bu
			}
		}
		u := d.unit
		if ub != nil {
			var ok bool
			if u, ok = parseSenMLUnit(string(ub)); !ok {
				return dst, decErr(ReasonBadUnit, "record %d unit %s (want Cel, K or degF)", i, snippet(ub))
			}
		}
		temp, err := checkTemp(bv+v, u)
		if err != nil {
			return dst, err
		}
		// Time.
		t, tSet, err := senmlNumber(rec.t, ReasonBadTime, "t")
		if err != nil {
			return dst, err
		}
		ts, qc := recv, QC(0)
		if btSet || tSet {
			rt := bt + t
			ns, ok := int64(0), false
			switch {
			case rt >= senmlRelativeLimit:
				ns, ok = unitsToNS(rt, 1e9)
			case rt > -senmlMaxPast:
				whole := math.Floor(rt)
				ns = recvNS + int64(whole)*1e9 + int64(math.Round((rt-whole)*1e9))
				ok = ns >= minTime && ns < maxTime
			}
			if !ok {
				return dst, decErr(ReasonBadTime, "record %d time %g outside years 1900..2199", i, rt)
			}
			ts = time.Unix(0, ns).UTC()
		} else {
			qc = QCNoTime
		}
		// Site.
		site := configSite
		if site == "" {
			if lastBNSite == "" || string(bn) != string(lastBN) {
				s := siteFromBN(bn)
				if len(s) == 0 {
					return dst, decErr(ReasonNoSite, "no site in topic, subscription or bn")
				}
				if e := checkID(s); e != "" {
					return dst, decErr(ReasonBadSite, "site from bn: %s", e)
				}
				lastBN, lastBNSite = bn, string(s)
			}
			site = lastBNSite
		}
		dst = append(dst, Reading{Site: site, Sensor: nm.key, Depth: nm.depth, Time: ts, TempC: temp, QC: qc})
		count++
	}
	if count == 0 {
		return dst, decErr(ReasonMissingField, "SenML pack has no records with values")
	}
	return dst, nil
}

// siteFromBN returns the last non-empty part of bn split at ':' and '/'.
func siteFromBN(bn []byte) []byte {
	end := len(bn)
	for end > 0 && (bn[end-1] == ':' || bn[end-1] == '/') {
		end--
	}
	start := end
	for start > 0 && bn[start-1] != ':' && bn[start-1] != '/' {
		start--
	}
	return bn[start:end]
}
