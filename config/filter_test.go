package config

import "testing"

// TestFiltersOverlap checks topic-filter overlap against the matching rules and
// the worked examples of the MQTT 3.1.1 specification, §4.7.1.2 (multi-level
// wildcard: "sport/tennis/player1/#" matches "sport/tennis/player1" and
// "sport/tennis/player1/ranking"), §4.7.1.3 (single level: "sport/+" does not
// match "sport" but matches "sport/"; "+/+" and "/+" match "/finance"), and
// §4.7.2 ("#" and "+/monitor/Clients" do not match "$SYS/..." topics).
func TestFiltersOverlap(t *testing.T) {
	cases := []struct {
		a, b string
		want bool
	}{
		// identical and disjoint literals
		{"buoys/larchmere/chain", "buoys/larchmere/chain", true},
		{"buoys/larchmere/chain", "buoys/ottersedge/chain", false},
		{"buoys/a", "buoys/a/b", false},
		// '#' matches the parent level and everything below (§4.7.1.2)
		{"sport/tennis/player1/#", "sport/tennis/player1", true},
		{"sport/tennis/player1/#", "sport/tennis/player1/ranking", true},
		{"sport/tennis/player1/#", "sport/tennis/player1/score/wimbledon", true},
		{"sport/tennis/player1/#", "sport/tennis/player2/#", false},
		{"#", "anything/at/all", true},
		{"#", "#", true},
		{"buoys/#", "buoys/+/temp/+", true},
		{"buoys/#", "lakes/#", false},
		// '+' is exactly one level (§4.7.1.3)
		{"sport/+", "sport", false},
		{"sport/+", "sport/", true},
		{"+/+", "/finance", true},
		{"/+", "/finance", true},
		{"+", "/finance", false},
		{"buoys/+/temp/+", "buoys/larchmere/temp/4", true},
		{"buoys/+/temp/+", "buoys/larchmere/chain", false},
		{"buoys/+/temp/+", "buoys/larchmere/temp", false},
		{"buoys/+/temp", "buoys/larchmere/+", true},
		{"buoys/+/temp/+", "buoys/larchmere/+/4", true},
		{"+/a/#", "b/+/c", true},
		{"+/a/#", "b/c/+", false},
		// '$' topics are out of reach of leading wildcards (§4.7.2)
		{"#", "$SYS/broker/load", false},
		{"+/broker/load", "$SYS/broker/load", false},
		{"$SYS/#", "$SYS/broker/load", true},
		{"$SYS/#", "#", false},
		// shared subscriptions compare their filter (MQTT 5.0 §4.8.2)
		{"$share/holomix/buoys/+/chain", "buoys/larchmere/chain", true},
		{"$share/g1/buoys/#", "$share/g2/lakes/#", false},
		{"$share/g1/buoys/#", "$share/g1/buoys/a", true},
		// empty filter matches nothing
		{"", "#", false},
	}
	for _, c := range cases {
		if got := FiltersOverlap(c.a, c.b); got != c.want {
			t.Errorf("FiltersOverlap(%q, %q) = %t, want %t", c.a, c.b, got, c.want)
		}
		if got := FiltersOverlap(c.b, c.a); got != c.want {
			t.Errorf("FiltersOverlap(%q, %q) = %t, want %t (not symmetric)", c.b, c.a, got, c.want)
		}
	}
}

// TestFiltersOverlapAgreesWithMatching cross-checks FiltersOverlap against a
// direct matcher (§4.7 rules) over a small universe of topic names: two filters
// overlap exactly when some topic of the universe is matched by both.
func TestFiltersOverlapAgreesWithMatching(t *testing.T) {
	levels := []string{"a", "b", ""}
	var topics []string
	var gen func(prefix string, depth int)
	gen = func(prefix string, depth int) {
		if depth > 0 {
			topics = append(topics, prefix)
		}
		if depth == 3 {
			return
		}
		for _, l := range levels {
			p := l
			if depth > 0 {
				p = prefix + "/" + l
			}
			gen(p, depth+1)
		}
	}
	gen("", 0)
	filters := []string{"#", "+", "a", "a/#", "+/#", "a/+", "+/b", "a/b", "+/+", "a/+/#", "+/+/+", "b/+/a", "/#", "a/b/#", "+/a/b", ""}
	match := func(f, topic string) bool {
		fl, tl := splitLevels(f), splitLevels(topic)
		for i := range fl {
			if fl[i] == "#" {
				return true
			}
			if i >= len(tl) || (fl[i] != "+" && fl[i] != tl[i]) {
				return false
			}
		}
		return len(fl) == len(tl)
	}
	for _, f := range filters {
		for _, g := range filters {
			if f == "" || g == "" {
				continue
			}
			want := false
			for _, topic := range topics {
				if match(f, topic) && match(g, topic) {
					want = true
					break
				}
			}
			if got := FiltersOverlap(f, g); got != want {
				t.Errorf("FiltersOverlap(%q, %q) = %t, brute force says %t", f, g, got, want)
			}
		}
	}
}

func splitLevels(s string) []string {
	out := []string{}
	start := 0
	for i := 0; i <= len(s); i++ {
		if i == len(s) || s[i] == '/' {
			out = append(out, s[start:i])
			start = i + 1
		}
	}
	return out
}
