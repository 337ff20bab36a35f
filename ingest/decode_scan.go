package ingest

import (
	"bytes"
	"encoding/json"
	"strconv"
	"time"
)

// This file holds a small allocation-free walker over JSON that encoding/json
// has already validated (json.Valid). Validation is done by the standard
// library, so the walker only has to find the ends of values; it never sees
// malformed input. Field names are configurable (config.Fields), which rules
// out struct tags, and a map[string]json.RawMessage costs several allocations
// per key; the walker costs none.

// checkJSON runs the shared checks of the JSON formats: size, emptiness,
// UTF-8, nesting depth (scanned before any parsing) and JSON syntax. It
// returns the payload with surrounding whitespace removed.
func (b *base) checkJSON(p []byte) ([]byte, error) {
	if err := b.checkPayload(p); err != nil {
		return nil, err
	}
	if d := nesting(p); d > MaxJSONDepth {
		return nil, decErr(ReasonTooDeep, "nesting deeper than %d", MaxJSONDepth)
	}
	if !json.Valid(p) {
		// Error path only: ask the decoder where the syntax breaks.
		var raw json.RawMessage
		err := json.Unmarshal(p, &raw)
		if err == nil {
			return nil, &DecodeError{Reason: ReasonBadJSON}
		}
		return nil, decErr(ReasonBadJSON, "%v", err)
	}
	return trimSpace(p), nil
}

// nesting returns the deepest bracket nesting of p, counting '[' and '{'
// outside strings. It works on any bytes (valid JSON or not) and stops
// counting once the limit is passed.
func nesting(p []byte) int {
	depth, maxd := 0, 0
	inStr := false
	for i := 0; i < len(p); i++ {
		c := p[i]
		if inStr {
			switch c {
			case '\\':
				i++
			case '"':
				inStr = false
			}
			continue
		}
		switch c {
		case '"':
			inStr = true
		case '[', '{':
			depth++
			if depth > maxd {
				maxd = depth
				if maxd > MaxJSONDepth {
					return maxd
				}
			}
		case ']', '}':
			depth--
		}
	}
	return maxd
}

func isSpace(c byte) bool { return c == ' ' || c == '\t' || c == '\n' || c == '\r' }

func trimSpace(p []byte) []byte {
	i, j := 0, len(p)
	for i < j && isSpace(p[i]) {
		i++
	}
	for j > i && isSpace(p[j-1]) {
		j--
	}
	return p[i:j]
}

func skipSpace(b []byte, i int) int {
	for i < len(b) && isSpace(b[i]) {
		i++
	}
	return i
}

// stringEnd returns the index just past the string whose opening quote is at b[i].
func stringEnd(b []byte, i int) int {
	for j := i + 1; j < len(b); j++ {
		switch b[j] {
		case '\\':
			j++
		case '"':
			return j + 1
		}
	}
	return len(b)
}

// valueEnd returns the index just past the JSON value starting at b[i].
func valueEnd(b []byte, i int) int {
	if i >= len(b) {
		return len(b)
	}
	switch b[i] {
	case '"':
		return stringEnd(b, i)
	case '{', '[':
		depth := 0
		for j := i; j < len(b); j++ {
			switch b[j] {
			case '"':
				j = stringEnd(b, j) - 1
			case '{', '[':
				depth++
			case '}', ']':
				depth--
				if depth == 0 {
					return j + 1
				}
			}
		}
		return len(b)
	default: // number, true, false, null
		j := i
		for j < len(b) {
			c := b[j]
			if isSpace(c) || c == ',' || c == '}' || c == ']' || c == ':' {
				break
			}
			j++
		}
		return j
	}
}

// jkind is the kind of a JSON value, from its first byte.
type jkind uint8

const (
	kNone jkind = iota
	kNull
	kBool
	kNumber
	kString
	kArray
	kObject
)

func kindOf(v []byte) jkind {
	if len(v) == 0 {
		return kNone
	}
	switch v[0] {
	case 'n':
		return kNull
	case 't', 'f':
		return kBool
	case '"':
		return kString
	case '[':
		return kArray
	case '{':
		return kObject
	}
	return kNumber
}

func (k jkind) String() string {
	switch k {
	case kNull:
		return "null"
	case kBool:
		return "a boolean"
	case kNumber:
		return "a number"
	case kString:
		return "a string"
	case kArray:
		return "an array"
	case kObject:
		return "an object"
	}
	return "nothing"
}

// members iterates the members of a JSON object.
type members struct {
	b []byte
	i int
}

// objectMembers starts iterating v, which must be a validated JSON value; ok
// is false when v is not an object.
func objectMembers(v []byte) (members, bool) {
	if kindOf(v) != kObject {
		return members{}, false
	}
	return members{b: v, i: 1}, true
}

// next returns the next member: the key (unquoted, unescaped) and the raw value.
func (m *members) next() (key, val []byte, ok bool) {
	b := m.b
	i := skipSpace(b, m.i)
	if i < len(b) && b[i] == ',' {
		i = skipSpace(b, i+1)
	}
	if i >= len(b) || b[i] != '"' {
		m.i = len(b)
		return nil, nil, false
	}
	ke := stringEnd(b, i)
	key = unquote(b[i:ke])
	i = skipSpace(b, ke)
	if i < len(b) && b[i] == ':' {
		i = skipSpace(b, i+1)
	}
	ve := valueEnd(b, i)
	val = b[i:ve]
	m.i = ve
	return key, val, true
}

// elements iterates the elements of a JSON array.
type elements struct {
	b []byte
	i int
}

// arrayElements starts iterating v; ok is false when v is not an array.
func arrayElements(v []byte) (elements, bool) {
	if kindOf(v) != kArray {
		return elements{}, false
	}
	return elements{b: v, i: 1}, true
}

func (e *elements) next() ([]byte, bool) {
	b := e.b
	i := skipSpace(b, e.i)
	if i < len(b) && b[i] == ',' {
		i = skipSpace(b, i+1)
	}
	if i >= len(b) || b[i] == ']' {
		e.i = len(b)
		return nil, false
	}
	ve := valueEnd(b, i)
	e.i = ve
	return b[i:ve], true
}

// unquote returns the content of a validated JSON string literal (quotes
// included in raw). Without escapes it is a sub-slice (no allocation).
func unquote(raw []byte) []byte {
	if len(raw) < 2 {
		return nil
	}
	inner := raw[1 : len(raw)-1]
	if bytes.IndexByte(inner, '\\') < 0 {
		return inner
	}
	var s string
	if err := json.Unmarshal(raw, &s); err != nil {
		return inner
	}
	return []byte(s)
}

// parseNumber reads a JSON number value. Strings, booleans, arrays and objects
// give bad_number; overflow (1e400) gives non_finite. what names the field in
// error details.
func parseNumber(v []byte, what string) (float64, error) {
	if k := kindOf(v); k != kNumber {
		return 0, decErr(ReasonBadNumber, "%s is %s, want a number", what, k)
	}
	f, err := strconv.ParseFloat(string(v), 64)
	if err != nil {
		ne, ok := err.(*strconv.NumError)
		switch {
		case ok && ne.Err == strconv.ErrRange && f != 0:
			return 0, decErr(ReasonNonFinite, "%s %s overflows float64", what, snippet(v))
		case ok && ne.Err == strconv.ErrRange: // underflow to zero
		default:
			return 0, decErr(ReasonBadNumber, "%s %s", what, snippet(v))
		}
	}
	return f, nil
}

// isNumberText reports whether s follows the JSON number grammar
// (RFC 8259 §6): -?(0|[1-9][0-9]*)(\.[0-9]+)?([eE][+-]?[0-9]+)?
func isNumberText(s []byte) bool {
	i := 0
	if i < len(s) && s[i] == '-' {
		i++
	}
	if i >= len(s) {
		return false
	}
	if s[i] == '0' {
		i++
	} else if s[i] >= '1' && s[i] <= '9' {
		for i < len(s) && s[i] >= '0' && s[i] <= '9' {
			i++
		}
	} else {
		return false
	}
	if i < len(s) && s[i] == '.' {
		i++
		start := i
		for i < len(s) && s[i] >= '0' && s[i] <= '9' {
			i++
		}
		if i == start {
			return false
		}
	}
	if i < len(s) && (s[i] == 'e' || s[i] == 'E') {
		i++
		if i < len(s) && (s[i] == '+' || s[i] == '-') {
			i++
		}
		start := i
		for i < len(s) && s[i] >= '0' && s[i] <= '9' {
			i++
		}
		if i == start {
			return false
		}
	}
	return i == len(s)
}

func isIntText(s []byte) bool {
	i := 0
	if i < len(s) && s[i] == '-' {
		i++
	}
	if i == len(s) {
		return false
	}
	for ; i < len(s); i++ {
		if s[i] < '0' || s[i] > '9' {
			return false
		}
	}
	return true
}

// parseTimestamp reads a timestamp value: an RFC 3339 string (any offset,
// converted to UTC), or epoch seconds/milliseconds/microseconds/nanoseconds as
// a number or a numeric string, told apart by magnitude (see epochTime).
// present is false for an absent or null value.
func parseTimestamp(v []byte) (t time.Time, present bool, err error) {
	switch kindOf(v) {
	case kNone, kNull:
		return time.Time{}, false, nil
	case kNumber:
		t, err = epochText(v)
		return t, true, err
	case kString:
		s := unquote(v)
		if isNumberText(s) {
			t, err = epochText(s)
			return t, true, err
		}
		if err := t.UnmarshalText(s); err != nil {
			return time.Time{}, true, decErr(ReasonBadTime, "%s is not RFC 3339 or an epoch number", snippet(s))
		}
		if err := checkTime(t); err != nil {
			return time.Time{}, true, err
		}
		return t.UTC(), true, nil
	}
	return time.Time{}, true, decErr(ReasonBadTime, "timestamp is %s", kindOf(v))
}

func epochText(s []byte) (time.Time, error) {
	if isIntText(s) {
		if n, err := strconv.ParseInt(string(s), 10, 64); err == nil {
			return epochInt(n)
		}
	}
	f, err := strconv.ParseFloat(string(s), 64)
	if err != nil && !(f == 0 && isNumberText(s)) {
		return time.Time{}, decErr(ReasonBadTime, "epoch timestamp %s", snippet(s))
	}
	return epochTime(f)
}

// parseID reads a site or sensor id: a string, or a number taken as its text.
// present is false for an absent or null value. reason is the label used when
// the id is unacceptable.
func parseID(v []byte, reason, what string) (id []byte, present bool, err error) {
	switch kindOf(v) {
	case kNone, kNull:
		return nil, false, nil
	case kString:
		id = unquote(v)
	case kNumber:
		id = v
	default:
		return nil, true, decErr(reason, "%s is %s, want a string", what, kindOf(v))
	}
	if e := checkID(id); e != "" {
		return nil, true, decErr(reason, "%s: %s", what, e)
	}
	return id, true, nil
}

// idString converts an id to a string, reusing an equal known string to avoid
// an allocation on the common path.
func idString(id []byte, known ...string) string {
	for _, k := range known {
		if k != "" && string(id) == k {
			return k
		}
	}
	return string(id)
}
