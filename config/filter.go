package config

import "strings"

// FiltersOverlap reports whether some topic name is matched by both MQTT topic
// filters a and b, following the matching rules of MQTT 3.1.1 §4.7 (and 5.0 §4.7):
//   - '+' matches exactly one level (which may be empty);
//   - '#' matches any number of levels, including none: "a/#" matches "a";
//   - a filter starting with '+' or '#' does not match topics starting with '$'
//     (§4.7.2), so "#" and "$SYS/x" never overlap;
//   - a shared subscription "$share/GROUP/FILTER" (MQTT 5 §4.8.2, also accepted by
//     Mosquitto for 3.1.1 clients) is compared by its FILTER: two instances sharing
//     a filter each see part of the same stream, which splits a site's readings.
//
// Filters are assumed valid (config validation checks them); an empty filter
// matches nothing.
func FiltersOverlap(a, b string) bool {
	a, b = unshare(a), unshare(b)
	if a == "" || b == "" {
		return false
	}
	la, lb := strings.Split(a, "/"), strings.Split(b, "/")
	for i := 0; ; i++ {
		switch {
		case i == len(la) && i == len(lb):
			return true
		case i == len(la):
			// a ended; b matches the same topic only if what is left of b is "#".
			return i == len(lb)-1 && lb[i] == "#"
		case i == len(lb):
			return i == len(la)-1 && la[i] == "#"
		}
		x, y := la[i], lb[i]
		if i == 0 && dollarClash(x, y) {
			return false
		}
		if x == "#" || y == "#" {
			return true
		}
		if x == "+" || y == "+" || x == y {
			continue
		}
		return false
	}
}

// dollarClash is true when one first level is a wildcard and the other a literal
// starting with '$': the wildcard does not reach such topics.
func dollarClash(x, y string) bool {
	wild := func(s string) bool { return s == "+" || s == "#" }
	return (wild(x) && strings.HasPrefix(y, "$")) || (wild(y) && strings.HasPrefix(x, "$"))
}

// unshare strips a "$share/GROUP/" prefix.
func unshare(f string) string {
	if rest, ok := strings.CutPrefix(f, "$share/"); ok {
		if _, filter, ok := strings.Cut(rest, "/"); ok {
			return filter
		}
		return ""
	}
	return f
}
