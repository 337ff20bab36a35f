package ingest

import (
	"fmt"
	"strconv"
	"strings"
)

// A topic template describes how a topic names the site, depth and sensor of
// a message. It is a '/'-separated list of levels, each one of:
//
//	literal      matches itself exactly, e.g. buoys
//	+            matches any one level
//	#            last level only: matches whatever remains (also nothing)
//	p{name}s     one placeholder with an optional literal prefix p and suffix s,
//	             e.g. {site}, {depth}, t{depth}m, node-{sensor}
//
// Placeholders are {site}, {depth} and {sensor}, each at most once, and each
// must capture at least one character. Example: buoys/{site}/temp/{depth}
// matches buoys/calder-mere/temp/5.5 with site "calder-mere", depth 5.5 m.
type topicTemplate struct {
	src    string
	levels []tlevel
	phs    uint8 // set of placeholders present
}

const (
	phNone   = 0
	phSite   = 1
	phDepth  = 2
	phSensor = 4
	phPlus   = 8
	phHash   = 16
)

type tlevel struct {
	kind   uint8 // phNone (literal), phSite, phDepth, phSensor, phPlus, phHash
	prefix string
	suffix string // literal levels keep their text in prefix
}

func (t *topicTemplate) has(ph uint8) bool { return t.phs&ph != 0 }

func parseTemplate(src string) (*topicTemplate, error) {
	if src == "" {
		return nil, fmt.Errorf("empty template")
	}
	parts := strings.Split(src, "/")
	t := &topicTemplate{src: src, levels: make([]tlevel, 0, len(parts))}
	for i, p := range parts {
		switch {
		case p == "+":
			t.levels = append(t.levels, tlevel{kind: phPlus})
			continue
		case p == "#":
			if i != len(parts)-1 {
				return nil, fmt.Errorf("%q: # must be the last level", src)
			}
			t.levels = append(t.levels, tlevel{kind: phHash})
			continue
		case strings.ContainsAny(p, "+#"):
			return nil, fmt.Errorf("%q: level %q: + and # must stand alone in a level", src, p)
		}
		open := strings.IndexByte(p, '{')
		if open < 0 {
			if strings.IndexByte(p, '}') >= 0 {
				return nil, fmt.Errorf("%q: level %q: unmatched }", src, p)
			}
			t.levels = append(t.levels, tlevel{kind: phNone, prefix: p})
			continue
		}
		closeAt := strings.IndexByte(p[open:], '}')
		if closeAt < 0 {
			return nil, fmt.Errorf("%q: level %q: unmatched {", src, p)
		}
		closeAt += open
		name := p[open+1 : closeAt]
		rest := p[closeAt+1:]
		if strings.ContainsAny(rest, "{}") || strings.ContainsAny(p[:open], "}") {
			return nil, fmt.Errorf("%q: level %q: at most one placeholder per level", src, p)
		}
		var ph uint8
		switch name {
		case "site":
			ph = phSite
		case "depth":
			ph = phDepth
		case "sensor":
			ph = phSensor
		default:
			return nil, fmt.Errorf("%q: unknown placeholder {%s} (want {site}, {depth} or {sensor})", src, name)
		}
		if t.phs&ph != 0 {
			return nil, fmt.Errorf("%q: placeholder {%s} appears twice", src, name)
		}
		t.phs |= ph
		t.levels = append(t.levels, tlevel{kind: ph, prefix: p[:open], suffix: rest})
	}
	return t, nil
}

// match matches topic against the template and stores the captured values
// (substrings of topic, no allocation) in tv.
func (t *topicTemplate) match(topic string, tv *topicVals) bool {
	rest := topic
	for li, l := range t.levels {
		if l.kind == phHash {
			return true
		}
		if li > 0 {
			// the previous level consumed its text; a separator must follow
			if len(rest) == 0 || rest[0] != '/' {
				return false
			}
			rest = rest[1:]
		}
		var seg string
		if k := strings.IndexByte(rest, '/'); k >= 0 {
			seg, rest = rest[:k], rest[k:]
		} else {
			seg, rest = rest, ""
		}
		switch l.kind {
		case phNone:
			if seg != l.prefix {
				return false
			}
		case phPlus:
		default:
			if len(seg) <= len(l.prefix)+len(l.suffix) ||
				!strings.HasPrefix(seg, l.prefix) || !strings.HasSuffix(seg, l.suffix) {
				return false
			}
			v := seg[len(l.prefix) : len(seg)-len(l.suffix)]
			switch l.kind {
			case phSite:
				tv.site, tv.hasSite = v, true
			case phDepth:
				tv.depth, tv.hasDepth = v, true
			case phSensor:
				tv.sensor, tv.hasSensor = v, true
			}
		}
	}
	return rest == ""
}

// parseTopicDepth reads a depth written in a topic level: digits with an
// optional decimal part and an optional "m" suffix: 5, 5.5, 0.75m, 12m.
// A leading '-' gives negative_depth; anything else (5_5, 5e1, 5,5, +5, five)
// gives bad_topic.
func parseTopicDepth(s string) (float64, error) {
	body := strings.TrimSuffix(s, "m")
	neg := strings.HasPrefix(body, "-")
	if neg {
		body = body[1:]
	}
	if !isDecimal(body) || len(body) > 32 {
		return 0, decErr(ReasonBadTopic, "depth %q in topic: want digits like 5, 5.5 or 5m", clip(s))
	}
	d, err := strconv.ParseFloat(body, 64)
	if err != nil {
		return 0, decErr(ReasonBadTopic, "depth %q in topic: %v", clip(s), err)
	}
	if neg && d != 0 {
		return 0, decErr(ReasonNegativeDepth, "depth %s m in topic is above the surface", clip(s))
	}
	if err := checkDepth(d); err != nil {
		return 0, err
	}
	return d, nil
}

// isDecimal reports whether s is digits with an optional '.' followed by digits.
func isDecimal(s string) bool {
	dot := false
	digits := 0
	for i := 0; i < len(s); i++ {
		c := s[i]
		switch {
		case c >= '0' && c <= '9':
			digits++
		case c == '.' && !dot && digits > 0 && i < len(s)-1:
			dot = true
		default:
			return false
		}
	}
	return digits > 0
}
