package ingest

import (
	"bytes"
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"testing"
)

// Fuzz targets: whatever the payload, a decoder must not panic, must return
// a known reason on error with dst untouched, and on success only readings
// that keep the Reading contract (finite °C, 0 ≤ depth ≤ MaxDepthM, a valid
// site, a UTC time within the accepted years). Quality control then runs on
// every decoded reading. Seeds come from the corpus (MANIFEST.tsv).

// seedCorpus adds the corpus files whose subscription profile is one of subs.
func seedCorpus(f *testing.F, withTopic bool, subs ...string) {
	rows := readManifest(f)
	for _, row := range rows {
		keep := false
		for _, s := range subs {
			keep = keep || row.sub == s
		}
		if !keep {
			continue
		}
		p, err := os.ReadFile(filepath.Join(corpusDir, row.file))
		if err != nil {
			f.Fatal(err)
		}
		if withTopic {
			f.Add(row.topicOr(), p)
		} else {
			f.Add(p)
		}
	}
}

// checkDecoded asserts the decoder contract on one result.
func checkDecoded(t *testing.T, payload []byte, got []Reading, err error, dstLen int) {
	t.Helper()
	if err != nil {
		r := Reason(err)
		known := false
		for _, k := range Reasons() {
			known = known || k == r
		}
		if !known || r == ReasonOther {
			t.Fatalf("error without a known reason: %v", err)
		}
		if _, ok := err.(*DecodeError); !ok {
			t.Fatalf("error is %T, want *DecodeError", err)
		}
		if len(got) != dstLen {
			t.Fatalf("error returned %d readings, dst had %d", len(got), dstLen)
		}
		return
	}
	n := len(got) - dstLen
	if n < 1 || n > MaxReadingsPerMessage {
		t.Fatalf("success with %d readings", n)
	}
	qc := NewQualityControl(QCConfig{KnownDepths: map[string][]float64{"calder-mere": {0.5, 2, 5}}})
	for i := dstLen; i < len(got); i++ {
		r := got[i]
		if !finite(r.TempC) {
			t.Fatalf("reading %d: temperature %v", i, r.TempC)
		}
		if !finite(r.Depth) || r.Depth < 0 || r.Depth > MaxDepthM {
			t.Fatalf("reading %d: depth %v", i, r.Depth)
		}
		if e := checkID(r.Site); e != "" {
			t.Fatalf("reading %d: site %q: %s", i, r.Site, e)
		}
		if r.Sensor != "" {
			if e := checkID(r.Sensor); e != "" {
				t.Fatalf("reading %d: sensor %q: %s", i, r.Sensor, e)
			}
		}
		if r.Time.Location() != corpusRecv.Location() || r.Time.Year() < 1900 || r.Time.Year() >= 2200 {
			t.Fatalf("reading %d: time %v", i, r.Time)
		}
		if r.QC&^QCNoTime != 0 {
			t.Fatalf("reading %d: decoder set QC %q", i, qcString(r.QC))
		}
		qc.Check(&got[i], corpusRecv)
	}
	if _, err := qc.State(); err != nil {
		t.Fatalf("state: %v", err)
	}
}

// jsonOracle cross-checks a successful json decode against encoding/json:
// the payload must be valid JSON, and the temperature and depth fields must
// hold the numbers the decoder returned (the subscription has unit C).
func jsonOracle(t *testing.T, payload []byte, r Reading) {
	t.Helper()
	dec := json.NewDecoder(bytes.NewReader(payload))
	dec.UseNumber()
	var m map[string]any
	if err := dec.Decode(&m); err != nil {
		t.Fatalf("decoded, but encoding/json says: %v", err)
	}
	num := func(key string) (float64, bool) {
		n, ok := m[key].(json.Number)
		if !ok {
			return 0, false
		}
		f, err := strconv.ParseFloat(string(n), 64)
		return f, err == nil || (f == 0)
	}
	if _, hasUnit := m["unit"]; !hasUnit {
		if v, ok := num("temp_c"); !ok || v != r.TempC {
			t.Fatalf("temp_c: encoding/json %v (%v), decoder %v", m["temp_c"], ok, r.TempC)
		}
	}
	if v, ok := num("depth_m"); !ok || math.Abs(v-r.Depth) != 0 {
		t.Fatalf("depth_m: encoding/json %v, decoder %v", m["depth_m"], r.Depth)
	}
	if s, ok := m["site"].(string); ok && s != r.Site {
		t.Fatalf("site: encoding/json %q, decoder %q", s, r.Site)
	}
}

func FuzzDecodeJSON(f *testing.F) {
	seedCorpus(f, false, "json", "json-topic", "json-fields")
	f.Add([]byte(`{"temp_c":1,"depth_m":1,"site":"a\u00e9\ud83d\ude00"}`))
	subs := corpusSubs()
	plain := mustDecoder(f, subs["json"])
	topical := mustDecoder(f, subs["json-topic"])
	fields := mustDecoder(f, subs["json-fields"])
	f.Fuzz(func(t *testing.T, payload []byte) {
		dst := make([]Reading, 1, 4)
		got, err := plain.Decode("payloads/test", payload, corpusRecv, dst)
		checkDecoded(t, payload, got, err, 1)
		if err == nil {
			jsonOracle(t, payload, got[1])
		} else if Reason(err) == ReasonBadJSON && json.Valid(payload) {
			t.Fatalf("valid JSON rejected as bad_json")
		}
		got, err = topical.Decode("lakes/orrin-lake/sensor/12m", payload, corpusRecv, nil)
		checkDecoded(t, payload, got, err, 0)
		got, err = fields.Decode("payloads/test", payload, corpusRecv, nil)
		checkDecoded(t, payload, got, err, 0)
	})
}

func FuzzDecodeProfile(f *testing.F) {
	seedCorpus(f, false, "json-profile")
	dec := mustDecoder(f, corpusSubs()["json-profile"])
	f.Fuzz(func(t *testing.T, payload []byte) {
		got, err := dec.Decode("payloads/test", payload, corpusRecv, nil)
		checkDecoded(t, payload, got, err, 0)
		if err == nil && !json.Valid(payload) {
			t.Fatalf("invalid JSON decoded")
		}
	})
}

func FuzzDecodeValue(f *testing.F) {
	seedCorpus(f, true, "value", "value-f")
	f.Add("buoys/a/temp/0.5m", []byte("-0.0"))
	subs := corpusSubs()
	dec := mustDecoder(f, subs["value"])
	decF := mustDecoder(f, subs["value-f"])
	f.Fuzz(func(t *testing.T, topic string, payload []byte) {
		got, err := dec.Decode(topic, payload, corpusRecv, nil)
		checkDecoded(t, payload, got, err, 0)
		if err == nil {
			// the payload is a number strconv reads the same way
			v, perr := strconv.ParseFloat(string(bytes.TrimSpace(payload)), 64)
			if perr != nil && v != 0 || v != got[0].TempC {
				t.Fatalf("value %q decoded as %v, strconv says %v (%v)", payload, got[0].TempC, v, perr)
			}
		}
		got, err = decF.Decode(topic, payload, corpusRecv, nil)
		checkDecoded(t, payload, got, err, 0)
	})
}

func FuzzDecodeSenML(f *testing.F) {
	seedCorpus(f, false, "senml", "senml-topic")
	subs := corpusSubs()
	dec := mustDecoder(f, subs["senml"])
	topical := mustDecoder(f, subs["senml-topic"])
	f.Fuzz(func(t *testing.T, payload []byte) {
		got, err := dec.Decode("payloads/test", payload, corpusRecv, nil)
		checkDecoded(t, payload, got, err, 0)
		if err == nil && !json.Valid(payload) {
			t.Fatalf("invalid JSON decoded")
		}
		got, err = topical.Decode("senml/orrin-lake", payload, corpusRecv, nil)
		checkDecoded(t, payload, got, err, 0)
	})
}
