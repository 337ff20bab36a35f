package ingest

import (
	"errors"
	"fmt"
	"math"
	"strings"
	"time"
	"unicode/utf8"

	"holomix/config"
)

// Decoding limits. They bound the work and memory one hostile message can cause.
const (
	// DefaultMaxPayload is the payload size limit used when NewDecoder gets maxPayload <= 0.
	DefaultMaxPayload = 256 << 10
	// MaxReadingsPerMessage is the largest number of readings one message may carry.
	MaxReadingsPerMessage = 10000
	// MaxJSONDepth is the deepest bracket nesting accepted in a JSON payload.
	MaxJSONDepth = 32
	// MaxDepthM is the deepest sensor depth accepted (metres). The deepest lake
	// is about 1.6 km deep; anything beyond the deepest ocean trench is a fault.
	MaxDepthM = 11000
	// maxIDLen bounds site and sensor identifiers taken from payloads and topics.
	maxIDLen = 128
)

// Reason labels of DecodeError. They are Prometheus counter label values:
// never rename one.
const (
	ReasonTooLarge         = "too_large"          // payload longer than the size limit
	ReasonEmpty            = "empty"              // empty or whitespace-only payload
	ReasonInvalidUTF8      = "invalid_utf8"       // payload is not valid UTF-8
	ReasonTooDeep          = "too_deep"           // JSON nested deeper than MaxJSONDepth
	ReasonBadJSON          = "bad_json"           // malformed JSON (includes bare NaN/Infinity literals)
	ReasonBadShape         = "bad_shape"          // valid JSON of the wrong structure (e.g. array where an object belongs)
	ReasonBadNumber        = "bad_number"         // a string, bool, object or garbage where a number belongs
	ReasonNonFinite        = "non_finite"         // NaN, ±Inf or a number overflowing float64 (before or after unit conversion)
	ReasonNegativeDepth    = "negative_depth"     // depth below zero (depths are metres below the surface)
	ReasonBadDepth         = "bad_depth"          // depth deeper than MaxDepthM
	ReasonMissingField     = "missing_field"      // depth, temperature or name absent (or null)
	ReasonBadTime          = "bad_time"           // unparseable timestamp or outside years 1900..2200
	ReasonBadUnit          = "bad_unit"           // unknown temperature unit
	ReasonBadTopic         = "bad_topic"          // topic does not match the subscription's template
	ReasonNoSite           = "no_site"            // neither payload, topic nor configuration names a site
	ReasonBadSite          = "bad_site"           // site id empty, too long, with control characters, or payload and topic disagree
	ReasonBadSensor        = "bad_sensor"         // sensor id too long, with control characters, or not a string/number
	ReasonTooMany          = "too_many"           // more than MaxReadingsPerMessage readings in one message
	ReasonLengthMismatch   = "length_mismatch"    // json-profile depth and temperature arrays differ in length
	ReasonUnknownSenMLName = "unknown_senml_name" // SenML record name not in senml_depths
	ReasonOther            = "other"              // any error that is not a *DecodeError
)

// reasonLabels is the fixed list returned by Reasons (a constant lookup table).
var reasonLabels = [...]string{
	ReasonTooLarge, ReasonEmpty, ReasonInvalidUTF8, ReasonTooDeep, ReasonBadJSON,
	ReasonBadShape, ReasonBadNumber, ReasonNonFinite, ReasonNegativeDepth, ReasonBadDepth,
	ReasonMissingField, ReasonBadTime, ReasonBadUnit, ReasonBadTopic, ReasonNoSite,
	ReasonBadSite, ReasonBadSensor, ReasonTooMany, ReasonLengthMismatch,
	ReasonUnknownSenMLName, ReasonOther,
}

// Reasons returns every label Reason can return, for pre-registering counters.
func Reasons() []string {
	out := make([]string, len(reasonLabels))
	copy(out, reasonLabels[:])
	return out
}

// DecodeError is why one message could not be decoded. Reason is a short
// snake_case label (one of Reasons) used as a counter label value; Detail is a
// human-readable explanation for logs. Detail never quotes more than a few
// dozen bytes of the payload.
type DecodeError struct {
	Reason string
	Detail string
}

func (e *DecodeError) Error() string {
	if e.Detail == "" {
		return "decode: " + e.Reason
	}
	return "decode: " + e.Reason + ": " + e.Detail
}

// Reason returns the counter label of err: "" for nil, the DecodeError's
// Reason, or "other" for any other error.
func Reason(err error) string {
	if err == nil {
		return ""
	}
	for e := err; e != nil; e = errors.Unwrap(e) {
		if de, ok := e.(*DecodeError); ok {
			return de.Reason
		}
	}
	var de *DecodeError // errors joined or wrapped several at once
	if errors.As(err, &de) {
		return de.Reason
	}
	return ReasonOther
}

func decErr(reason, format string, args ...any) error {
	return &DecodeError{Reason: reason, Detail: fmt.Sprintf(format, args...)}
}

// snippet quotes at most 40 bytes of b for an error detail.
func snippet(b []byte) string {
	const n = 40
	if len(b) > n {
		return fmt.Sprintf("%q…", b[:n])
	}
	return fmt.Sprintf("%q", b)
}

// Decoder turns one MQTT message into readings (°C, metres, UTC).
// Implementations returned by NewDecoder hold no mutable state and are safe
// for concurrent use.
type Decoder interface {
	// Decode appends the readings of one message to dst and returns it. recv is
	// the receive time (UTC). On error dst is returned with its original length:
	// a message is decoded whole or not at all.
	Decode(topic string, payload []byte, recv time.Time, dst []Reading) ([]Reading, error)
}

// Format names of config.Subscription.Format.
const (
	FormatJSON    = "json"
	FormatProfile = "json-profile"
	FormatValue   = "value"
	FormatSenML   = "senml"
)

// NewDecoder builds the decoder for one subscription. maxPayload <= 0 means
// DefaultMaxPayload. It fails for an unknown format, a malformed topic
// template, an unknown unit, clashing field names, a value subscription
// without {depth} in its template or without a site, or a senml subscription
// without senml_depths.
func NewDecoder(sub config.Subscription, maxPayload int) (Decoder, error) {
	if maxPayload <= 0 {
		maxPayload = DefaultMaxPayload
	}
	b := base{maxPayload: maxPayload}
	if sub.Template != "" {
		t, err := parseTemplate(sub.Template)
		if err != nil {
			return nil, fmt.Errorf("subscription %q: template: %w", sub.Topic, err)
		}
		b.tmpl = t
	}
	if sub.Site != "" {
		if err := checkID(sub.Site); err != "" {
			return nil, fmt.Errorf("subscription %q: site %q: %s", sub.Topic, sub.Site, err)
		}
		b.site = sub.Site
	}
	b.unit = unitC
	if sub.Unit != "" {
		u, ok := parseUnit(sub.Unit)
		if !ok {
			return nil, fmt.Errorf("subscription %q: unit %q: want C, F or K", sub.Topic, sub.Unit)
		}
		b.unit = u
	}
	switch sub.Format {
	case FormatJSON, FormatProfile:
		f, err := fieldNamesFrom(sub.Fields)
		if err != nil {
			return nil, fmt.Errorf("subscription %q: fields: %w", sub.Topic, err)
		}
		if sub.Format == FormatJSON {
			return &jsonDecoder{base: b, f: f}, nil
		}
		return &profileDecoder{base: b, f: f}, nil
	case FormatValue:
		if b.tmpl == nil || !b.tmpl.has(phDepth) {
			return nil, fmt.Errorf("subscription %q: format value needs a template with {depth}", sub.Topic)
		}
		if b.site == "" && !b.tmpl.has(phSite) {
			return nil, fmt.Errorf("subscription %q: format value needs a site or {site} in the template", sub.Topic)
		}
		return &valueDecoder{base: b}, nil
	case FormatSenML:
		names, err := senmlNamesFrom(sub.SenMLDepths)
		if err != nil {
			return nil, fmt.Errorf("subscription %q: senml_depths: %w", sub.Topic, err)
		}
		return &senmlDecoder{base: b, names: names}, nil
	case "":
		return nil, fmt.Errorf("subscription %q: format is empty (want json, json-profile, value or senml)", sub.Topic)
	default:
		return nil, fmt.Errorf("subscription %q: unknown format %q (want json, json-profile, value or senml)", sub.Topic, sub.Format)
	}
}

// base holds what every format shares.
type base struct {
	maxPayload int
	tmpl       *topicTemplate // nil: no template
	site       string         // configured fallback site
	unit       unit           // configured unit
}

// topicVals are the values a topic template extracted (substrings of the topic).
type topicVals struct {
	site, depth, sensor string
	hasSite, hasDepth   bool
	hasSensor           bool
}

func (b *base) matchTopic(topic string) (topicVals, error) {
	var tv topicVals
	if b.tmpl == nil {
		return tv, nil
	}
	if !b.tmpl.match(topic, &tv) {
		return tv, decErr(ReasonBadTopic, "topic %q does not match template %q", clip(topic), b.tmpl.src)
	}
	if tv.hasSite {
		if e := checkID(tv.site); e != "" {
			return tv, decErr(ReasonBadSite, "site from topic: %s", e)
		}
	}
	if tv.hasSensor {
		if e := checkID(tv.sensor); e != "" {
			return tv, decErr(ReasonBadSensor, "sensor from topic: %s", e)
		}
	}
	return tv, nil
}

// checkPayload applies the checks every format shares: size, emptiness and UTF-8.
func (b *base) checkPayload(p []byte) error {
	if len(p) > b.maxPayload {
		return decErr(ReasonTooLarge, "%d bytes, limit %d", len(p), b.maxPayload)
	}
	if len(trimSpace(p)) == 0 {
		return &DecodeError{Reason: ReasonEmpty}
	}
	if !utf8.Valid(p) {
		return &DecodeError{Reason: ReasonInvalidUTF8}
	}
	return nil
}

func clip(s string) string {
	if len(s) > 80 {
		return s[:80] + "…"
	}
	return s
}

// checkID validates a site or sensor id: 1..128 bytes of UTF-8 without control
// characters. It returns "" when the id is acceptable, else the problem.
func checkID[T string | []byte](s T) string {
	if len(s) == 0 {
		return "empty"
	}
	if len(s) > maxIDLen {
		return fmt.Sprintf("longer than %d bytes", maxIDLen)
	}
	for i := 0; i < len(s); i++ {
		if c := s[i]; c < 0x20 || c == 0x7f {
			return "contains a control character"
		}
	}
	if !validUTF8(s) {
		return "not valid UTF-8"
	}
	return ""
}

func validUTF8[T string | []byte](s T) bool {
	for i := 0; i < len(s); {
		if s[i] < utf8.RuneSelf {
			i++
			continue
		}
		var buf [utf8.UTFMax]byte
		n := copy(buf[:], s[i:])
		r, size := utf8.DecodeRune(buf[:n])
		if r == utf8.RuneError && size <= 1 {
			return false
		}
		i += size
	}
	return true
}

// unit is a temperature unit.
type unit uint8

const (
	unitC unit = iota
	unitF
	unitK
)

// parseUnit reads a unit name of a configuration or a json payload:
// C, Cel, degC, °C, celsius; F, degF, °F, fahrenheit; K, kelvin
// (the word forms case-insensitive).
func parseUnit(s string) (unit, bool) {
	switch s {
	case "C", "c", "Cel", "degC", "°C":
		return unitC, true
	case "F", "f", "degF", "°F":
		return unitF, true
	case "K", "k":
		return unitK, true
	}
	switch {
	case strings.EqualFold(s, "celsius"):
		return unitC, true
	case strings.EqualFold(s, "fahrenheit"):
		return unitF, true
	case strings.EqualFold(s, "kelvin"):
		return unitK, true
	}
	return unitC, false
}

// parseSenMLUnit reads a SenML unit: "Cel" and "K" (RFC 8428 §12.1) and
// "degF" (secondary unit, RFC 8798). Unit names are case-sensitive in SenML.
func parseSenMLUnit(s string) (unit, bool) {
	switch s {
	case "Cel":
		return unitC, true
	case "K":
		return unitK, true
	case "degF":
		return unitF, true
	}
	return unitC, false
}

// toC converts a temperature in u to °C (exact SI definitions: T[°C] = T[K] − 273.15,
// T[°C] = (T[°F] − 32)·5/9).
func (u unit) toC(v float64) float64 {
	switch u {
	case unitF:
		return (v - 32) * 5 / 9
	case unitK:
		return v - 273.15
	}
	return v
}

func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

// checkTemp converts v from u to °C and rejects non-finite results. A finite but
// absurd value (1e308 °C) is returned as is: quality control flags it out of range.
func checkTemp(v float64, u unit) (float64, error) {
	c := u.toC(v)
	if !finite(c) {
		return 0, decErr(ReasonNonFinite, "temperature %g is not finite in °C", v)
	}
	return c, nil
}

// checkDepth rejects negative, non-finite and absurdly deep depths.
func checkDepth(d float64) error {
	switch {
	case !finite(d):
		return decErr(ReasonNonFinite, "depth is not finite")
	case d < 0:
		return decErr(ReasonNegativeDepth, "depth %g m is above the surface", d)
	case d > MaxDepthM:
		return decErr(ReasonBadDepth, "depth %g m is deeper than %d m", d, MaxDepthM)
	}
	return nil
}

// Time limits: timestamps outside the years 1900..2199 are rejected (bad_time).
// The upper bound keeps times within int64 nanoseconds (InfluxDB precision).
const (
	minUnix = -2208988800 // 1900-01-01T00:00:00Z in Unix seconds
	maxUnix = 7258118400  // 2200-01-01T00:00:00Z in Unix seconds
	minTime = minUnix * 1e9
	maxTime = maxUnix * 1e9
)

func checkTime(t time.Time) error {
	if t.Year() < 1900 || t.Year() >= 2200 {
		return decErr(ReasonBadTime, "timestamp %s outside years 1900..2199", t.UTC().Format(time.RFC3339))
	}
	return nil
}

// epochTime converts a number of seconds, milliseconds, microseconds or
// nanoseconds since 1970-01-01T00:00:00Z, told apart by magnitude:
//
//	|v| < 1e11  seconds       (1e11 s is the year 5138)
//	|v| < 1e14  milliseconds  (1e11 ms is 1973-03-03)
//	|v| < 1e17  microseconds  (1e14 µs is 1973-03-03)
//	otherwise   nanoseconds   (1e17 ns is 1973-03-03)
//
// so any instant from 1973-03-03 to 5138 is read correctly whatever the unit.
func epochTime(v float64) (time.Time, error) {
	if !finite(v) {
		return time.Time{}, decErr(ReasonBadTime, "epoch timestamp is not finite")
	}
	a := math.Abs(v)
	var unitNS int64
	switch {
	case a < 1e11:
		unitNS = 1e9
	case a < 1e14:
		unitNS = 1e6
	case a < 1e17:
		unitNS = 1e3
	default:
		unitNS = 1
	}
	ns, ok := unitsToNS(v, unitNS)
	if !ok {
		return time.Time{}, decErr(ReasonBadTime, "epoch timestamp %g outside years 1900..2199", v)
	}
	return time.Unix(0, ns).UTC(), nil
}

// unitsToNS converts v units of unitNS nanoseconds since the epoch to Unix
// nanoseconds, keeping the fraction exact where float64 has it (the whole
// and fractional parts are scaled apart). ok is false outside minTime..maxTime.
func unitsToNS(v float64, unitNS int64) (int64, bool) {
	if !finite(v) {
		return 0, false
	}
	whole := math.Floor(v)
	if whole < float64(minTime/unitNS)-1 || whole > float64(maxTime/unitNS)+1 {
		return 0, false
	}
	ns := int64(whole)*unitNS + int64(math.Round((v-whole)*float64(unitNS)))
	if ns < minTime || ns >= maxTime {
		return 0, false
	}
	return ns, true
}

// epochInt is epochTime for an integer, exact to the nanosecond.
func epochInt(n int64) (time.Time, error) {
	a := n
	if a < 0 {
		a = -a
	}
	var t time.Time
	switch {
	case a < 1e11:
		t = time.Unix(n, 0)
	case a < 1e14:
		t = time.UnixMilli(n)
	case a < 1e17:
		t = time.UnixMicro(n)
	default:
		t = time.Unix(0, n)
	}
	if err := checkTime(t); err != nil {
		return time.Time{}, err
	}
	return t.UTC(), nil
}
