package ingest

import (
	"bytes"
	"strconv"
	"time"
)

// Format "value": the payload is one bare number as text, e.g. "14.25", in
// the subscription's unit. Site and depth come from the topic template, e.g.
// buoys/{site}/temp/{depth} with topic buoys/calder-mere/temp/5.5 (the site
// may instead be the subscription's fixed site). A depth level is written
// 5, 5.5 or 5m (see parseTopicDepth). The payload carries no time: the
// receive time is used and the reading is flagged QCNoTime.
//
// The number must follow the JSON number grammar, optionally surrounded by
// whitespace: "+5", "0x1p3", "1_000", "5,5" and "14.2C" are bad_number;
// "NaN", "Inf", "-Infinity" (any case) and overflowing numbers are non_finite.
type valueDecoder struct {
	base
}

func (d *valueDecoder) Decode(topic string, payload []byte, recv time.Time, dst []Reading) ([]Reading, error) {
	if err := d.checkPayload(payload); err != nil {
		return dst, err
	}
	tv, err := d.matchTopic(topic)
	if err != nil {
		return dst, err
	}
	depth, err := parseTopicDepth(tv.depth)
	if err != nil {
		return dst, err
	}
	site := d.site
	if tv.hasSite {
		site = tv.site
	}
	s := trimSpace(payload)
	if !isNumberText(s) {
		if isNonFiniteWord(s) {
			return dst, decErr(ReasonNonFinite, "value %s", snippet(s))
		}
		return dst, decErr(ReasonBadNumber, "value %s is not a number", snippet(s))
	}
	v, err := strconv.ParseFloat(string(s), 64)
	if err != nil && v != 0 { // ±Inf from overflow; underflow to 0 is fine
		return dst, decErr(ReasonNonFinite, "value %s overflows float64", snippet(s))
	}
	temp, err := checkTemp(v, d.unit)
	if err != nil {
		return dst, err
	}
	return append(dst, Reading{Site: site, Sensor: tv.sensor, Depth: depth, Time: recv.UTC(), TempC: temp, QC: QCNoTime}), nil
}

// isNonFiniteWord reports whether s spells NaN or an infinity, as sensors and
// printf-style formatting write them.
func isNonFiniteWord(s []byte) bool {
	if len(s) > 0 && (s[0] == '+' || s[0] == '-') {
		s = s[1:]
	}
	for _, w := range [...]string{"nan", "inf", "infinity"} {
		if bytes.EqualFold(s, []byte(w)) {
			return true
		}
	}
	return false
}
