package sim

import (
	"context"
	"encoding/json"
	"fmt"
	"sort"
	"strconv"
	"strings"
	"time"

	"holomix/ingest"
)

// Payload formats produced by Payload.
const (
	FormatJSON        = "json"         // one message per reading on lakes/{site}/temp/{depth}
	FormatJSONProfile = "json-profile" // one message per site and time on lakes/{site}/profile
	FormatValue       = "value"        // bare number on lakes/{site}/temp/{depth}; no timestamp (receivers use arrival time)
)

// Message is one MQTT message: topic and payload bytes.
type Message struct {
	Topic   string
	Payload []byte
}

// jsonReading is the "json" payload: {"time","depth_m","temp_c","site"}.
type jsonReading struct {
	Time  string  `json:"time"`
	Depth float64 `json:"depth_m"`
	Temp  float64 `json:"temp_c"`
	Site  string  `json:"site"`
}

// jsonProfile is the "json-profile" payload.
type jsonProfile struct {
	Time   string    `json:"time"`
	Site   string    `json:"site"`
	Depths []float64 `json:"depths_m"`
	Temps  []float64 `json:"temps_c"`
}

// TopicTemp returns the per-reading topic lakes/{site}/temp/{depth}, the
// depth in metres in its shortest decimal form (e.g. "0.75", "18").
func TopicTemp(site string, depth float64) string {
	return "lakes/" + site + "/temp/" + strconv.FormatFloat(depth, 'f', -1, 64)
}

// TopicProfile returns the profile topic lakes/{site}/profile.
func TopicProfile(site string) string { return "lakes/" + site + "/profile" }

func checkTopicLevel(s string) error {
	if s == "" || strings.ContainsAny(s, "/+#\x00") {
		return fmt.Errorf("%q is not usable as one MQTT topic level", s)
	}
	return nil
}

// Payload encodes readings as MQTT messages of the given format ("json",
// "json-profile" or "value"). Times are RFC 3339 UTC. For "json-profile"
// the readings of one site and one time make one message, depths ascending,
// in the order the (site, time) pairs first appear.
func Payload(format string, rs []ingest.Reading) ([]Message, error) {
	for _, r := range rs {
		if err := checkTopicLevel(r.Site); err != nil {
			return nil, fmt.Errorf("sim: payload: site: %w", err)
		}
	}
	switch format {
	case FormatJSON:
		out := make([]Message, 0, len(rs))
		for _, r := range rs {
			b, err := json.Marshal(jsonReading{Time: r.Time.UTC().Format(time.RFC3339), Depth: r.Depth, Temp: r.TempC, Site: r.Site})
			if err != nil {
				return nil, fmt.Errorf("sim: payload json: %w", err)
			}
			out = append(out, Message{Topic: TopicTemp(r.Site, r.Depth), Payload: b})
		}
		return out, nil
	case FormatValue:
		out := make([]Message, 0, len(rs))
		for _, r := range rs {
			out = append(out, Message{Topic: TopicTemp(r.Site, r.Depth), Payload: []byte(strconv.FormatFloat(r.TempC, 'f', -1, 64))})
		}
		return out, nil
	case FormatJSONProfile:
		type key struct {
			site string
			t    int64
		}
		var order []key
		groups := map[key][]ingest.Reading{}
		for _, r := range rs {
			k := key{r.Site, r.Time.UnixNano()}
			if _, ok := groups[k]; !ok {
				order = append(order, k)
			}
			groups[k] = append(groups[k], r)
		}
		out := make([]Message, 0, len(order))
		for _, k := range order {
			g := groups[k]
			sort.SliceStable(g, func(i, j int) bool { return g[i].Depth < g[j].Depth })
			p := jsonProfile{Time: g[0].Time.UTC().Format(time.RFC3339), Site: k.site}
			for _, r := range g {
				p.Depths = append(p.Depths, r.Depth)
				p.Temps = append(p.Temps, r.TempC)
			}
			b, err := json.Marshal(p)
			if err != nil {
				return nil, fmt.Errorf("sim: payload json-profile: %w", err)
			}
			out = append(out, Message{Topic: TopicProfile(k.site), Payload: b})
		}
		return out, nil
	}
	return nil, fmt.Errorf("sim: unknown payload format %q (want %s, %s or %s)", format, FormatJSON, FormatJSONProfile, FormatValue)
}

// Publisher sends one message (e.g. an MQTT client or an embedded broker).
type Publisher interface {
	Publish(ctx context.Context, topic string, payload []byte) error
}

// Run steps the model and publishes every report in the given format until
// the model time reaches until (zero: no end) or ctx ends. Model time runs
// speed times faster than wall time; speed 0 runs as fast as possible.
// It returns nil at until, ctx.Err() when cancelled, or the first publish error.
func (s *Sim) Run(ctx context.Context, pub Publisher, format string, speed float64, until time.Time) error {
	if err := s.Err(); err != nil {
		return err
	}
	if speed < 0 {
		return fmt.Errorf("sim: run: negative speed %v", speed)
	}
	if _, err := Payload(format, nil); err != nil {
		return fmt.Errorf("sim: run: %w", err)
	}
	modelStart := s.Now()
	wallStart := time.Now()
	var timer *time.Timer
	defer func() {
		if timer != nil {
			timer.Stop()
		}
	}()
	for {
		if err := ctx.Err(); err != nil {
			return err
		}
		if !until.IsZero() && !s.Now().Before(until) {
			return nil
		}
		t, rs := s.Step()
		msgs, err := Payload(format, rs)
		if err != nil {
			return fmt.Errorf("sim: run at %s: %w", t.Format(time.RFC3339), err)
		}
		for _, m := range msgs {
			if err := pub.Publish(ctx, m.Topic, m.Payload); err != nil {
				return fmt.Errorf("sim: publish %s: %w", m.Topic, err)
			}
		}
		if speed == 0 {
			continue
		}
		due := wallStart.Add(time.Duration(float64(t.Sub(modelStart)) / speed))
		wait := time.Until(due)
		if wait <= 0 {
			continue
		}
		if timer == nil {
			timer = time.NewTimer(wait)
		} else {
			timer.Reset(wait)
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-timer.C:
		}
	}
}
