package ingest

import (
	"fmt"
	"time"

	"holomix/config"
)

// Format "json": one reading per message, a JSON object such as
//
//	{"time": "2024-06-01T12:00:00Z", "site": "calder-mere", "depth_m": 5, "temp_c": 14.2, "sensor": "t5"}
//
// Field names follow config.Fields (defaults shown). Besides them:
//   - "unit": optional, "C", "F", "K" (also "Cel", "degC", "degF", "°C", "°F",
//     "celsius", "fahrenheit", "kelvin"); overrides the subscription's unit.
//   - time: RFC 3339 string, epoch number or numeric string (see epochTime);
//     absent or null → receive time and QCNoTime.
//   - site: a string (or number) in the payload, else {site} of the topic
//     template, else the subscription's site. When the payload and the topic
//     both name a site they must agree (else bad_site): with broker ACLs the
//     topic is what a device is allowed to write.
//   - depth: payload field, else {depth} of the topic template.
//   - sensor: optional payload field (string or number), else {sensor} of the topic.
//
// Numbers must be JSON numbers: "14.2" (a string) is bad_number. null counts as
// absent. Unknown keys are ignored. A duplicated key: the last one wins.

// fieldNames are the JSON keys of the json and json-profile formats.
type fieldNames struct {
	time, depth, temp, site, sensor string
	depths, temps, readings         string
}

// unitKey is the payload key naming the temperature unit.
const unitKey = "unit"

func fieldNamesFrom(f config.Fields) (fieldNames, error) {
	def := func(v, d string) string {
		if v == "" {
			return d
		}
		return v
	}
	n := fieldNames{
		time:     def(f.Time, "time"),
		depth:    def(f.Depth, "depth_m"),
		temp:     def(f.Temp, "temp_c"),
		site:     def(f.Site, "site"),
		sensor:   def(f.Sensor, "sensor"),
		depths:   def(f.Depths, "depths_m"),
		temps:    def(f.Temps, "temps_c"),
		readings: def(f.Readings, "readings"),
	}
	seen := map[string]string{unitKey: "unit (fixed)"}
	for _, kv := range [...][2]string{
		{"time", n.time}, {"depth", n.depth}, {"temp", n.temp}, {"site", n.site}, {"sensor", n.sensor},
		{"depths", n.depths}, {"temps", n.temps}, {"readings", n.readings},
	} {
		if prev, ok := seen[kv[1]]; ok {
			return n, fmt.Errorf("%s and %s both use the key %q", prev, kv[0], kv[1])
		}
		seen[kv[1]] = kv[0]
	}
	return n, nil
}

// rawReading holds the raw JSON values of one reading's fields (nil: absent).
type rawReading struct {
	time, depth, temp, site, sensor, unit []byte
}

// scanReading collects the reading fields of a JSON object into rr. It returns
// false when obj is not an object.
func (f *fieldNames) scanReading(obj []byte, rr *rawReading) bool {
	m, ok := objectMembers(obj)
	if !ok {
		return false
	}
	for {
		k, v, ok := m.next()
		if !ok {
			return true
		}
		switch string(k) {
		case f.time:
			rr.time = v
		case f.depth:
			rr.depth = v
		case f.temp:
			rr.temp = v
		case f.site:
			rr.site = v
		case f.sensor:
			rr.sensor = v
		case unitKey:
			rr.unit = v
		}
	}
}

// resolveUnit reads a payload "unit" value; absent or null → the subscription's unit.
func (b *base) resolveUnit(v []byte) (unit, error) {
	switch kindOf(v) {
	case kNone, kNull:
		return b.unit, nil
	case kString:
		s := unquote(v)
		u, ok := parseUnit(string(s))
		if !ok {
			return b.unit, decErr(ReasonBadUnit, "unit %s (want C, F or K)", snippet(s))
		}
		return u, nil
	}
	return b.unit, decErr(ReasonBadUnit, "unit is %s, want a string", kindOf(v))
}

// resolveSite picks the site: payload, else topic, else configuration.
func (b *base) resolveSite(v []byte, tv *topicVals) (string, error) {
	id, present, err := parseID(v, ReasonBadSite, "site")
	if err != nil {
		return "", err
	}
	switch {
	case present && tv.hasSite:
		if string(id) != tv.site {
			return "", decErr(ReasonBadSite, "payload site %s differs from topic site %q", snippet(id), clip(tv.site))
		}
		return tv.site, nil
	case present:
		return idString(id, b.site), nil
	case tv.hasSite:
		return tv.site, nil
	case b.site != "":
		return b.site, nil
	}
	return "", &DecodeError{Reason: ReasonNoSite, Detail: "no site in payload, topic or subscription"}
}

// resolveSensor picks the sensor id: payload, else topic, else "".
func resolveSensor(v []byte, tv *topicVals) (string, error) {
	id, present, err := parseID(v, ReasonBadSensor, "sensor")
	if err != nil {
		return "", err
	}
	if present {
		return idString(id, tv.sensor), nil
	}
	return tv.sensor, nil
}

// resolveTime reads a timestamp; absent → recv with QCNoTime.
func resolveTime(v []byte, recv time.Time) (time.Time, QC, error) {
	t, present, err := parseTimestamp(v)
	if err != nil {
		return time.Time{}, 0, err
	}
	if !present {
		return recv, QCNoTime, nil
	}
	return t, 0, nil
}

// tempDepth reads the temperature (converted from u to °C) and the depth of
// one reading; the topic's {depth} stands in for an absent depth.
func tempDepth(rr *rawReading, u unit, tv *topicVals, f *fieldNames) (temp, depth float64, err error) {
	switch kindOf(rr.temp) {
	case kNone, kNull:
		return 0, 0, decErr(ReasonMissingField, "no %q", f.temp)
	}
	t, err := parseNumber(rr.temp, f.temp)
	if err != nil {
		return 0, 0, err
	}
	if temp, err = checkTemp(t, u); err != nil {
		return 0, 0, err
	}
	switch kindOf(rr.depth) {
	case kNone, kNull:
		if !tv.hasDepth {
			return 0, 0, decErr(ReasonMissingField, "no %q", f.depth)
		}
		depth, err = parseTopicDepth(tv.depth)
		return temp, depth, err
	}
	if depth, err = parseNumber(rr.depth, f.depth); err != nil {
		return 0, 0, err
	}
	return temp, depth, checkDepth(depth)
}

type jsonDecoder struct {
	base
	f fieldNames
}

func (d *jsonDecoder) Decode(topic string, payload []byte, recv time.Time, dst []Reading) ([]Reading, error) {
	recv = recv.UTC()
	body, err := d.checkJSON(payload)
	if err != nil {
		return dst, err
	}
	tv, err := d.matchTopic(topic)
	if err != nil {
		return dst, err
	}
	var rr rawReading
	if !d.f.scanReading(body, &rr) {
		return dst, decErr(ReasonBadShape, "payload is %s, want an object", kindOf(body))
	}
	u, err := d.resolveUnit(rr.unit)
	if err != nil {
		return dst, err
	}
	temp, depth, err := tempDepth(&rr, u, &tv, &d.f)
	if err != nil {
		return dst, err
	}
	ts, qc, err := resolveTime(rr.time, recv)
	if err != nil {
		return dst, err
	}
	site, err := d.resolveSite(rr.site, &tv)
	if err != nil {
		return dst, err
	}
	sensor, err := resolveSensor(rr.sensor, &tv)
	if err != nil {
		return dst, err
	}
	return append(dst, Reading{Site: site, Sensor: sensor, Depth: depth, Time: ts, TempC: temp, QC: qc}), nil
}
