package ingest

import (
	"errors"
	"fmt"
	"math"
	"regexp"
	"strings"
	"sync"
	"testing"
	"time"

	"holomix/config"
)

func mustDecoder(t testing.TB, sub config.Subscription) Decoder {
	t.Helper()
	d, err := NewDecoder(sub, 0)
	if err != nil {
		t.Fatalf("NewDecoder(%+v): %v", sub, err)
	}
	return d
}

func TestReasons(t *testing.T) {
	snake := regexp.MustCompile(`^[a-z][a-z0-9]*(_[a-z0-9]+)*$`)
	seen := map[string]bool{}
	for _, r := range Reasons() {
		if !snake.MatchString(r) {
			t.Errorf("reason %q is not snake_case", r)
		}
		if seen[r] {
			t.Errorf("reason %q listed twice", r)
		}
		seen[r] = true
	}
	for _, want := range []string{"too_large", "empty", "invalid_utf8", "too_deep", "non_finite", "bad_number",
		"negative_depth", "missing_field", "bad_json", "bad_topic", "too_many", "bad_unit", "unknown_senml_name", "other"} {
		if !seen[want] {
			t.Errorf("Reasons() lacks %q", want)
		}
	}
	// Reasons returns a copy: changing it changes nothing.
	Reasons()[0] = "x"
	if Reasons()[0] == "x" {
		t.Error("Reasons() exposes its table")
	}
	if Reason(nil) != "" {
		t.Error(`Reason(nil) != ""`)
	}
	if got := Reason(errors.New("boom")); got != "other" {
		t.Errorf("Reason(plain error) = %q", got)
	}
	wrapped := fmt.Errorf("topic x: %w", &DecodeError{Reason: ReasonBadJSON, Detail: "d"})
	if got := Reason(wrapped); got != ReasonBadJSON {
		t.Errorf("Reason(wrapped) = %q", got)
	}
	if got := (&DecodeError{Reason: "empty"}).Error(); got != "decode: empty" {
		t.Errorf("Error() = %q", got)
	}
}

func TestNewDecoderErrors(t *testing.T) {
	depths := map[string]float64{"t1": 1}
	bad := []struct {
		name string
		sub  config.Subscription
	}{
		{"no format", config.Subscription{}},
		{"unknown format", config.Subscription{Format: "xml"}},
		{"bad unit", config.Subscription{Format: "json", Unit: "R"}},
		{"unknown placeholder", config.Subscription{Format: "json", Template: "a/{lake}"}},
		{"placeholder twice", config.Subscription{Format: "json", Template: "{site}/{site}"}},
		{"two placeholders in a level", config.Subscription{Format: "json", Template: "a/{site}{depth}"}},
		{"unclosed brace", config.Subscription{Format: "json", Template: "a/{site"}},
		{"stray close brace", config.Subscription{Format: "json", Template: "a/site}"}},
		{"hash not last", config.Subscription{Format: "json", Template: "a/#/b"}},
		{"plus inside a level", config.Subscription{Format: "json", Template: "a/b+/c"}},
		{"value without depth", config.Subscription{Format: "value", Template: "buoys/{site}", Site: "x"}},
		{"value without template", config.Subscription{Format: "value", Site: "x"}},
		{"value without site", config.Subscription{Format: "value", Template: "buoys/{depth}"}},
		{"senml without names", config.Subscription{Format: "senml"}},
		{"senml negative depth", config.Subscription{Format: "senml", SenMLDepths: map[string]float64{"t": -1}}},
		{"senml NaN depth", config.Subscription{Format: "senml", SenMLDepths: map[string]float64{"t": math.NaN()}}},
		{"clashing field names", config.Subscription{Format: "json", Fields: config.Fields{Temp: "v", Depth: "v"}}},
		{"field named unit", config.Subscription{Format: "json-profile", Fields: config.Fields{Site: "unit"}}},
		{"site with newline", config.Subscription{Format: "json", Site: "a\nb"}},
	}
	for _, c := range bad {
		if _, err := NewDecoder(c.sub, 0); err == nil {
			t.Errorf("%s: no error", c.name)
		}
	}
	good := []config.Subscription{
		{Format: "json"},
		{Format: "json-profile", Unit: "F"},
		{Format: "value", Template: "buoys/{site}/temp/{depth}"},
		{Format: "value", Template: "x/+/t{depth}m/#", Site: "s", Unit: "K"},
		{Format: "senml", SenMLDepths: depths, Unit: "Cel"},
	}
	for _, s := range good {
		if _, err := NewDecoder(s, 0); err != nil {
			t.Errorf("%+v: %v", s, err)
		}
	}
}

func TestTopicTemplate(t *testing.T) {
	cases := []struct {
		tmpl, topic string
		ok          bool
		site, depth string
		sensor      string
	}{
		{"buoys/{site}/temp/{depth}", "buoys/calder-mere/temp/5.5", true, "calder-mere", "5.5", ""},
		{"buoys/{site}/temp/{depth}", "buoys/calder-mere/temp/5.5/x", false, "", "", ""},
		{"buoys/{site}/temp/{depth}", "buoys/calder-mere/temp", false, "", "", ""},
		{"buoys/{site}/temp/{depth}", "buoys//temp/5", false, "", "", ""},
		{"buoys/{site}/temp/{depth}", "lakes/calder-mere/temp/5", false, "", "", ""},
		{"buoys/{site}/t{depth}m", "buoys/orrin-lake/t12.5m", true, "orrin-lake", "12.5", ""},
		{"buoys/{site}/t{depth}m", "buoys/orrin-lake/tm", false, "", "", ""},
		{"+/{site}/node-{sensor}/#", "eu/tamsin-res/node-7/a/b", true, "tamsin-res", "", "7"},
		{"+/{site}/node-{sensor}/#", "eu/tamsin-res/node-7", true, "tamsin-res", "", "7"},
		{"{site}", "", false, "", "", ""},
		{"/{site}", "/x", true, "x", "", ""},
	}
	for _, c := range cases {
		tt, err := parseTemplate(c.tmpl)
		if err != nil {
			t.Fatalf("%q: %v", c.tmpl, err)
		}
		var tv topicVals
		ok := tt.match(c.topic, &tv)
		if ok != c.ok {
			t.Errorf("%q ~ %q: match %v, want %v", c.tmpl, c.topic, ok, c.ok)
			continue
		}
		if ok && (tv.site != c.site || tv.depth != c.depth || tv.sensor != c.sensor) {
			t.Errorf("%q ~ %q: got %+v", c.tmpl, c.topic, tv)
		}
	}
}

func TestParseTopicDepth(t *testing.T) {
	good := map[string]float64{"5": 5, "5.5": 5.5, "5m": 5, "0.75m": 0.75, "0": 0, "120": 120, "-0": 0}
	for s, want := range good {
		got, err := parseTopicDepth(s)
		if err != nil || got != want {
			t.Errorf("%q: %v, %v; want %v", s, got, err, want)
		}
	}
	bad := map[string]string{
		"": ReasonBadTopic, "m": ReasonBadTopic, "5_5": ReasonBadTopic, "5,5": ReasonBadTopic, "5e1": ReasonBadTopic,
		"+5": ReasonBadTopic, ".5": ReasonBadTopic, "5.": ReasonBadTopic, "five": ReasonBadTopic, "5 m": ReasonBadTopic,
		"-2": ReasonNegativeDepth, "-2.5m": ReasonNegativeDepth, "99999": ReasonBadDepth,
	}
	for s, want := range bad {
		if _, err := parseTopicDepth(s); Reason(err) != want {
			t.Errorf("%q: reason %q (%v), want %q", s, Reason(err), err, want)
		}
	}
}

// TestEpochMagnitude: the same instant written in s, ms, µs and ns decodes
// alike. 1717242600 s = 2024-06-01T11:50:00Z (POSIX time, checked with
// `date -u -d @1717242600`).
func TestEpochMagnitude(t *testing.T) {
	want := time.Date(2024, 6, 1, 11, 50, 0, 0, time.UTC)
	for _, s := range []string{"1717242600", "1717242600000", "1717242600000000", "1717242600000000000",
		"1717242600.0", "1.7172426e9", "1717242600000.0", `"1717242600"`, `"1717242600000"`, `"2024-06-01T11:50:00Z"`,
		`"2024-06-01T11:50:00.000Z"`, `"2024-06-01T07:50:00-04:00"`} {
		got, present, err := parseTimestamp([]byte(s))
		if err != nil || !present || !got.Equal(want) || got.Location() != time.UTC {
			t.Errorf("%s: %v %v %v", s, got, present, err)
		}
	}
	// fractional seconds survive
	got, _, err := parseTimestamp([]byte("1717242600.25"))
	if err != nil || !got.Equal(want.Add(250*time.Millisecond)) {
		t.Errorf("fractional: %v %v", got, err)
	}
	// 1e11 ms is 1973-03-03T09:46:40Z (date -u -d @100000000)
	got, _, _ = parseTimestamp([]byte("100000000000"))
	if !got.Equal(time.Date(1973, 3, 3, 9, 46, 40, 0, time.UTC)) {
		t.Errorf("1e11 read as %v", got)
	}
	for _, s := range []string{`"2024-06-01"`, `"2024-06-01T11:50:00"`, `"12:00"`, `true`, `{}`, `"1e400"`, `"3000-01-01T00:00:00Z"`,
		"-99999999999999999999", `"1899-12-31T23:59:59Z"`, `""`} {
		if _, _, err := parseTimestamp([]byte(s)); Reason(err) != ReasonBadTime {
			t.Errorf("%s: reason %q (%v), want bad_time", s, Reason(err), err)
		}
	}
	if _, present, err := parseTimestamp([]byte("null")); present || err != nil {
		t.Error("null timestamp should be absent")
	}
	if minTime != time.Date(1900, 1, 1, 0, 0, 0, 0, time.UTC).UnixNano() || maxTime != time.Date(2200, 1, 1, 0, 0, 0, 0, time.UTC).UnixNano() {
		t.Error("time limits do not match their dates")
	}
}

// TestUnitConversion checks fixed points from the SI definitions (BIPM SI
// Brochure, 9th ed.: t/°C = T/K − 273.15) and the Fahrenheit scale
// (t/°F = 1.8·t/°C + 32): ice point 0 °C = 32 °F = 273.15 K, boiling point at
// 1 atm 100 °C = 212 °F = 373.15 K, and −40 °C = −40 °F.
func TestUnitConversion(t *testing.T) {
	cases := []struct {
		u    string
		v, c float64
	}{
		{"C", 21.5, 21.5}, {"F", 32, 0}, {"F", 212, 100}, {"F", -40, -40}, {"K", 273.15, 0}, {"K", 373.15, 100},
		{"degF", 212, 100}, {"kelvin", 273.15, 0}, {"Fahrenheit", 32, 0}, {"°C", 4, 4}, {"Cel", 4, 4},
	}
	for _, c := range cases {
		u, ok := parseUnit(c.u)
		if !ok {
			t.Fatalf("unit %q not accepted", c.u)
		}
		if got := u.toC(c.v); math.Abs(got-c.c) > 1e-12 {
			t.Errorf("%g %s = %g °C, want %g", c.v, c.u, got, c.c)
		}
	}
	for _, s := range []string{"R", "", "degC ", "Kelvins", "%RH"} {
		if _, ok := parseUnit(s); ok {
			t.Errorf("unit %q accepted", s)
		}
	}
	for _, s := range []string{"C", "F", "cel", "degC"} {
		if _, ok := parseSenMLUnit(s); ok {
			t.Errorf("SenML unit %q accepted (RFC 8428 registers Cel and K; RFC 8798 degF)", s)
		}
	}
}

// TestDecodeErrorKeepsDst: on error the slice comes back with its original
// length, for every format, even after part of a message had been appended.
func TestDecodeErrorKeepsDst(t *testing.T) {
	subs := corpusSubs()
	prev := []Reading{{Site: "keep", Depth: 1, TempC: 2, Time: corpusRecv}}
	cases := []struct{ sub, topic, payload string }{
		{"json", "p", `{"site":"s","depth_m":1}`},
		{"json-profile", "p", `{"site":"s","depths_m":[1,2,3],"temps_c":[4,5,"x"]}`},
		{"json-profile", "p", `{"site":"s","depths_m":[1,2],"temps_c":[4,5],"readings":[{"depth_m":3,"temp_c":1},{"depth_m":-3,"temp_c":1}]}`},
		{"senml", "p", `[{"bn":"s/","n":"t2","v":4},{"n":"t5","v":5},{"n":"nope","v":6}]`},
		{"value", "buoys/x/temp/5", `abc`},
	}
	for _, c := range cases {
		dst := append(make([]Reading, 0, 8), prev...)
		got, err := mustDecoder(t, subs[c.sub]).Decode(c.topic, []byte(c.payload), corpusRecv, dst)
		if err == nil {
			t.Errorf("%s %s: no error", c.sub, c.payload)
			continue
		}
		if len(got) != 1 || got[0].Site != "keep" {
			t.Errorf("%s %s: dst now %d readings", c.sub, c.payload, len(got))
		}
	}
	// success appends after existing readings
	got, err := mustDecoder(t, subs["json"]).Decode("p", []byte(`{"site":"s","depth_m":1,"temp_c":3}`), corpusRecv, prev)
	if err != nil || len(got) != 2 || got[0].Site != "keep" || got[1].Site != "s" {
		t.Errorf("append: %v %+v", err, got)
	}
}

// TestSenMLRFC8428 decodes the examples of RFC 8428 §5.1.1 (single
// datapoint, a temperature in Cel without time) and the resolution rules of
// §4.6 (base name, base time, base value, base unit).
func TestSenMLRFC8428(t *testing.T) {
	dec := mustDecoder(t, config.Subscription{Format: "senml", Site: "tamsin-res",
		SenMLDepths: map[string]float64{"urn:dev:ow:10e2073a01080063": 1.5}})
	// RFC 8428 §5.1.1, from memory of the RFC text.
	got, err := dec.Decode("t", []byte(`[{"n":"urn:dev:ow:10e2073a01080063","u":"Cel","v":23.1}]`), corpusRecv, nil)
	if err != nil || len(got) != 1 {
		t.Fatalf("%v %+v", err, got)
	}
	r := got[0]
	if r.TempC != 23.1 || r.Depth != 1.5 || r.Site != "tamsin-res" || !r.Time.Equal(corpusRecv) || r.QC != QCNoTime {
		t.Errorf("got %+v", r)
	}
	// §4.6: bt 1320067464 with t 60 → 1320067524 = 2011-10-31T13:25:24Z (date -u -d @1320067524);
	// the base value is added to each value; bu applies until replaced; u overrides it.
	dec = mustDecoder(t, config.Subscription{Format: "senml",
		SenMLDepths: map[string]float64{"a": 1, "b": 2, "lake-x/c": 3}})
	got, err = dec.Decode("t", []byte(`[
		{"bn":"lake-x/","bt":1.320067464e+09,"bu":"K","bv":273.15,"n":"a","v":1.5},
		{"n":"b","t":60,"v":2.5},
		{"n":"c","u":"Cel","t":120,"v":-270.15}]`), corpusRecv, nil)
	if err != nil || len(got) != 3 {
		t.Fatalf("%v %+v", err, got)
	}
	base := time.Date(2011, 10, 31, 13, 24, 24, 0, time.UTC)
	want := []struct {
		depth, temp float64
		t           time.Time
		sensor      string
	}{
		{1, 1.5, base, "a"}, {2, 2.5, base.Add(60 * time.Second), "b"}, {3, 3, base.Add(120 * time.Second), "lake-x/c"},
	}
	for i, w := range want {
		r := got[i]
		if r.Site != "lake-x" || r.Depth != w.depth || math.Abs(r.TempC-w.temp) > 1e-9 || !r.Time.Equal(w.t) || r.Sensor != w.sensor || r.QC != 0 {
			t.Errorf("record %d: %+v, want %+v", i, r, w)
		}
	}
	// §4.5.3: a time below 2^28 is relative to now; negative is in the past.
	got, err = dec.Decode("t", []byte(`[{"bn":"lake-x/","bt":-300,"n":"a","u":"Cel","v":4}]`), corpusRecv, nil)
	if err != nil || !got[0].Time.Equal(corpusRecv.Add(-5*time.Minute)) {
		t.Errorf("relative time: %v %+v", err, got)
	}
}

func TestSenMLSiteFromBN(t *testing.T) {
	for bn, want := range map[string]string{
		"urn:dev:mac:0024befffe804ff1:": "0024befffe804ff1", "calder-mere/": "calder-mere", "a/b/c": "c",
		"lake": "lake", ":::": "", "": "",
	} {
		if got := string(siteFromBN([]byte(bn))); got != want {
			t.Errorf("siteFromBN(%q) = %q, want %q", bn, got, want)
		}
	}
	dec := mustDecoder(t, config.Subscription{Format: "senml", SenMLDepths: map[string]float64{"t": 1}})
	if _, err := dec.Decode("x", []byte(`[{"n":"t","v":1,"u":"Cel"}]`), corpusRecv, nil); Reason(err) != ReasonNoSite {
		t.Errorf("no bn, no site: %v", err)
	}
	// the site follows bn when bn changes within a pack
	got, err := dec.Decode("x", []byte(`[{"bn":"a/","n":"t","v":1},{"bn":"b/","n":"t","v":2}]`), corpusRecv, nil)
	if err != nil || got[0].Site != "a" || got[1].Site != "b" {
		t.Errorf("%v %+v", err, got)
	}
}

func TestJSONDetails(t *testing.T) {
	dec := mustDecoder(t, config.Subscription{Format: "json", Site: "calder-mere", Unit: "F"})
	cases := []struct {
		payload string
		reason  string
		check   func(Reading) bool
	}{
		// escaped keys and values are unescaped like encoding/json does
		{`{"temp\u005fc": 50, "depth_m": 1, "site": "orrin\u002dlake"}`, "", func(r Reading) bool { return r.TempC == 10 && r.Site == "orrin-lake" }},
		// the last of duplicated keys wins (as with encoding/json)
		{`{"temp_c": 0, "temp_c": 212, "depth_m": 1}`, "", func(r Reading) bool { return r.TempC == 100 }},
		// the subscription's site stands in; its unit applies
		{`{"temp_c": 32, "depth_m": 2.5}`, "", func(r Reading) bool { return r.Site == "calder-mere" && r.TempC == 0 && r.Depth == 2.5 }},
		// payload unit overrides the subscription's
		{`{"temp_c": 4, "depth_m": 1, "unit": "Cel"}`, "", func(r Reading) bool { return r.TempC == 4 }},
		// numeric sensor id, unknown keys ignored, nested unknown values skipped
		{`{"temp_c": 41, "depth_m": 1, "sensor": 17, "extra": {"a": [1, {"b": "}"}]}}`, "", func(r Reading) bool { return r.Sensor == "17" && r.TempC == 5 }},
		{`{"temp_c": 41, "depth_m": 1, "sensor": true}`, ReasonBadSensor, nil},
		{`{"temp_c": 41, "depth_m": 1, "site": ["a"]}`, ReasonBadSite, nil},
		{`{"temp_c": 41, "depth_m": 1, "site": ""}`, ReasonBadSite, nil},
		{`{"temp_c": 41, "depth_m": 1, "unit": 5}`, ReasonBadUnit, nil},
		{`{"temp_c": 41, "depth_m": null}`, ReasonMissingField, nil},
		{`{"temp_c": 41, "depth_m": 1, "time": 1e30}`, ReasonBadTime, nil},
		{`{"temp_c": 41, "depth_m": 1e-400}`, "", func(r Reading) bool { return r.Depth == 0 }},
		{`"just a string"`, ReasonBadShape, nil},
		{`{"temp_c": 41, "depth_m": 1}garbage`, ReasonBadJSON, nil},
	}
	for _, c := range cases {
		got, err := dec.Decode("t", []byte(c.payload), corpusRecv, nil)
		if Reason(err) != c.reason {
			t.Errorf("%s: reason %q (%v), want %q", c.payload, Reason(err), err, c.reason)
			continue
		}
		if c.check != nil && (len(got) != 1 || !c.check(got[0])) {
			t.Errorf("%s: got %+v", c.payload, got)
		}
	}
}

func TestProfileDetails(t *testing.T) {
	dec := mustDecoder(t, config.Subscription{Format: "json-profile", Template: "lakes/{site}/profile",
		Fields: config.Fields{Depths: "z", Temps: "wt", Readings: "rows", Depth: "d", Temp: "w"}})
	got, err := dec.Decode("lakes/orrin-lake/profile", []byte(`{"time":"2024-06-01T11:50:00Z","z":[1,2],"wt":[5,6],
		"rows":[{"d":3,"w":7,"time":null},{"d":4,"w":null},{"d":5,"w":8,"site":"orrin-lake","unit":"K"}]}`), corpusRecv, nil)
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != 4 {
		t.Fatalf("%d readings: %+v", len(got), got)
	}
	for i, d := range []float64{1, 2, 3, 5} {
		if got[i].Depth != d || got[i].Site != "orrin-lake" || !got[i].Time.Equal(time.Date(2024, 6, 1, 11, 50, 0, 0, time.UTC)) || got[i].QC != 0 {
			t.Errorf("reading %d: %+v", i, got[i])
		}
	}
	if math.Abs(got[3].TempC-(8-273.15)) > 1e-9 {
		t.Errorf("element unit: %v", got[3].TempC)
	}
	bad := map[string]string{
		`{"z":[1],"wt":[5]}`:                      "", // site from topic
		`{"site":"calder-mere","z":[1],"wt":[5]}`: ReasonBadSite,
		`{"z":[1]}`:                                   ReasonMissingField,
		`{"wt":[1]}`:                                  ReasonMissingField,
		`{"z":[1,null],"wt":[5,6]}`:                   ReasonMissingField,
		`{"z":[1,null],"wt":[5,null]}`:                "",
		`{"rows":[{"d":3,"w":7,"site":"other"}]}`:     ReasonBadSite,
		`{"rows":[{"w":7}]}`:                          ReasonMissingField,
		`{"rows":{"d":3,"w":7}}`:                      ReasonBadShape,
		`{"rows":[{"d":3,"w":7,"time":"noon"}]}`:      ReasonBadTime,
		`{"z":[1,2],"wt":[5,6,7]}`:                    ReasonLengthMismatch,
		`{"z":[1,"2"],"wt":[5,6]}`:                    ReasonBadNumber,
		`{"z":[1,-2],"wt":[5,6]}`:                     ReasonNegativeDepth,
		`{"rows":[]}`:                                 ReasonMissingField,
		`{"rows":null}`:                               ReasonMissingField,
		`{"z":[1],"wt":[5],"time":"2024-06-01T11:5"}`: ReasonBadTime,
	}
	for p, want := range bad {
		if _, err := dec.Decode("lakes/orrin-lake/profile", []byte(p), corpusRecv, nil); Reason(err) != want {
			t.Errorf("%s: reason %q (%v), want %q", p, Reason(err), err, want)
		}
	}
}

func TestValueDetails(t *testing.T) {
	dec := mustDecoder(t, config.Subscription{Format: "value", Template: "buoys/{site}/temp/{depth}/{sensor}", Unit: "K"})
	got, err := dec.Decode("buoys/tamsin-res/temp/0.5m/th-01", []byte("273.15\r\n"), corpusRecv.In(time.FixedZone("x", 3600)), nil)
	if err != nil || len(got) != 1 {
		t.Fatal(err)
	}
	r := got[0]
	if r.Site != "tamsin-res" || r.Depth != 0.5 || math.Abs(r.TempC) > 1e-12 || r.Sensor != "th-01" || r.QC != QCNoTime ||
		!r.Time.Equal(corpusRecv) || r.Time.Location() != time.UTC {
		t.Errorf("%+v", r)
	}
	for p, want := range map[string]string{
		"-Infinity": ReasonNonFinite, "inf": ReasonNonFinite, "nan": ReasonNonFinite, "1e999": ReasonNonFinite,
		"+5": ReasonBadNumber, "1_000": ReasonBadNumber, "5,5": ReasonBadNumber, `"5"`: ReasonBadNumber, "{}": ReasonBadNumber,
		"0": "", "-0.5e1": "", "1e-999": "",
	} {
		if _, err := dec.Decode("buoys/tamsin-res/temp/1/a", []byte(p), corpusRecv, nil); Reason(err) != want {
			t.Errorf("%q: reason %q (%v), want %q", p, Reason(err), err, want)
		}
	}
	if _, err := dec.Decode("buoys/tamsin-res/temp/1/"+string([]byte{0x01}), []byte("1"), corpusRecv, nil); Reason(err) != ReasonBadSensor {
		t.Errorf("control char sensor: %v", err)
	}
}

func TestMaxPayload(t *testing.T) {
	dec, err := NewDecoder(config.Subscription{Format: "json"}, 64)
	if err != nil {
		t.Fatal(err)
	}
	p := []byte(`{"site":"calder-mere","depth_m":5,"temp_c":14.25}`)
	if _, err := dec.Decode("t", p, corpusRecv, nil); err != nil {
		t.Fatalf("%d bytes under a 64-byte limit: %v", len(p), err)
	}
	p = append(p, strings.Repeat(" ", 65-len(p))...)
	if _, err := dec.Decode("t", p, corpusRecv, nil); Reason(err) != ReasonTooLarge {
		t.Fatalf("65 bytes: %v", err)
	}
}

// TestDecodeConcurrent: decoders hold no mutable state (run with -race).
func TestDecodeConcurrent(t *testing.T) {
	subs := corpusSubs()
	var wg sync.WaitGroup
	for _, name := range []string{"json", "json-profile", "senml", "value"} {
		dec := mustDecoder(t, subs[name])
		payload := map[string]string{
			"json":         `{"site":"s","depth_m":1,"temp_c":4}`,
			"json-profile": `{"site":"s","depths_m":[1,2],"temps_c":[4,5]}`,
			"senml":        `[{"bn":"s/","n":"t2","v":4}]`,
			"value":        "4",
		}[name]
		for g := 0; g < 4; g++ {
			wg.Add(1)
			go func() {
				defer wg.Done()
				var buf []Reading
				for i := 0; i < 200; i++ {
					var err error
					if buf, err = dec.Decode("buoys/s/temp/1", []byte(payload), corpusRecv, buf[:0]); err != nil {
						t.Error(err)
						return
					}
				}
			}()
		}
	}
	wg.Wait()
}

func ExampleNewDecoder() {
	dec, err := NewDecoder(config.Subscription{Format: "value", Template: "buoys/{site}/temp/{depth}", Unit: "F"}, 0)
	if err != nil {
		fmt.Println(err)
		return
	}
	recv := time.Date(2024, 6, 1, 12, 0, 0, 0, time.UTC)
	rs, err := dec.Decode("buoys/calder-mere/temp/5m", []byte("39.2"), recv, nil)
	fmt.Println(err)
	fmt.Printf("%s %.1f m %.2f °C %s no_time=%v\n", rs[0].Site, rs[0].Depth, rs[0].TempC, rs[0].Time.Format(time.RFC3339), rs[0].QC&QCNoTime != 0)
	_, err = dec.Decode("buoys/calder-mere/temp/5m", []byte("NaN"), recv, nil)
	fmt.Println(Reason(err))
	// Output:
	// <nil>
	// calder-mere 5.0 m 4.00 °C 2024-06-01T12:00:00Z no_time=true
	// non_finite
}

func ExampleQualityControl_Check() {
	q := NewQualityControl(QCConfig{KnownDepths: map[string][]float64{"calder-mere": {0.5, 5}}})
	t0 := time.Date(2024, 6, 1, 0, 0, 0, 0, time.UTC)
	for i, v := range []float64{12.4, 12.5, 12.3, 31.7, 12.4} {
		r := Reading{Site: "calder-mere", Depth: 5, Time: t0.Add(time.Duration(i) * 10 * time.Minute), TempC: v}
		q.Check(&r, r.Time)
		fmt.Printf("%.1f usable=%v spike=%v\n", v, r.Usable(), r.QC&QCSpike != 0)
	}
	r := Reading{Site: "calder-mere", Depth: 7, Time: t0, TempC: 9}
	q.Check(&r, t0)
	fmt.Println("7 m unknown:", r.QC&QCUnknownDepth != 0)
	// Output:
	// 12.4 usable=true spike=false
	// 12.5 usable=true spike=false
	// 12.3 usable=true spike=false
	// 31.7 usable=false spike=true
	// 12.4 usable=true spike=false
	// 7 m unknown: true
}
