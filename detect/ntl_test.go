package detect

import (
	"fmt"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

// Real lakes, real winters. Data: citeBogs (chains) and citeIce (observed ice
// dates, table in shared/data/ntl/SOURCES.md); citeMendota (Lake Mendota buoy).

// TestNTL_Bogs checks the ice detector and the Tmd detector on the five bog
// winters of citeBogs against the observed ice-on dates of citeIce: detected
// ice-on within 7 days. The chains end in February, before the observed
// ice-off dates, so no ice-off may be detected.
func TestNTL_Bogs(t *testing.T) {
	winters := bogWinters(t)
	type row struct {
		lake     string
		y        int
		maxDepth float64
		observed string // ice on, citeIce
	}
	table := []row{
		{"Trout Bog", 2017, 7.9, "2017-11-10"},
		{"Trout Bog", 2018, 7.9, "2018-11-09"},
		{"Crystal Bog", 2016, 2.5, "2016-12-05"},
		{"Crystal Bog", 2017, 2.5, "2017-11-07"},
		{"Crystal Bog", 2018, 2.5, "2018-11-09"},
	}
	var report []string
	md := map[string][]Event{}
	for _, r := range table {
		ps := winters[r.lake][r.y]
		if len(ps) < 24*60 {
			t.Fatalf("%s %d: only %d profiles", r.lake, r.y, len(ps))
		}
		cfg := DefaultSiteConfig(siteID(r.lake))
		cfg.Name = r.lake
		cfg.MaxDepth = r.maxDepth
		s := NewSite(cfg)
		var ice, off []Event
		key := fmt.Sprintf("%s %d", r.lake, r.y)
		for _, p := range ps {
			_, evs := s.Process(p)
			for _, e := range evs {
				checkEventShape(t, e)
				switch e.Kind {
				case KindIceOn:
					ice = append(ice, e)
				case KindIceOff:
					off = append(off, e)
				case KindMaxDensityReached:
					md[key] = append(md[key], e)
				}
			}
		}
		obs, _ := time.Parse("2006-01-02", r.observed)
		plain := plainGradientOnset(ps, 0.1, 24*time.Hour)
		line := r.lake + " " + winterName(r.y) + ": observed ice on " + r.observed + " (" + citeIce + "); "
		if len(ice) != 1 {
			t.Errorf("%s %d: %d ice_on events, want 1 (data: %s)", r.lake, r.y, len(ice), citeBogs)
			for _, e := range ice {
				t.Logf("%s", eventLine(e))
			}
			continue
		}
		on := onsetOf(t, ice[0])
		line += fmt.Sprintf("detected onset %s UTC (%+.1f d), event %s UTC (%+.1f d)", on.Format("2006-01-02 15:04"), on.Sub(obs).Hours()/24,
			ice[0].Time.Format("2006-01-02 15:04"), ice[0].Time.Sub(obs).Hours()/24) +
			fmt.Sprintf("; gradient alone (Pierson et al. 2011 criterion, no sheltering test): %s (%+.1f d)", plain.Format("2006-01-02 15:04"), plain.Sub(obs).Hours()/24)
		report = append(report, line)
		// Observed dates are local calendar days; allow the whole day.
		for what, tm := range map[string]time.Time{"onset": on, "event": ice[0].Time} {
			if tm.Before(obs.Add(-7*24*time.Hour)) || tm.After(obs.Add(8*24*time.Hour)) {
				t.Errorf("%s %d: ice_on %s %s not within 7 days of the observed %s (%s; data %s)", r.lake, r.y, what, tm, r.observed, citeIce, citeBogs)
			}
		}
		if len(off) != 0 {
			t.Errorf("%s %d: ice_off inferred at %s, but the observed ice-off is after the record ends (%s)", r.lake, r.y, off[0].Time, citeIce)
		}
	}
	for _, l := range report {
		t.Logf("%s", l)
	}

	// Trout Bog 2017-18 (citeBogs): the whole column near 4 °C in mid-November.
	tb17 := md["Trout Bog 2017"]
	if len(tb17) != 1 || onsetOf(t, tb17[0]).Month() != time.November {
		t.Errorf("Trout Bog 2017-18: max_density_reached %v, want once in November 2017 (data %s)", tb17, citeBogs)
	} else {
		t.Logf("Trout Bog 2017-18: max_density_reached onset %s (the whole column within ±0.3 °C of Tmd)", onsetOf(t, tb17[0]).Format("2006-01-02 15:04"))
	}
	// Trout Bog 2018-19 (citeBogs) froze with the column at 5-6 °C: no Tmd phase.
	if tb18 := md["Trout Bog 2018"]; len(tb18) != 0 {
		t.Errorf("Trout Bog 2018-19: max_density_reached %v, but the column never came near Tmd (data %s)", tb18[0].Time, citeBogs)
	}
}

// plainGradientOnset is the published logger criterion alone, for
// comparison: the start of the first period in which the top sensor is at
// least dT colder than the bottom one on every profile for hold.
func plainGradientOnset(ps []Profile, dT float64, hold time.Duration) time.Time {
	var start time.Time
	for _, p := range ps {
		n := len(p.Temps)
		if n < 2 || p.Temps[n-1]-p.Temps[0] < dT {
			start = time.Time{}
			continue
		}
		if start.IsZero() {
			start = p.Time
		}
		if p.Time.Sub(start) >= hold {
			return start
		}
	}
	return time.Time{}
}

func winterName(y int) string {
	return time.Date(y, 1, 1, 0, 0, 0, 0, time.UTC).Format("2006") + "-" + time.Date(y+1, 1, 1, 0, 0, 0, 0, time.UTC).Format("06")
}

// TestNTL_Mendota runs the Lake Mendota records of citeMendota and citeBogs.
func TestNTL_Mendota(t *testing.T) {
	dir := ntlDir(t)
	for _, c := range []struct {
		file string
		year int
	}{{"mendota_2018-08_2019-06_hourly.csv.gz", 2018}, {"mendota_2019-08_2020-06_hourly.csv.gz", 2019}} {
		col, rows := readGzipCSV(t, filepath.Join(dir, c.file))
		pi := col["platform"]
		get := func(platform string, from, to time.Time) []Profile {
			return profilesFromRows(t, "mendota", rows, col["datetime_utc"], col["depth_m"], col["temp_c"], func(rec []string, tm time.Time) bool {
				return rec[pi] == platform && !tm.Before(from) && tm.Before(to)
			})
		}
		newMendota := func() *Site {
			cfg := DefaultSiteConfig("mendota")
			cfg.Name = "Lake Mendota"
			cfg.MaxDepth = 25
			return NewSite(cfg)
		}

		// Open water, August to October (buoy, citeMendota): stratified in
		// summer, a fall overturn, never ice.
		summer := get("buoy", time.Date(c.year, 8, 1, 0, 0, 0, 0, time.UTC), time.Date(c.year, 11, 1, 0, 0, 0, 0, time.UTC))
		if len(summer) < 24*80 {
			t.Fatalf("%s: only %d buoy profiles Aug-Oct", c.file, len(summer))
		}
		s := newMendota()
		var overturns []Event
		var augState string
		for _, p := range summer {
			cl, evs := s.Process(p)
			if p.Time.Month() == time.August && p.Time.Day() == 31 {
				augState = cl.Seasonal
			}
			for _, e := range evs {
				checkEventShape(t, e)
				switch e.Kind {
				case KindIceOn, KindIceOff, KindFrazilRisk:
					t.Errorf("%s: %s in open water at %s (data %s)", c.file, e.Kind, e.Time, citeMendota)
				case KindOverturn:
					overturns = append(overturns, e)
				}
			}
		}
		if augState != SeasonStratified {
			t.Errorf("%s: seasonal state at the end of August %q, want stratified (data %s)", c.file, augState, citeMendota)
		}
		// One fall overturn: the column re-stratified briefly after it (18-20
		// Oct 2018 for 2.2 days, 21 Oct 2019 for 8 hours) and mixed again;
		// such transient stretches raise no second overturn (stepSeason).
		if len(overturns) != 1 {
			t.Errorf("%s: %d fall overturns by the end of October, want 1 (data %s)", c.file, len(overturns), citeMendota)
		}
		for _, e := range overturns {
			if e.Season != "fall" {
				t.Errorf("%s: overturn at %s labelled %q, want fall", c.file, e.Time, e.Season)
			}
			t.Logf("Lake Mendota %d: fall overturn onset %s (%s)", c.year, e.Details["onset"], citeMendota)
		}
	}

	// Winter 2019-20 (citeBogs, Mendota chain): only 1, 1.5 and 2 m under the
	// ice, in a 25 m lake. The detector must say what it cannot see: state
	// unknown with the coverage reason, no ice inference either way.
	col, rows := readGzipCSV(t, filepath.Join(dir, "mendota_2019-08_2020-06_hourly.csv.gz"))
	pi := col["platform"]
	chain := profilesFromRows(t, "mendota", rows, col["datetime_utc"], col["depth_m"], col["temp_c"], func(rec []string, tm time.Time) bool {
		return rec[pi] == "chain"
	})
	cfg := DefaultSiteConfig("mendota")
	cfg.MaxDepth = 25
	s := NewSite(cfg)
	for _, p := range chain {
		cl, evs := s.Process(p)
		for _, e := range evs {
			if e.Kind == KindIceOn || e.Kind == KindIceOff {
				t.Fatalf("2019-20 shallow chain: %s inferred at %s from sensors spanning %v (data %s)", e.Kind, e.Time, p.Depths, citeBogs)
			}
		}
		if cl.State != "unknown" || !strings.Contains(cl.Reason, "span") || cl.Ice.OK {
			t.Fatalf("2019-20 shallow chain at %s: state %q (%s), ice signals ok=%v; want unknown for lack of coverage", p.Time, cl.State, cl.Reason, cl.Ice.OK)
		}
	}
}

// TestNTL_TroutBogWholeRecord runs both Trout Bog winters of citeBogs through
// one Site, as a replay of the file does: the chain is silent from
// 2018-02-02 05:00 to 2018-11-06 04:00 UTC. The 2017-18 ice must not be
// carried across those nine months: it ends at the gap (no ice_off is
// invented, the observed ice-off of 2018-05-04 falls inside the gap, citeIce),
// the 2018-19 winter gets its own ice_on, and the summary counts each winter's
// ice separately.
func TestNTL_TroutBogWholeRecord(t *testing.T) {
	col, rows := readGzipCSV(t, filepath.Join(ntlDir(t), "bogs_underice_2016-2019_hourly.csv.gz"))
	li := col["lake"]
	ps := profilesFromRows(t, "trout-bog", rows, col["datetime_utc"], col["depth_m"], col["temp_c"], func(rec []string, tm time.Time) bool {
		return rec[li] == "Trout Bog"
	})
	cfg := DefaultSiteConfig("trout-bog")
	cfg.Name = "Trout Bog"
	cfg.MaxDepth = 7.9
	s := NewSite(cfg)
	gapEnd := time.Date(2018, 11, 6, 4, 0, 0, 0, time.UTC)
	var on, closed, off, md []Event
	for _, p := range ps {
		c, evs := s.Process(p)
		if p.Time.Equal(gapEnd) && (c.Seasonal != SeasonUnknown || c.IceInferred) {
			t.Errorf("first profile after the gap: seasonal %q, ice %v; want unknown", c.Seasonal, c.IceInferred)
		}
		for _, e := range evs {
			checkEventShape(t, e)
			switch {
			case e.Kind == KindIceOn && e.Status == StatusFiring:
				on = append(on, e)
			case e.Kind == KindIceOn:
				closed = append(closed, e)
			case e.Kind == KindIceOff:
				off = append(off, e)
			case e.Kind == KindMaxDensityReached:
				md = append(md, e)
			}
		}
	}
	if len(off) != 0 {
		t.Errorf("ice_off invented at %s (data %s)", off[0].Time, citeBogs)
	}
	if len(closed) != 1 || closed[0].Details["reason"] != "data gap" || !closed[0].Time.Equal(gapEnd) {
		t.Fatalf("resolved ice_on events %v, want one for the data gap at %s", closed, gapEnd)
	}
	if len(on) != 2 {
		t.Fatalf("%d ice_on events, want one per winter (data %s)", len(on), citeBogs)
	}
	for i, obs := range []string{"2017-11-10", "2018-11-09"} { // citeIce
		o, _ := time.Parse("2006-01-02", obs)
		for what, tm := range map[string]time.Time{"onset": onsetOf(t, on[i]), "event": on[i].Time} {
			if tm.Before(o.Add(-7*24*time.Hour)) || tm.After(o.Add(8*24*time.Hour)) {
				t.Errorf("winter %d: ice_on %s %s not within 7 days of the observed %s (%s)", i+1, what, tm, obs, citeIce)
			}
		}
	}
	if len(md) != 1 || onsetOf(t, md[0]).Year() != 2017 {
		t.Errorf("max_density_reached %v, want once in November 2017 (2018-19 froze at 5-6 °C)", md)
	}
	sum := s.Summary()
	lastBefore := time.Date(2018, 2, 2, 5, 0, 0, 0, time.UTC)
	if len(sum.Gaps) != 1 || !sum.Gaps[0].From.Equal(lastBefore) || !sum.Gaps[0].To.Equal(gapEnd) {
		t.Errorf("gaps %+v", sum.Gaps)
	}
	if len(sum.IcePeriods) != 2 {
		t.Fatalf("ice periods %+v", sum.IcePeriods)
	}
	p0, p1 := sum.IcePeriods[0], sum.IcePeriods[1]
	if !p0.To.Equal(lastBefore) || p0.End != IceEndGap || p1.End != IceEndRecord || !p1.To.Equal(sum.Last) {
		t.Errorf("ice periods %+v", sum.IcePeriods)
	}
	// Each winter's chain covers about 3 months: neither period, nor their
	// sum, may reach across the nine silent months.
	for _, p := range sum.IcePeriods {
		if p.Days < 80 || p.Days > 92 {
			t.Errorf("ice period %s .. %s: %.1f days, want 80-92", p.From, p.To, p.Days)
		}
	}
	if sum.IceDays > 2*92 {
		t.Errorf("ice days %.1f across both winters, want at most %d", sum.IceDays, 2*92)
	}
	t.Logf("Trout Bog ice periods (%s): %s .. %s %.1f d (%s); %s .. %s %.1f d (%s)", citeBogs,
		p0.From.Format("2006-01-02"), p0.To.Format("2006-01-02"), p0.Days, p0.End, p1.From.Format("2006-01-02"), p1.To.Format("2006-01-02"), p1.Days, p1.End)
}

// TestNTL_MendotaSpring runs the spring buoy records of citeMendota (Magnuson
// et al., NTL-LTER Lake Mendota buoy, EDI knb-lter-ntl.130 v31), 16 April -
// 30 June 2019 and 2 April - 30 June 2020. In both springs the surface
// stratified for 0.3-5 days at a time and the next windy spell mixed the lake
// to the bottom again (the 20 m sensor warmed by about 4 °C from mid-April to
// 10 May 2019, step by step), until the lake stratified for the summer (10-11
// May 2019, 18-19 May 2020). The data justify one seasonal
// stratification_onset per spring, after the last full mixing, and no spring
// overturn from these short stretches (SiteConfig.MinStratified, stepSeason).
func TestNTL_MendotaSpring(t *testing.T) {
	dir := ntlDir(t)
	for _, c := range []struct {
		file     string
		from, to time.Time
	}{
		{"mendota_2018-08_2019-06_hourly.csv.gz", time.Date(2019, 4, 1, 0, 0, 0, 0, time.UTC), time.Date(2019, 7, 1, 0, 0, 0, 0, time.UTC)},
		{"mendota_2019-08_2020-06_hourly.csv.gz", time.Date(2020, 4, 1, 0, 0, 0, 0, time.UTC), time.Date(2020, 7, 1, 0, 0, 0, 0, time.UTC)},
	} {
		col, rows := readGzipCSV(t, filepath.Join(dir, c.file))
		pi := col["platform"]
		ps := profilesFromRows(t, "mendota", rows, col["datetime_utc"], col["depth_m"], col["temp_c"], func(rec []string, tm time.Time) bool {
			return rec[pi] == "buoy" && !tm.Before(c.from) && tm.Before(c.to)
		})
		if len(ps) < 24*70 {
			t.Fatalf("%s: only %d spring buoy profiles", c.file, len(ps))
		}
		run := func(minStrat time.Duration) (onsets, overturns []Event, sum SeasonSummary, lastMixedEnd time.Time) {
			cfg := DefaultSiteConfig("mendota")
			cfg.Name = "Lake Mendota"
			cfg.MaxDepth = 25
			cfg.MinStratified = minStrat
			s := NewSite(cfg)
			// The data's own record of full mixing: the end of the last
			// stretch before June in which bottom − surface density stayed
			// below the relaxed threshold (0.05 kg/m³) for the hold (6 h).
			relaxed := cfg.Thresholds.StratDensityDiff * (1 - cfg.Hysteresis)
			var mixedSince time.Time
			for _, p := range ps {
				cl, evs := s.Process(p)
				if p.Time.Month() < time.June {
					if cl.Metrics.DensityDiff < relaxed {
						if mixedSince.IsZero() {
							mixedSince = p.Time
						}
						if p.Time.Sub(mixedSince) >= cfg.Hold {
							lastMixedEnd = p.Time
						}
					} else {
						mixedSince = time.Time{}
					}
				}
				for _, e := range evs {
					checkEventShape(t, e)
					switch e.Kind {
					case KindStratificationOnset:
						onsets = append(onsets, e)
					case KindOverturn:
						overturns = append(overturns, e)
					}
				}
			}
			return onsets, overturns, s.Summary(), lastMixedEnd
		}
		onsets, overturns, sum, mixedEnd := run(0) // defaults
		year := c.from.Year()
		if len(onsets) != 1 || len(overturns) != 0 {
			for _, e := range append(onsets, overturns...) {
				t.Logf("%s", eventLine(e))
			}
			t.Fatalf("spring %d: %d stratification_onset and %d overturn events, want 1 and 0 (data %s)", year, len(onsets), len(overturns), citeMendota)
		}
		on := onsetOf(t, onsets[0])
		if on.Before(mixedEnd.Add(-12*time.Hour)) || on.After(mixedEnd.Add(3*24*time.Hour)) {
			t.Errorf("spring %d: stratification onset %s, want just after the last full mixing (ended %s)", year, on, mixedEnd)
		}
		if sum.TransientStratified < 4 {
			t.Errorf("spring %d: %d transient stratified stretches, want at least 4: the seasonal state must still follow them", year, sum.TransientStratified)
		}
		t.Logf("Lake Mendota spring %d (%s): seasonal stratification onset %s (last full mixing ended %s), event %s; %d transient stretches",
			year, citeMendota, on.Format("2006-01-02 15:04"), mixedEnd.Format("2006-01-02 15:04"), onsets[0].Time.Format("2006-01-02 15:04"), sum.TransientStratified)

		// Without the rule every stretch held for 6 hours is an alert pair.
		onsets, overturns, _, _ = run(time.Nanosecond)
		if len(onsets) < 5 || len(overturns) < 4 {
			t.Errorf("spring %d without a minimum stratified time: %d onsets and %d overturns, want the flicker (≥ 5 and ≥ 4)", year, len(onsets), len(overturns))
		}
	}
}
