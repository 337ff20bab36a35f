package rig

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"strconv"
	"strings"
	"time"
)

// InfluxQL runs one statement against an InfluxDB 1.x /query endpoint
// (no authentication) with epoch=s and returns the first statement's series.
func InfluxQL(ctx context.Context, base, db, q string) ([]Series, error) {
	form := url.Values{"q": {q}, "db": {db}, "epoch": {"s"}}
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, base+"/query", strings.NewReader(form.Encode()))
	if err != nil {
		return nil, err
	}
	req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		return nil, fmt.Errorf("influxql %q: %w", q, err)
	}
	defer resp.Body.Close()
	raw, err := io.ReadAll(resp.Body)
	if err != nil {
		return nil, fmt.Errorf("influxql %q: %w", q, err)
	}
	var res struct {
		Results []struct {
			Series []Series `json:"series"`
			Error  string   `json:"error"`
		} `json:"results"`
		Error string `json:"error"`
	}
	if err := json.Unmarshal(raw, &res); err != nil {
		return nil, fmt.Errorf("influxql %q: HTTP %d: %w", q, resp.StatusCode, err)
	}
	if res.Error != "" {
		return nil, fmt.Errorf("influxql %q: %s", q, res.Error)
	}
	if len(res.Results) == 0 {
		return nil, nil
	}
	if e := res.Results[0].Error; e != "" {
		return nil, fmt.Errorf("influxql %q: %s", q, e)
	}
	return res.Results[0].Series, nil
}

// Series is one InfluxQL result series.
type Series struct {
	Name    string            `json:"name"`
	Tags    map[string]string `json:"tags"`
	Columns []string          `json:"columns"`
	Values  [][]any           `json:"values"`
}

// CountReadings returns the number of water_temperature points.
func CountReadings(ctx context.Context, base, db string) (int, error) {
	s, err := InfluxQL(ctx, base, db, "SELECT count(temp_c) FROM water_temperature")
	if err != nil || len(s) == 0 || len(s[0].Values) == 0 {
		return 0, err
	}
	v, _ := s[0].Values[0][1].(float64)
	return int(v), nil
}

// Point is one stored water_temperature point.
type Point struct {
	Key    Key
	Sensor string
	Temp   float64
	QC     int
}

// ReadPoints returns every water_temperature point.
func ReadPoints(ctx context.Context, base, db string) ([]Point, error) {
	ss, err := InfluxQL(ctx, base, db, "SELECT temp_c, qc FROM water_temperature GROUP BY *")
	if err != nil {
		return nil, err
	}
	var out []Point
	for _, s := range ss {
		depth, err := strconv.ParseFloat(s.Tags["depth_m"], 64)
		if err != nil {
			return nil, fmt.Errorf("series %v: depth_m tag: %w", s.Tags, err)
		}
		for _, v := range s.Values {
			if len(v) < 3 {
				continue
			}
			ts, _ := v[0].(float64)
			temp, _ := v[1].(float64)
			qc, _ := v[2].(float64)
			out = append(out, Point{Key: KeyOf(s.Tags["site"], depth, time.Unix(int64(ts), 0)), Sensor: s.Tags["sensor"],
				Temp: temp, QC: int(qc)})
		}
	}
	return out, nil
}

// ReadingTally compares the stored points with the published readings.
type ReadingTally struct {
	Published  int // distinct readings published (and acknowledged by the broker)
	Stored     int // distinct (site, depth, time) stored
	Lost       int // published, not stored
	Duplicated int // (site, depth, time) stored more than once (in different series)
	WrongValue int // stored with a temperature other than the published one
	Extra      int // stored, never published
	Flagged    map[int]int
}

// TallyReadings checks points against want (key → published temperature).
func TallyReadings(points []Point, want map[Key]float64) ReadingTally {
	t := ReadingTally{Published: len(want), Flagged: map[int]int{}}
	seen := make(map[Key]int, len(points))
	for _, p := range points {
		seen[p.Key]++
		if seen[p.Key] > 1 {
			t.Duplicated++
			continue
		}
		v, ok := want[p.Key]
		if !ok {
			t.Extra++
			continue
		}
		if d := p.Temp - v; d > 1e-9 || d < -1e-9 {
			t.WrongValue++
		}
		for bit := 1; bit <= 128; bit <<= 1 {
			if p.QC&bit != 0 {
				t.Flagged[bit]++
			}
		}
	}
	t.Stored = len(seen)
	for k := range want {
		if seen[k] == 0 {
			t.Lost++
		}
	}
	return t
}

// WaitCount polls until the water_temperature count reaches want (and
// returns when it did) or ctx ends.
func WaitCount(ctx context.Context, base, db string, want int, every time.Duration) (time.Time, int, error) {
	got := 0
	for {
		n, err := CountReadings(ctx, base, db)
		if err == nil {
			got = n
			if n >= want {
				return time.Now(), n, nil
			}
		}
		select {
		case <-ctx.Done():
			return time.Time{}, got, fmt.Errorf("%d of %d readings stored: %w", got, want, ctx.Err())
		case <-time.After(every):
		}
	}
}
