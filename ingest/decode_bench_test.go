package ingest

import (
	"fmt"
	"strings"
	"testing"
	"time"

	"holomix/config"
)

// Benchmarks of the decoders on typical messages. Throughput targets of the
// daemon (all stages, 2 cores): 25,000 single-reading messages/s and 150,000
// readings/s as profiles, so one decode should stay well below 40 µs per
// message and 6 µs per profile reading.

func benchDecode(b *testing.B, sub config.Subscription, topic string, payload []byte, perMsg int) {
	dec, err := NewDecoder(sub, 0)
	if err != nil {
		b.Fatal(err)
	}
	recv := time.Date(2024, 6, 1, 12, 0, 0, 0, time.UTC)
	buf := make([]Reading, 0, perMsg)
	b.SetBytes(int64(len(payload)))
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		out, err := dec.Decode(topic, payload, recv, buf[:0])
		if err != nil || len(out) != perMsg {
			b.Fatalf("%v, %d readings", err, len(out))
		}
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*perMsg), "ns/reading")
}

func BenchmarkDecodeJSON(b *testing.B) {
	p := []byte(`{"time": "2024-06-01T11:50:00Z", "site": "calder-mere", "depth_m": 5, "temp_c": 14.25, "sensor": "t5"}`)
	benchDecode(b, config.Subscription{Format: FormatJSON, Site: "calder-mere"}, "lakes/calder-mere/t5", p, 1)
}

func BenchmarkDecodeProfile24(b *testing.B) {
	var ds, ts []string
	for i := 0; i < 24; i++ {
		ds = append(ds, fmt.Sprintf("%g", 0.5+float64(i)))
		ts = append(ts, fmt.Sprintf("%.3f", 18.0-0.5*float64(i)))
	}
	p := []byte(`{"time": "2024-06-01T11:50:00Z", "site": "calder-mere", "depths_m": [` + strings.Join(ds, ", ") +
		`], "temps_c": [` + strings.Join(ts, ", ") + `]}`)
	benchDecode(b, config.Subscription{Format: FormatProfile}, "lakes/calder-mere/profile", p, 24)
}

func BenchmarkDecodeValue(b *testing.B) {
	benchDecode(b, config.Subscription{Format: FormatValue, Template: "buoys/{site}/temp/{depth}"},
		"buoys/calder-mere/temp/5.5m", []byte("14.25"), 1)
}

func BenchmarkDecodeSenML(b *testing.B) {
	depths := map[string]float64{}
	var recs []string
	for i := 0; i < 24; i++ {
		name := fmt.Sprintf("t%d", i)
		depths[name] = 0.5 + float64(i)
		recs = append(recs, fmt.Sprintf(`{"n": %q, "v": %.3f}`, name, 18.0-0.5*float64(i)))
	}
	p := []byte(`[{"bn": "urn:dev:mac:0024befffe804ff1:", "bt": 1717242600, "bu": "Cel"}, ` + strings.Join(recs, ", ") + `]`)
	benchDecode(b, config.Subscription{Format: FormatSenML, Site: "calder-mere", SenMLDepths: depths}, "senml/calder-mere", p, 24)
}

func BenchmarkQCCheck(b *testing.B) {
	q := NewQualityControl(QCConfig{KnownDepths: map[string][]float64{"calder-mere": {0.5, 2, 5, 10, 20}}})
	depths := []float64{0.5, 2, 5, 10, 20}
	t0 := time.Date(2024, 6, 1, 0, 0, 0, 0, time.UTC)
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		at := t0.Add(time.Duration(i/len(depths)) * time.Minute)
		r := Reading{Site: "calder-mere", Depth: depths[i%len(depths)], Time: at, TempC: 12 + float64(i%7)*0.01}
		q.Check(&r, at)
	}
}
