package alert

import (
	"flag"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"holomix/detect"
)

var update = flag.Bool("update", false, "rewrite alert/testdata/golden/*.txt from the current message text")

// Sample events for the golden texts. Sites are invented; the values are
// plausible for a fresh-water lake (densities by CIPM 2001, SCIENCE.md §1).
var (
	vell  = SiteInfo{ID: "vell", Name: "Tarn Vell"}
	orrin = SiteInfo{ID: "orrin", Name: "Orrin Reservoir"}
	// A fixed zone avoids depending on the system time-zone database.
	orrinLocal = SiteInfo{ID: "orrin", Name: "Orrin Reservoir", Location: time.FixedZone("CET", 3600)}
)

func utc(y int, mo time.Month, d, h, mi int) time.Time {
	return time.Date(y, mo, d, h, mi, 0, 0, time.UTC)
}

type goldenCase struct {
	title  string
	ev     detect.Event
	site   SiteInfo
	onset  time.Time
	status detect.Status
}

func goldenCases() map[string][]goldenCase {
	strat := detect.Event{Time: utc(2025, 5, 21, 6, 0), Site: "vell", Kind: detect.KindStratificationOnset, Severity: "info",
		From: "mixed", To: "stratified", Confidence: "high",
		Summary: "bottom water is 0.721 kg/m³ denser than the surface (threshold 0.1) and the surface is warmer (14.20 °C over 6.10 °C)",
		Metrics: []detect.Metric{{Name: "surface_temp_c", Value: 14.2, Unit: "C"}, {Name: "bottom_temp_c", Value: 6.1, Unit: "C"},
			{Name: "density_diff_kg_m3", Value: 0.7206, Unit: "kg/m3"}, {Name: "thermocline_m", Value: 7.5, Unit: "m"},
			{Name: "schmidt_stability", Value: 331.1, Unit: "J/m2"}}}
	fall := detect.Event{Time: utc(2025, 11, 3, 6, 40), Site: "vell", Kind: detect.KindOverturn, Season: "fall", Severity: "warning",
		From: "stratified", To: "mixed", Confidence: "high",
		Metrics: []detect.Metric{{Name: "surface_temp_c", Value: 7.8, Unit: "C"}, {Name: "bottom_temp_c", Value: 7.6, Unit: "C"},
			{Name: "density_diff_kg_m3", Value: 0.0112, Unit: "kg/m3"}, {Name: "schmidt_stability", Value: 3.1, Unit: "J/m2"}}}
	spring := detect.Event{Time: utc(2026, 4, 28, 14, 0), Site: "vell", Kind: detect.KindOverturn, Season: "spring", Severity: "info",
		From: "inverse", To: "mixed", Confidence: "medium",
		Metrics: []detect.Metric{{Name: "surface_temp_c", Value: 3.9, Unit: "C"}, {Name: "bottom_temp_c", Value: 4.0, Unit: "C"}}}
	maxd := detect.Event{Time: utc(2025, 11, 29, 4, 20), Site: "orrin", Kind: detect.KindMaxDensityReached, Severity: "info",
		From: "mixed", To: "max_density", Confidence: "high",
		Summary: "not stratified, and every sensor is within ±0.30 °C of its Tmd (largest departure 0.12 °C at 30.00 m)",
		Metrics: []detect.Metric{{Name: "mean_temp_c", Value: 4.05, Unit: "C"}, {Name: "tmd_c", Value: 3.98, Unit: "C"},
			{Name: "heat_to_tmd_j_m2", Value: 3.2e6, Unit: "J/m2"}},
		Projections: []detect.Projection{{Name: "days_to_surface_freezing", LowDays: 6, HighDays: 11,
			Method: "linear fit of the volume-weighted mean temperature over 5 days"}}}
	maxdUpd := maxd
	maxdUpd.Time = utc(2025, 11, 30, 4, 0)
	maxdUpd.Summary = ""
	maxdUpd.Projections = []detect.Projection{{Name: "days_to_surface_freezing", LowDays: 4.5, HighDays: 8,
		Method: "linear fit of the volume-weighted mean temperature over 5 days"}}
	inv := detect.Event{Time: utc(2025, 12, 11, 22, 0), Site: "vell", Kind: detect.KindInverseStratification, Severity: "warning",
		From: "max_density", To: "inverse", Confidence: "high",
		Metrics: []detect.Metric{{Name: "surface_temp_c", Value: 0.4, Unit: "C"}, {Name: "bottom_temp_c", Value: 3.6, Unit: "C"},
			{Name: "top_bottom_diff_c", Value: -3.2, Unit: "C"}}}
	iceOn := detect.Event{Time: utc(2025, 12, 14, 6, 0), Site: "vell", Kind: detect.KindIceOn, Severity: "warning", Confidence: "medium",
		Metrics: []detect.Metric{{Name: "surface_temp_c", Value: 0.1, Unit: "C"}, {Name: "bottom_temp_c", Value: 3.7, Unit: "C"}},
		Details: map[string]string{"method": "lasting inverse stratification with the top sensor near 0 °C"}}
	// A resolved ice_on as detect sends it when the data stop during ice
	// cover (detect/site.go dataGap): Details["reason"] is "data gap".
	iceGap := detect.Event{Time: utc(2026, 2, 20, 9, 0), Site: "vell", Kind: detect.KindIceOn, Severity: "info", Subject: "ice cover",
		From: "ice", To: "unknown", Confidence: "medium; no data for 12.1 d",
		Summary: "Tarn Vell: ice cover inferred since about 2025-12-14 06:00 UTC can no longer be followed: no data from 2026-02-08 06:00 UTC to 2026-02-20 09:00 UTC (12.1 d).",
		Metrics: []detect.Metric{{Name: "surface_temp_c", Value: 0.2, Unit: "C"}, {Name: "bottom_temp_c", Value: 3.6, Unit: "C"},
			{Name: "gap_days", Value: 12.125, Unit: "d"}, {Name: "max_gap_days", Value: 7, Unit: "d"}},
		Details: map[string]string{"reason": "data gap", "onset": "2025-12-14T06:00:00Z", "last_data": "2026-02-08T06:00:00Z",
			"data_resumed": "2026-02-20T09:00:00Z"}}
	iceOff := detect.Event{Time: utc(2026, 4, 19, 12, 0), Site: "vell", Kind: detect.KindIceOff, Severity: "info", Confidence: "medium",
		Metrics: []detect.Metric{{Name: "surface_temp_c", Value: 2.6, Unit: "C"}, {Name: "bottom_temp_c", Value: 3.8, Unit: "C"}}}
	change := detect.Event{Time: utc(2025, 8, 14, 3, 10), Site: "orrin", Kind: detect.KindIntakeChange, Subject: "hatchery deep",
		Severity: "warning", Confidence: "high",
		Metrics: []detect.Metric{{Name: "intake_temp_c", Value: 9.4, Unit: "C"}, {Name: "rate_c_per_h", Value: -1.6, Unit: "C/h"},
			{Name: "intake_depth_m", Value: 18, Unit: "m"}},
		Details: map[string]string{"limit": "1 °C/h"}}
	risk := detect.Event{Time: utc(2025, 10, 30, 17, 0), Site: "orrin", Kind: detect.KindIntakeOverturnRisk, Subject: "hatchery deep",
		Severity: "critical", Confidence: "high",
		Metrics: []detect.Metric{{Name: "intake_temp_c", Value: 8.9, Unit: "C"}, {Name: "surface_temp_c", Value: 9.3, Unit: "C"},
			{Name: "density_diff_kg_m3", Value: 0.0303, Unit: "kg/m3"}, {Name: "intake_depth_m", Value: 18, Unit: "m"}}}
	frazil := detect.Event{Time: utc(2026, 1, 5, 2, 0), Site: "orrin", Kind: detect.KindFrazilRisk, Subject: "surface screen",
		Severity: "warning", Confidence: "low",
		Metrics: []detect.Metric{{Name: "surface_temp_c", Value: 0.02, Unit: "C"}, {Name: "air_temp_c", Value: -11.5, Unit: "C"}}}
	fault := detect.Event{Time: utc(2025, 9, 2, 10, 0), Site: "vell", Kind: detect.KindSensorFault, Subject: "12 m",
		Severity: "warning", Confidence: "high",
		Metrics: []detect.Metric{{Name: "silent_h", Value: 6.5, Unit: "h"}},
		Details: map[string]string{"last_reading": "2025-09-02T03:30:00Z"}}
	atu := detect.Event{Time: utc(2026, 1, 20, 0, 0), Site: "orrin", Kind: detect.KindDegreeDays, Subject: "hatchery deep",
		Severity: "info", Confidence: "high",
		Metrics: []detect.Metric{{Name: "atu", Value: 300.4, Unit: "C*day"}},
		Details: map[string]string{"base_c": "0", "start": "2025-11-20", "threshold": "300"}}
	unknownUnit := detect.Event{Time: utc(2025, 7, 1, 0, 0), Site: "somewhere", Kind: "algal_bloom", Severity: "info",
		Metrics: []detect.Metric{{Name: "chlorophyll_index", Value: 12, Unit: ""}}}

	pair := func(ev detect.Event, site SiteInfo, end time.Time) []goldenCase {
		res := ev
		res.Time, res.Summary, res.Projections, res.Details = end, "", nil, nil
		res.From, res.To = ev.To, ev.From
		return []goldenCase{{title: "firing", ev: ev, site: site}, {title: "resolved", ev: res, site: site, status: detect.StatusResolved}}
	}
	return map[string][]goldenCase{
		"stratification_onset": pair(strat, vell, utc(2025, 10, 28, 0, 0)),
		"overturn": append(append(pair(fall, vell, utc(2025, 11, 9, 12, 0)),
			goldenCase{title: "firing, spring", ev: spring, site: vell}),
			goldenCase{title: "firing, season unknown", ev: func() detect.Event { e := fall; e.Season = ""; return e }(), site: vell}),
		"max_density_reached": append(pair(maxd, orrin, utc(2025, 12, 4, 0, 0)),
			goldenCase{title: "update", ev: maxdUpd, site: orrin, onset: maxd.Time, status: detect.StatusUpdate}),
		"inverse_stratification": pair(inv, vell, utc(2026, 4, 19, 12, 0)),
		"ice_on": append(pair(iceOn, vell, utc(2026, 4, 19, 12, 0)),
			goldenCase{title: "reminder", ev: iceOn, site: vell, onset: iceOn.Time, status: StatusReminder},
			goldenCase{title: "resolved, data gap", ev: iceGap, site: vell, status: detect.StatusResolved}),
		"ice_off":              pair(iceOff, vell, utc(2026, 4, 26, 12, 0)),
		"intake_change":        pair(change, orrin, utc(2025, 8, 14, 9, 0)),
		"intake_overturn_risk": pair(risk, orrinLocal, utc(2025, 11, 12, 23, 30)),
		"frazil_risk":          pair(frazil, orrin, utc(2026, 1, 5, 9, 0)),
		"sensor_fault":         pair(fault, vell, utc(2025, 9, 3, 8, 15)),
		"degree_days":          {{title: "firing", ev: atu, site: orrin}},
		"unknown_kind":         {{title: "firing", ev: unknownUnit, site: SiteInfo{ID: "somewhere"}}},
	}
}

// TestGoldenText compares the message text of every event kind with
// testdata/golden/<kind>.txt. These files are what people read: review them
// when they change (go test ./alert -run TestGoldenText -update).
func TestGoldenText(t *testing.T) {
	cases := goldenCases()
	for _, k := range []detect.Kind{detect.KindStratificationOnset, detect.KindOverturn, detect.KindMaxDensityReached,
		detect.KindInverseStratification, detect.KindIceOn, detect.KindIceOff, detect.KindIntakeChange,
		detect.KindIntakeOverturnRisk, detect.KindFrazilRisk, detect.KindSensorFault, detect.KindDegreeDays} {
		if _, ok := cases[string(k)]; !ok {
			t.Errorf("no golden text for kind %s", k)
		}
	}
	for name, cs := range cases {
		t.Run(name, func(t *testing.T) {
			var b strings.Builder
			for i, c := range cs {
				ev := c.ev
				if c.status == "" {
					ev.Status = detect.StatusFiring
				} else {
					ev.Status = c.status
				}
				if i > 0 {
					b.WriteString("\n\n")
				}
				b.WriteString("=== " + c.title + " ===\n")
				b.WriteString(compose(ev, c.site, c.onset).Text())
			}
			b.WriteString("\n")
			got := b.String()
			path := filepath.Join("testdata", "golden", name+".txt")
			if *update {
				if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
					t.Fatal(err)
				}
				if err := os.WriteFile(path, []byte(got), 0o644); err != nil {
					t.Fatal(err)
				}
				return
			}
			want, err := os.ReadFile(path)
			if err != nil {
				t.Fatalf("%v (run with -update to create it)", err)
			}
			if got != string(want) {
				t.Errorf("text of %s differs from %s (run with -update and review the diff):\n%s", name, path, got)
			}
		})
	}
}

// Safety content that must be in the text whatever the wording: SCIENCE.md §6-§7.
func TestComposeCautions(t *testing.T) {
	cases := goldenCases()
	must := map[string][]string{
		// Noell et al. 1978; Horne 2019: turnover at a deep intake.
		"overturn":             {"hydrogen sulphide", "ammonia", "iron and manganese", "Check water quality", "local codes and licensed practice"},
		"intake_overturn_risk": {"low-oxygen", "hydrogen sulphide", "ammonia", "iron and manganese", "Check water quality", "licensed practice", "intake hatchery deep"},
		// SCIENCE.md §7: ice inferred, thickness unknown, no ice guaranteed safe, local authority guidance.
		"ice_on":                 {"inferred from water temperatures", "thickness and strength are unknown", "no ice is guaranteed safe", "local authority guidance"},
		"ice_off":                {"inferred from water temperatures", "no ice is guaranteed safe", "local authority guidance"},
		"inverse_stratification": {"no ice is guaranteed safe", "local authority guidance"},
		"max_density_reached":    {"Tmd, the temperature at which this water is densest", "no ice is guaranteed safe", "Daly 1991"},
		// Daly 1991: frazil blocks intake screens on clear cold nights.
		"frazil_risk":   {"intake screens", "clear, cold nights", "Daly 1991", "licensed practice"},
		"intake_change": {"own testing", "licensed practice", "thermocline (the boundary"},
		"degree_days":   {"300.4 °C·day", "base 0 °C", "ATU"},
	}
	for name, phrases := range must {
		c := cases[name][0]
		ev := c.ev
		ev.Status = detect.StatusFiring
		text := Compose(ev, c.site).Text()
		for _, p := range phrases {
			if !strings.Contains(text, p) {
				t.Errorf("%s: text lacks %q:\n%s", name, p, text)
			}
		}
	}
	// Every measurement carries a unit.
	for name, cs := range cases {
		for _, c := range cs {
			text := compose(c.ev, c.site, c.onset).Text()
			_, block, ok := strings.Cut(text, "Measurements:\n")
			if !ok {
				continue
			}
			block, _, _ = strings.Cut(block, "\n\n")
			for _, line := range strings.Split(block, "\n") {
				if last := line[len(line)-1]; last >= '0' && last <= '9' {
					t.Errorf("%s/%s: measurement without a unit: %q", name, c.title, line)
				}
			}
		}
	}
}

func TestFormatHelpers(t *testing.T) {
	for _, c := range []struct {
		v    float64
		want string
	}{{7.8, "7.8"}, {7.80001, "7.8"}, {0.0112, "0.0112"}, {0.72061, "0.721"}, {0.004, "0.004"}, {0.003673, "0.00367"},
		{331.14, "331.1"}, {3.2e6, "3 200 000"}, {-12345.6, "-12 346"}, {-1.6, "-1.6"}, {0, "0"}, {-0.001, "-0.001"}, {0.4, "0.4"}} {
		if got := formatValue(c.v); got != c.want {
			t.Errorf("formatValue(%v) = %q, want %q", c.v, got, c.want)
		}
	}
	cet := time.FixedZone("CET", 3600)
	if got := formatTime(utc(2025, 10, 30, 17, 0), cet); got != "30 Oct 2025 18:00 CET (17:00 UTC)" {
		t.Errorf("formatTime = %q", got)
	}
	if got := formatTime(utc(2025, 10, 30, 23, 30), cet); got != "31 Oct 2025 00:30 CET (30 Oct 2025 23:30 UTC)" {
		t.Errorf("formatTime across midnight = %q", got)
	}
}

// A data gap during ice cover is not the end of the ice: the resolved message
// must say the cover can no longer be followed, never that it has ended
// (detect/site.go dataGap; ice caution per SCIENCE.md §7).
func TestComposeIceDataGap(t *testing.T) {
	var gap, ended detect.Event
	for _, c := range goldenCases()["ice_on"] {
		switch c.title {
		case "resolved, data gap":
			gap = c.ev
		case "resolved":
			ended = c.ev
		}
	}
	gap.Status, ended.Status = detect.StatusResolved, detect.StatusResolved
	m := Compose(gap, vell)
	if want := "Resolved: the likely ice cover at Tarn Vell (ice cover) can no longer be followed because the data stopped"; !strings.HasPrefix(m.Summary, want) {
		t.Errorf("data-gap summary = %q, want prefix %q", m.Summary, want)
	}
	text := m.Text()
	for _, bad := range []string{"has ended", "has gone since", "have gone since"} {
		if strings.Contains(text, bad) {
			t.Errorf("data-gap text says %q:\n%s", bad, text)
		}
	}
	for _, want := range []string{"does not mean that the ice has gone", "no ice is guaranteed safe", "reason: data gap"} {
		if !strings.Contains(text, want) {
			t.Errorf("data-gap text lacks %q:\n%s", want, text)
		}
	}
	// Without the reason the ordinary wording stays.
	if s := Compose(ended, vell).Summary; !strings.HasPrefix(s, "Resolved: the likely ice cover at Tarn Vell has ended since") {
		t.Errorf("ordinary resolved summary = %q", s)
	}
}
