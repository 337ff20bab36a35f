//go:build !race

// The truth comparison is pure computation (simulator → QC → engine →
// detectors, no servers, no shared state between seasons); the code it runs
// is covered under the race detector by the detect and engine tests. Under
// -race it takes about 8 minutes, so it is built only without -race;
// deploy/test.sh runs it in a separate non-race step.

package demo

import (
	"fmt"
	"math"
	"runtime"
	"sort"
	"strings"
	"sync"
	"testing"
	"time"

	"holomix/config"
	"holomix/detect"
	"holomix/detect/water"
	"holomix/ingest"
	"holomix/ingest/sim"
	"holomix/internal/engine"
)

// The detectors are checked against the simulator's truth: the model knows
// every layer of every lake, the detectors see only the thermistor chain,
// with its noise, dropouts, outages and injected faults, through the same
// QC → assembly → detection path as the daemon. The targets come from the
// project's brief (ice_on within 2 days of the freeze, max_density_reached
// within 1 day of the crossing) and are asserted on the date each event
// states as the onset of the condition (Details["onset"], e.g. "ice cover
// inferred since about …"): that is the date an operator reads. The alert
// itself comes later by the configured confirmation delay (for ice: a
// 24-hour window of calm, inverse-layered water held for IceHold, 24 h,
// i.e. about 2 days after the onset); that delay is a documented setting,
// not an error of the date, and is reported as a distribution only. For
// scale, the published temperature gradient method for ice-on agreed with
// observers to about 7 days RMSD (Pierson et al. 2011, as quoted by the
// detector).

const (
	truthSeasons = 20
	iceTolerance = 48 * time.Hour
	// The brief's target is ice_on within 2 days of the freeze in every season.
	// Measured: 61 of 61 simulated freezes meet it (onset errors −29.2 h to
	// +0.2 h, median −9.2 h). Seed 5's saline lake, calm open water cooling
	// under nightly frosts for three days before its freeze, used to pass for
	// ice (onset 62.7 h early); the top sensor's day-night swing now rules
	// such water out (detect.IceDielSwingCM), and its onset is 10.7 h early.
	// Any miss, or any onset beyond iceHardLimit, fails the test.
	iceMissesAllowed = 0
	iceHardLimit     = 72 * time.Hour
	tmdTolerance     = 24 * time.Hour
	minLastingIce    = 3 * 24 * time.Hour // a true ice cover this long must be detected
	seasonEndMonth   = time.May
	seasonEndDay     = 15
	densityMixedKgM  = 0.1 // SCIENCE.md §5 stratification threshold, also the sim's truth threshold
)

// seasonRun is one simulated season and what the detectors made of it.
type seasonRun struct {
	seed   int64
	truth  sim.Truth
	events []detect.Event
	// model holds, per site and step, the noise-free model column seen at
	// the sensor depths (see trueSample).
	model map[string][]trueSample
	wall  time.Duration
}

// trueSample is the model column at the buoy's sensor depths, without
// sensor noise, dropouts or faults: what a perfect chain would have said.
type trueSample struct {
	t time.Time
	// diff is the bottom − top sensor potential density difference, kg/m³.
	diff float64
	// tmdDev is the largest |T − Tmd| over the sensor depths, °C (Tmd by
	// Chen & Millero 1986 at each depth's pressure, 1 dbar per metre).
	tmdDev float64
}

type eventLog struct{ evs []detect.Event }

func (l *eventLog) Column(detect.Column, detect.Profile) {}
func (l *eventLog) Event(e detect.Event)                 { l.evs = append(l.evs, e) }

// interp returns the model temperature at depth z (°C) from layer centres
// zc and temperatures temps, linear between centres, constant beyond them.
func interp(zc, temps []float64, z float64) float64 {
	if z <= zc[0] {
		return temps[0]
	}
	for i := 1; i < len(zc); i++ {
		if z <= zc[i] {
			f := (z - zc[i-1]) / (zc[i] - zc[i-1])
			return temps[i-1] + f*(temps[i]-temps[i-1])
		}
	}
	return temps[len(temps)-1]
}

// runSeason runs one default season from 15 September to mid-May straight
// from sim.Step into QC and the engine (no MQTT), with hourly air
// temperatures for the frazil detector, as the daemon does.
func runSeason(seed int64) (seasonRun, error) {
	start := time.Now()
	sc := sim.DefaultScenario(seed)
	s, err := sim.NewChecked(sc)
	if err != nil {
		return seasonRun{}, err
	}
	cfg := &config.Config{Sites: Sites(sc)}
	config.Defaults(cfg)
	log := &eventLog{}
	eng, err := engine.New(cfg, log)
	if err != nil {
		return seasonRun{}, err
	}
	qc := ingest.NewQualityControl(ingest.QCConfigFrom(cfg))
	end := time.Date(sc.Start.Year()+1, seasonEndMonth, seasonEndDay, 0, 0, 0, 0, time.UTC)
	layers := map[string][]float64{}
	tmd := map[string][]float64{}
	for _, st := range cfg.Sites {
		layers[st.ID] = s.Layers(st.ID)
		for _, z := range st.Depths {
			tmd[st.ID] = append(tmd[st.ID], water.Tmd(st.Salinity, z))
		}
	}
	run := seasonRun{seed: seed, model: map[string][]trueSample{}}
	for s.Now().Before(end) {
		now, rs := s.Step()
		for i := range rs {
			qc.Check(&rs[i], now)
			eng.Add(rs[i])
		}
		for _, st := range cfg.Sites {
			col := s.Column(st.ID)
			smp := trueSample{t: now}
			for i, z := range st.Depths {
				smp.tmdDev = max(smp.tmdDev, math.Abs(interp(layers[st.ID], col, z)-tmd[st.ID][i]))
			}
			top, _ := water.Density(st.Salinity, interp(layers[st.ID], col, st.Depths[0]), 0)
			bot, _ := water.Density(st.Salinity, interp(layers[st.ID], col, st.Depths[len(st.Depths)-1]), 0)
			smp.diff = bot - top
			run.model[st.ID] = append(run.model[st.ID], smp)
			if now.Minute() == 0 {
				eng.AddAir(st.ID, now, s.AirTemp(st.ID))
			}
		}
	}
	eng.Flush()
	run.truth = s.Truth()
	run.events = log.evs
	run.wall = time.Since(start)
	return run, nil
}

// runSeasons runs seeds 1..n in parallel, one worker per core
// (GOMAXPROCS; both cores of the build machine).
func runSeasons(t *testing.T, n int) []seasonRun {
	t.Helper()
	runs := make([]seasonRun, n)
	errs := make([]error, n)
	var wg sync.WaitGroup
	next := make(chan int)
	for range runtime.GOMAXPROCS(0) {
		wg.Go(func() {
			for i := range next {
				runs[i], errs[i] = runSeason(int64(i + 1))
			}
		})
	}
	for i := range n {
		next <- i
	}
	close(next)
	wg.Wait()
	for i, err := range errs {
		if err != nil {
			t.Fatalf("seed %d: %v", i+1, err)
		}
	}
	return runs
}

// onset is the event's estimated onset (Details["onset"]), else its time.
func onset(t *testing.T, e detect.Event) time.Time {
	t.Helper()
	if s, ok := e.Details["onset"]; ok {
		o, err := time.Parse(time.RFC3339, s)
		if err != nil {
			t.Fatalf("%s %s: bad onset %q: %v", e.Site, e.Kind, s, err)
		}
		return o
	}
	return e.Time
}

// errStats collects detected − truth errors in hours.
type errStats struct {
	name string
	h    []float64
}

func (s *errStats) add(d time.Duration) { s.h = append(s.h, d.Hours()) }

func (s *errStats) String() string {
	if len(s.h) == 0 {
		return s.name + ": no cases"
	}
	h := append([]float64(nil), s.h...)
	sort.Float64s(h)
	med := h[len(h)/2]
	if len(h)%2 == 0 {
		med = (h[len(h)/2-1] + h[len(h)/2]) / 2
	}
	return fmt.Sprintf("%-44s n=%3d  min %+7.1f h  median %+7.1f h  max %+7.1f h", s.name, len(h), h[0], med, h[len(h)-1])
}

func byKind(evs []detect.Event, site string, kinds ...detect.Kind) []detect.Event {
	var out []detect.Event
	for _, e := range evs {
		if e.Site != site {
			continue
		}
		for _, k := range kinds {
			if e.Kind == k {
				out = append(out, e)
			}
		}
	}
	return out
}

func hoursStr(d time.Duration) string { return fmt.Sprintf("%+.1f", d.Hours()) }

func stampOf(t time.Time) string { return t.UTC().Format("01-02 15:04") }

// TestDetectorsAgainstSimulatorTruth runs 20 seeded seasons of the three
// default lakes and compares the events with what the model really did.
func TestDetectorsAgainstSimulatorTruth(t *testing.T) {
	start := time.Now()
	runs := runSeasons(t, truthSeasons)
	t.Logf("%d seasons in %v wall (%v per season and core, mean)", len(runs), time.Since(start).Round(time.Millisecond), meanWall(runs))

	iceOnset := &errStats{name: "ice_on onset − true freeze"}
	iceAlert := &errStats{name: "ice_on alert (event time) − true freeze"}
	tmdOnset := &errStats{name: "max_density_reached onset − true crossing"}
	tmdAlert := &errStats{name: "max_density_reached alert − true crossing"}
	fallOnset := &errStats{name: "fall overturn onset − model mixed at sensors"}
	iceOff := &errStats{name: "ice_off onset − true thaw (no target)"}
	var table, iceMisses []string

	for _, run := range runs {
		for _, tr := range run.truth.Sites {
			c := &seasonCheck{t: t, run: run, tr: tr, line: fmt.Sprintf("seed %2d %-10s", run.seed, tr.Site), iceMisses: &iceMisses}
			c.ice(iceOnset, iceAlert, iceOff)
			c.maxDensity(tmdOnset, tmdAlert)
			c.stratification(fallOnset)
			table = append(table, c.line)
		}
	}
	t.Logf("per seed and site, detected − truth in hours ('onset': the event's estimated start; 'alert': its data time):\n%s", strings.Join(table, "\n"))
	t.Logf("error distribution over %d seasons × 3 lakes (targets asserted on the onsets; alert delays are the configured confirmation, reported only):\n  %s\n  %s\n  %s\n  %s\n  %s\n  %s", len(runs), iceOnset, iceAlert, tmdOnset, tmdAlert, fallOnset, iceOff)
	t.Logf("ice_on onsets outside the 2-day target: %d of %d (allowed: %d)\n  %s", len(iceMisses), len(iceOnset.h), iceMissesAllowed, strings.Join(iceMisses, "\n  "))
	if len(iceMisses) > iceMissesAllowed {
		t.Errorf("%d ice_on onsets miss the 2-day target (allowed: %d)", len(iceMisses), iceMissesAllowed)
	}
	if len(iceOnset.h) < 2*len(runs) || len(tmdOnset.h) < 2*len(runs) {
		t.Errorf("too few matched cases: %d ice_on, %d max_density_reached over %d seasons", len(iceOnset.h), len(tmdOnset.h), len(runs))
	}
}

// seasonCheck compares one site of one season.
type seasonCheck struct {
	t         *testing.T
	run       seasonRun
	tr        sim.SiteTruth
	line      string
	iceMisses *[]string // ice_on onsets beyond iceTolerance
}

func (c *seasonCheck) errorf(format string, a ...any) {
	c.t.Helper()
	c.t.Errorf("seed %d %s: "+format, append([]any{c.run.seed, c.tr.Site}, a...)...)
}

func (c *seasonCheck) events(kinds ...detect.Kind) []detect.Event {
	return byKind(c.run.events, c.tr.Site, kinds...)
}

func (c *seasonCheck) onset(e detect.Event) time.Time { return onset(c.t, e) }

func (c *seasonCheck) episodeEnd(ep sim.IceEpisode) time.Time {
	if ep.Off.IsZero() {
		return c.run.truth.Now
	}
	return ep.Off
}

// firstLastingIce is the start of the first ice cover that lasted
// minLastingIce (the season's freeze-up), or the end of the run.
func (c *seasonCheck) firstLastingIce() time.Time {
	for _, ep := range c.tr.IceEpisodes {
		if c.episodeEnd(ep).Sub(ep.On) >= minLastingIce {
			return ep.On
		}
	}
	return c.run.truth.Now
}

// ice checks ice_on against the model's ice episodes: every cover that lasted
// 3 days is found, the ice_on nearest to it has its onset within 2 days of
// the freeze (its alert delay is recorded, not asserted); every other ice_on lies near some true ice
// (skim ice of a few hours may be caught, never open water); ice_on and
// ice_off alternate; never ice_on on the deep reservoir in September/October.
func (c *seasonCheck) ice(onsetErr, alertErr, offErr *errStats) {
	for i, e := range c.events(detect.KindIceOn, detect.KindIceOff) {
		want := detect.KindIceOn
		if i%2 == 1 {
			want = detect.KindIceOff
		}
		if e.Kind != want {
			c.errorf("event %d of the ice sequence is %s at %s, want %s (ice_on and ice_off must alternate)", i, e.Kind, e.Time.Format(time.RFC3339), want)
		}
	}
	ons := c.events(detect.KindIceOn)
	used := make([]bool, len(ons))
	brief := 0
	for _, ep := range c.tr.IceEpisodes {
		end := c.episodeEnd(ep)
		if end.Sub(ep.On) < minLastingIce {
			brief++
			continue
		}
		best := -1
		for i, e := range ons {
			o := c.onset(e)
			if used[i] || o.Before(ep.On.Add(-7*24*time.Hour)) || o.After(end) {
				continue
			}
			if best < 0 || absDur(o.Sub(ep.On)) < absDur(c.onset(ons[best]).Sub(ep.On)) {
				best = i
			}
		}
		if best < 0 {
			c.errorf("true ice cover %s → %s (%.1f d) has no ice_on", ep.On.Format(time.RFC3339), end.Format(time.RFC3339), end.Sub(ep.On).Hours()/24)
			c.line += fmt.Sprintf("  ice %s MISSED", stampOf(ep.On))
			continue
		}
		used[best] = true
		e := ons[best]
		dOn, dAlert := c.onset(e).Sub(ep.On), e.Time.Sub(ep.On)
		onsetErr.add(dOn)
		alertErr.add(dAlert)
		c.line += fmt.Sprintf("  ice %s onset %sh alert %sh", stampOf(ep.On), hoursStr(dOn), hoursStr(dAlert))
		if absDur(dOn) > iceTolerance {
			*c.iceMisses = append(*c.iceMisses, fmt.Sprintf("seed %d %s: ice_on onset %s is %+.1f h from the true freeze at %s (target within %v)",
				c.run.seed, c.tr.Site, c.onset(e).Format(time.RFC3339), dOn.Hours(), ep.On.Format(time.RFC3339), iceTolerance))
			if absDur(dOn) > iceHardLimit {
				c.errorf("ice_on onset %s is %+.1f h from the true freeze at %s (beyond %v)", c.onset(e).Format(time.RFC3339), dOn.Hours(), ep.On.Format(time.RFC3339), iceHardLimit)
			}
		}
		// Ice-off has no target in the brief: its error is reported only.
		if !ep.Off.IsZero() {
			var off *detect.Event
			for _, e := range c.events(detect.KindIceOff) {
				if d := absDur(c.onset(e).Sub(ep.Off)); d <= 14*24*time.Hour && (off == nil || d < absDur(c.onset(*off).Sub(ep.Off))) {
					off = &e
				}
			}
			if off != nil {
				d := c.onset(*off).Sub(ep.Off)
				offErr.add(d)
				c.line += fmt.Sprintf(" | off %s onset %sh", stampOf(ep.Off), hoursStr(d))
			} else {
				c.line += fmt.Sprintf(" | off %s not found", stampOf(ep.Off))
			}
		}
	}
	if brief > 0 {
		c.line += fmt.Sprintf("  (+%d skim-ice episodes < 3 d)", brief)
	}
	for i, e := range ons {
		if c.tr.Site == "larchmere" && e.Time.Month() >= time.September && e.Time.Month() <= time.October {
			c.errorf("ice_on at %s in September/October on the 30 m reservoir", e.Time.Format(time.RFC3339))
		}
		if used[i] {
			continue
		}
		o := c.onset(e)
		near := false
		for _, ep := range c.tr.IceEpisodes {
			if !o.Before(ep.On.Add(-iceTolerance)) && !o.After(c.episodeEnd(ep).Add(iceTolerance)) {
				near = true
			}
		}
		if !near {
			c.errorf("spurious ice_on at %s (onset %s): no true ice within %v of it", e.Time.Format(time.RFC3339), o.Format(time.RFC3339), iceTolerance)
			c.line += fmt.Sprintf("  SPURIOUS ice_on %s", stampOf(e.Time))
		} else {
			c.line += fmt.Sprintf("  extra ice_on %s (near skim ice)", stampOf(e.Time))
		}
	}
}

// maxDensity checks the fall max_density_reached: exactly one before the
// freeze-up when the model column reached Tmd (every layer within 0.3 °C,
// the sim's truth), none otherwise, its onset within a day of the crossing.
func (c *seasonCheck) maxDensity(onsetErr, alertErr *errStats) {
	freeze := c.firstLastingIce()
	var fall []detect.Event
	for _, e := range c.events(detect.KindMaxDensityReached) {
		if c.onset(e).Before(freeze) {
			fall = append(fall, e)
		}
	}
	truth := c.tr.MaxDensity
	switch {
	case truth.IsZero() && len(fall) > 0:
		c.errorf("max_density_reached at %s but the model column never came within 0.3 °C of Tmd before ice", fall[0].Time.Format(time.RFC3339))
		return
	case !truth.IsZero() && len(fall) == 0:
		run := c.longestNearTmd(truth, freeze)
		c.errorf("no max_density_reached before the freeze-up (%s); the model column reached Tmd at %s, and at the sensor depths stayed within 0.3 °C of it for at most %.1f h at a time before ice",
			freeze.Format(time.RFC3339), truth.Format(time.RFC3339), run.Hours())
		c.line += fmt.Sprintf("  Tmd %s MISSED (model within 0.3 °C for ≤ %.1f h)", stampOf(truth), run.Hours())
		return
	case len(fall) > 1:
		c.errorf("%d max_density_reached events before the freeze-up (one per passage through Tmd): %s, %s", len(fall), fall[0].Time.Format(time.RFC3339), fall[1].Time.Format(time.RFC3339))
	}
	if len(fall) == 0 {
		return
	}
	e := fall[0]
	dOn, dAlert := c.onset(e).Sub(truth), e.Time.Sub(truth)
	onsetErr.add(dOn)
	alertErr.add(dAlert)
	c.line += fmt.Sprintf("  Tmd %s onset %sh alert %sh", stampOf(truth), hoursStr(dOn), hoursStr(dAlert))
	if absDur(dOn) > tmdTolerance {
		c.errorf("max_density_reached onset %s is %+.1f h from the true crossing at %s (target within %v); model at the sensors within 0.3 °C of Tmd for at most %.1f h at a time before that onset",
			c.onset(e).Format(time.RFC3339), dOn.Hours(), truth.Format(time.RFC3339), tmdTolerance, c.longestNearTmd(truth, c.onset(e)).Hours())
	}
}

// longestNearTmd is the longest spell in [from, to) during which the model,
// at the sensor depths, was everywhere within 0.3 °C of Tmd.
func (c *seasonCheck) longestNearTmd(from, to time.Time) time.Duration {
	var best time.Duration
	var runStart time.Time
	in := false
	for _, smp := range c.run.model[c.tr.Site] {
		if smp.t.Before(from) || !smp.t.Before(to) {
			continue
		}
		switch {
		case smp.tmdDev <= 0.3 && !in:
			in, runStart = true, smp.t
		case smp.tmdDev > 0.3 && in:
			in = false
			best = max(best, smp.t.Sub(runStart))
		}
		if in {
			best = max(best, smp.t.Sub(runStart))
		}
	}
	return best
}

// stratification checks every stratification_onset and overturn against
// the noise-free model at the sensor depths: during the event's hold the
// model was stratified (bottom − top density above half the 0.1 kg/m³
// threshold, the detector's hysteresis) resp. not stratified (below the
// threshold) for at least half of the steps. Noise, dropouts, outages and
// the injected faults must not make events of their own.
func (c *seasonCheck) stratification(fallErr *errStats) {
	model := c.run.model[c.tr.Site]
	for _, e := range c.events(detect.KindStratificationOnset, detect.KindOverturn) {
		from, to := c.onset(e), e.Time
		agree, n := 0, 0
		for _, smp := range model {
			if smp.t.Before(from) || smp.t.After(to) {
				continue
			}
			n++
			strat := e.Kind == detect.KindStratificationOnset
			if (strat && smp.diff > densityMixedKgM/2) || (!strat && smp.diff < densityMixedKgM) {
				agree++
			}
		}
		if n == 0 || agree*2 < n {
			c.errorf("%s held %s → %s but the noise-free model at the sensor depths agreed in only %d of %d steps",
				e.Kind, from.Format(time.RFC3339), to.Format(time.RFC3339), agree, n)
		}
	}
	// The fall overturn of the deep lakes, against the first time the model
	// at the sensor depths came below half the threshold after the start.
	if c.tr.Site == "ottersedge" || !c.tr.StratifiedAtStart {
		return
	}
	freeze := c.firstLastingIce()
	var fall []detect.Event
	for _, e := range c.events(detect.KindOverturn) {
		if e.Time.Before(freeze) {
			fall = append(fall, e)
		}
	}
	var mixed time.Time
	for _, smp := range model {
		if smp.diff < densityMixedKgM/2 {
			mixed = smp.t
			break
		}
	}
	if len(fall) == 0 || mixed.IsZero() {
		c.line += fmt.Sprintf("  %d fall overturns", len(fall))
		return
	}
	d := c.onset(fall[0]).Sub(mixed)
	fallErr.add(d)
	c.line += fmt.Sprintf("  overturn %s onset %sh", stampOf(mixed), hoursStr(d))
	if len(fall) > 1 {
		c.line += fmt.Sprintf(" (%d fall overturns)", len(fall))
	}
}

func meanWall(runs []seasonRun) time.Duration {
	var sum time.Duration
	for _, r := range runs {
		sum += r.wall
	}
	return (sum / time.Duration(len(runs))).Round(time.Millisecond)
}
