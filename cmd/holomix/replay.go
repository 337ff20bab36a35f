package main

import (
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"sort"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"holomix/config"
	"holomix/detect"
	"holomix/ingest"
	"holomix/internal/engine"
)

const replayUsage = `usage: holomix replay [-c config.yaml] [--site NAME] [--format table|json|csv]
                      [--time-col NAME] [--depth-col NAME] [--temp-col NAME] [--site-col NAME]
                      [--write] FILE...

Run recorded thermistor-chain files through exactly the live detection path
(quality control with the reading time as receive time, profile assembly,
seasonal detectors) as fast as the CPU allows, then print the event timeline
and a season summary per site. Nothing depends on the wall clock: the same
files give the same events.

FILE is CSV with a header (long: time, depth, temperature[, site]; or wide:
time[, site] and one column per depth such as temp_0.5, wtr_0.5 or 0.5) or
InfluxDB line protocol (measurement water_temperature, tags site and depth_m,
field temp_c), each optionally gzip-compressed; "-" reads standard input.
Times are RFC 3339, "2006-01-02 15:04:05" (UTC) or epoch numbers. A file
without a site column takes --site, else its file name.

Without -c, sites are created from the data with defaults (maximum depth =
deepest sensor, fresh water). --site keeps one site (its id or name, any case).

--format json prints one JSON object per line: first every event
  {"record":"event","time","site","kind","status","severity","subject","from",
   "to","season","summary","confidence","metrics","projections","details"}
then one summary per site
  {"record":"summary","site","name","first","last","profiles",
   "stratified":[{"from","to"}],"overturns":[{"time","detected","season"}],
   "tmd_reached":[…],"ice_on":[…],"ice_off":[…],"ice_days","ice_open",
   "sensor_faults"}
(times RFC 3339 UTC; in "stratified", "from" is null for a period that began
before the record and "to" null for one still open at its end; "ice_open" is
true when ice was still inferred at the end).
--format csv prints one table with the columns
  record,site,time,end,kind,status,severity,subject,season,from,to,confidence,value,summary
where record is "event" or "summary"; summary rows name their item in kind
(profiles, stratified, overturn, tmd_reached, ice_on, ice_off, ice_days,
sensor_faults); an empty time or end is an open end of the record.

--write also stores the readings (with their QC flags) and the derived series
(water_column, lake_event) in the InfluxDB of the configuration's influx
section, for backfilling; it needs -c.

Ice is inferred from water temperatures only: it says nothing about ice
thickness or safety. Exit codes: 0 ok, 1 runtime failure, 2 usage or bad input.

options:`

// replayOpts are the parsed options of holomix replay.
type replayOpts struct {
	config, site, format            string
	timeCol, depthCol, tempCol, col string
	write                           bool
	files                           []string
}

func parseReplayArgs(e *env, args []string) (replayOpts, int) {
	var o replayOpts
	fs := flag.NewFlagSet("replay", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	fs.Usage = func() {
		fmt.Fprintln(e.stderr, replayUsage)
		fs.PrintDefaults()
	}
	fs.StringVar(&o.config, "c", "", "configuration file (sites, detection thresholds, influx for --write)")
	fs.StringVar(&o.config, "config", "", "same as -c")
	fs.StringVar(&o.site, "site", "", "keep only this site (id or name, case-insensitive); the site of files without a site column")
	fs.StringVar(&o.format, "format", "table", "output: table, json or csv")
	fs.StringVar(&o.timeCol, "time-col", "", "CSV time column (default: time, datetime_utc, datetime, timestamp)")
	fs.StringVar(&o.depthCol, "depth-col", "", "CSV depth column (default: depth, depth_m)")
	fs.StringVar(&o.tempCol, "temp-col", "", "CSV temperature column (default: temp, temp_c, temperature, wtemp)")
	fs.StringVar(&o.col, "site-col", "", "CSV site column (default: site, lake)")
	fs.BoolVar(&o.write, "write", false, "also write readings and derived series to InfluxDB (needs -c with influx)")
	// Options may follow the files: parse, take one file, parse again.
	for {
		if err := fs.Parse(args); err != nil {
			if errors.Is(err, flag.ErrHelp) {
				return o, -1
			}
			return o, 2
		}
		rest := fs.Args()
		if len(rest) == 0 {
			break
		}
		if consumed := len(args) - len(rest); consumed > 0 && args[consumed-1] == "--" {
			o.files = append(o.files, rest...)
			break
		}
		o.files = append(o.files, rest[0])
		args = rest[1:]
	}
	switch o.format {
	case "table", "json", "csv":
	default:
		fmt.Fprintf(e.stderr, "holomix replay: unknown --format %q (table, json or csv)\n", o.format)
		return o, 2
	}
	if len(o.files) == 0 {
		fs.Usage()
		return o, 2
	}
	if o.write && o.config == "" {
		fmt.Fprintln(e.stderr, "holomix replay: --write needs -c with an influx section")
		return o, 2
	}
	return o, 0
}

// replaySink receives the engine's output: it prints events as they come
// and hands columns and events to the writer when --write is on.
type replaySink struct {
	out     eventPrinter
	write   func(c *detect.Column, ev *detect.Event)
	columns int64
	reject  int64
	events  int64
}

func (s *replaySink) Column(c detect.Column, _ detect.Profile) {
	s.columns++
	if c.Rejected {
		s.reject++
	}
	if s.write != nil && c.State != "" {
		s.write(&c, nil)
	}
}

func (s *replaySink) Event(ev detect.Event) {
	s.events++
	s.out.event(ev)
	if s.write != nil {
		s.write(nil, &ev)
	}
}

func runReplay(ctx context.Context, e *env, args []string) int {
	o, code := parseReplayArgs(e, args)
	if code != 0 {
		if code < 0 {
			return 0
		}
		return code
	}
	var cfg *config.Config
	if o.config != "" {
		c, err := config.LoadWith(o.config, config.Options{Getenv: e.getenv, SkipSecrets: !o.write})
		var probs config.Problems
		if errors.As(err, &probs) {
			fmt.Fprintf(e.stderr, "holomix replay: %s: %d problem(s)\n", o.config, len(probs))
			for _, p := range probs {
				fmt.Fprintf(e.stderr, "  %s\n", p)
			}
			return 2
		}
		if err != nil {
			fmt.Fprintf(e.stderr, "holomix replay: %v\n", err)
			return 2
		}
		cfg = c
	}
	if o.write && cfg.Influx.URL == "" {
		fmt.Fprintf(e.stderr, "holomix replay: --write: %s has no influx.url\n", o.config)
		return 2
	}

	printer := newEventPrinter(o.format, e.stdout)
	sink := &replaySink{out: printer}
	eng, err := engine.New(cfg, sink)
	if err != nil {
		fmt.Fprintf(e.stderr, "holomix replay: %v\n", err)
		return 2
	}
	qcfg := ingest.QCConfigFrom(orEmpty(cfg))
	qc := ingest.NewQualityControl(qcfg)

	var bw *backfill
	if o.write {
		bw, err = newBackfill(ctx, cfg)
		if err != nil {
			fmt.Fprintf(e.stderr, "holomix replay: --write: %v\n", err)
			return 1
		}
		defer bw.discard()
		sink.write = bw.derived
	}

	// The --site filter: the resolved id, or the name as given in the files.
	wantID := ""
	if o.site != "" {
		wantID = eng.Resolve(o.site)
	}
	lastSite, lastMatch := "", false
	match := func(id string) bool {
		if o.site == "" {
			return true
		}
		if id != lastSite || lastSite == "" {
			lastSite = id
			lastMatch = id == wantID || strings.EqualFold(id, o.site) || strings.EqualFold(eng.SiteName(id), o.site)
		}
		return lastMatch
	}

	var st replayStats
	seenSites := map[string]bool{}
	fopts := ingest.FileOptions{Site: o.site, TimeCol: o.timeCol, DepthCol: o.depthCol, TempCol: o.tempCol, SiteCol: o.col}
	start := time.Now()
	fn := func(r ingest.Reading) error {
		r.Site = eng.Resolve(r.Site)
		if !match(r.Site) {
			st.filtered++
			if len(seenSites) < 50 {
				seenSites[r.Site] = true
			}
			return nil
		}
		qc.Check(&r, r.Time)
		if eng.Add(r) {
			r.QC |= ingest.QCLate
		}
		st.count(r.QC)
		if bw != nil {
			return bw.reading(r)
		}
		return nil
	}
	for _, path := range o.files {
		var fst ingest.FileStats
		var err error
		if path == "-" {
			fst, err = ingest.ReadStream(ctx, e.stdin, "stdin", fopts, fn)
		} else {
			fst, err = ingest.ReadFile(ctx, path, fopts, fn)
		}
		st.files = append(st.files, fst)
		if err != nil {
			fmt.Fprintf(e.stderr, "holomix replay: %v\n", err)
			if errors.Is(err, ingest.ErrBadFile) || errors.Is(err, os.ErrNotExist) || errors.Is(err, os.ErrPermission) {
				return 2
			}
			return 1
		}
	}
	eng.Flush()
	elapsed := time.Since(start)
	if bw != nil {
		if err := bw.close(); err != nil {
			fmt.Fprintf(e.stderr, "holomix replay: --write: %v\n", err)
			return 1
		}
	}

	sums := eng.Summaries()
	kept := sums[:0]
	for _, s := range sums {
		if match(s.Site) {
			kept = append(kept, s)
		}
	}
	if err := printer.summaries(kept, eng.SiteName); err != nil {
		fmt.Fprintf(e.stderr, "holomix replay: write output: %v\n", err)
		return 1
	}
	st.report(e.stderr, eng.Stats(), sink, elapsed, bw)
	if st.readings == 0 {
		if o.site != "" && st.filtered > 0 {
			names := make([]string, 0, len(seenSites))
			for s := range seenSites {
				names = append(names, eng.SiteName(s))
			}
			sort.Strings(names)
			fmt.Fprintf(e.stderr, "holomix replay: no readings of site %q; the files hold: %s\n", o.site, strings.Join(names, ", "))
		} else {
			fmt.Fprintln(e.stderr, "holomix replay: the files hold no readings")
		}
		return 2
	}
	return 0
}

func orEmpty(c *config.Config) *config.Config {
	if c == nil {
		return &config.Config{}
	}
	return c
}

// replayStats counts the readings of a replay.
type replayStats struct {
	files    []ingest.FileStats
	readings int64
	filtered int64
	flags    [16]int64
}

func (s *replayStats) count(q ingest.QC) {
	s.readings++
	for i := 0; q != 0 && i < len(s.flags); i++ {
		if q&(1<<i) != 0 {
			s.flags[i]++
			q &^= 1 << i
		}
	}
}

var qcFlagNames = [...]string{"range", "spike", "stuck", "future", "duplicate", "unknown_depth", "no_time", "late"}

// report writes the input statistics to w (standard error).
func (s *replayStats) report(w io.Writer, es engine.Stats, sink *replaySink, elapsed time.Duration, bw *backfill) {
	for _, f := range s.files {
		fmt.Fprintf(w, "%s: %s, %d lines, %d readings, %d missing values, %d unreadable",
			f.Name, f.Format, f.Lines, f.Readings, f.Missing, f.Bad)
		if f.Skipped > 0 {
			fmt.Fprintf(w, ", %d skipped", f.Skipped)
		}
		if len(f.Ignored) > 0 {
			fmt.Fprintf(w, ", ignored columns: %s", strings.Join(f.Ignored, ", "))
		}
		fmt.Fprintln(w)
		for _, ex := range f.Examples {
			fmt.Fprintf(w, "  unreadable: %s\n", ex)
		}
	}
	var flags []string
	for i, n := range s.flags {
		if n == 0 {
			continue
		}
		name := "bit" + strconv.Itoa(i)
		if i < len(qcFlagNames) {
			name = qcFlagNames[i]
		}
		flags = append(flags, fmt.Sprintf("%s %d", name, n))
	}
	qc := "none flagged"
	if len(flags) > 0 {
		qc = strings.Join(flags, ", ")
	}
	rate := 0.0
	if sec := elapsed.Seconds(); sec > 0 {
		rate = float64(s.readings+s.filtered) / sec
	}
	fmt.Fprintf(w, "replayed %d readings (%d of other sites skipped) in %s (%.0f readings/s); QC: %s\n",
		s.readings, s.filtered, elapsed.Round(time.Millisecond), rate, qc)
	fmt.Fprintf(w, "profiles %d (%d rejected by the detectors), events %d, late readings %d\n",
		sink.columns, sink.reject, sink.events, es.Late)
	if bw != nil {
		fmt.Fprintf(w, "written to InfluxDB: %d readings, %d derived points\n", bw.nReadings, bw.nDerived)
	}
}

// ---- output ----------------------------------------------------------------

// eventPrinter writes events as they come and the summaries at the end.
type eventPrinter interface {
	event(ev detect.Event)
	summaries(s []detect.SeasonSummary, name func(string) string) error
}

func newEventPrinter(format string, w io.Writer) eventPrinter {
	switch format {
	case "json":
		return &jsonPrinter{enc: json.NewEncoder(w)}
	case "csv":
		return &csvPrinter{w: csv.NewWriter(w)}
	}
	return &tablePrinter{w: w}
}

const tableTime = "2006-01-02 15:04"

func fmtDay(t time.Time) string {
	if t.IsZero() {
		return "—"
	}
	return t.UTC().Format("2006-01-02")
}

// tablePrinter prints an aligned timeline, then a summary block per site.
type tablePrinter struct {
	w      io.Writer
	tw     *tabwriter.Writer
	events int
	err    error
}

func (p *tablePrinter) event(ev detect.Event) {
	if p.tw == nil {
		fmt.Fprintln(p.w, "Event timeline (data time, UTC)")
		p.tw = tabwriter.NewWriter(p.w, 0, 0, 2, ' ', 0)
		fmt.Fprintln(p.tw, "time\tsite\tevent\tstatus\tseverity\tsummary")
	}
	p.events++
	kind := string(ev.Kind)
	if ev.Subject != "" {
		kind += " [" + ev.Subject + "]"
	}
	summary := ev.Summary
	if ev.Confidence != "" {
		summary += " (confidence " + ev.Confidence + ")"
	}
	fmt.Fprintf(p.tw, "%s\t%s\t%s\t%s\t%s\t%s\n", ev.Time.UTC().Format(tableTime), ev.Site, kind, ev.Status, ev.Severity, summary)
	// Flush now and then so a long replay shows progress with bounded memory.
	if p.events%64 == 0 {
		if err := p.tw.Flush(); err != nil && p.err == nil {
			p.err = err
		}
	}
}

func (p *tablePrinter) summaries(sums []detect.SeasonSummary, name func(string) string) error {
	if p.tw != nil {
		if err := p.tw.Flush(); err != nil {
			return err
		}
	} else {
		fmt.Fprintln(p.w, "Event timeline (data time, UTC): no events")
	}
	if p.err != nil {
		return p.err
	}
	for _, s := range sums {
		fmt.Fprintf(p.w, "\nSeason summary: %s", name(s.Site))
		if n := name(s.Site); n != s.Site {
			fmt.Fprintf(p.w, " (%s)", s.Site)
		}
		fmt.Fprintln(p.w)
		tw := tabwriter.NewWriter(p.w, 0, 0, 2, ' ', 0)
		fmt.Fprintf(tw, "  data\t%s .. %s, %d profiles\n", s.First.UTC().Format(tableTime), s.Last.UTC().Format(tableTime), s.Profiles)
		strat := stratPeriods(s)
		if len(strat) == 0 {
			fmt.Fprintf(tw, "  stratified\tnot detected\n")
		}
		for _, pr := range strat {
			fmt.Fprintf(tw, "  stratified\t%s\n", fmtPeriod(pr, "end of the record (still stratified)"))
		}
		if len(s.Overturns) == 0 {
			fmt.Fprintf(tw, "  overturn\tnot detected\n")
		}
		for _, ov := range s.Overturns {
			fmt.Fprintf(tw, "  overturn\t%s %s (detected %s)\n", ov.Season, fmtDay(ov.Time), ov.Detected.UTC().Format(tableTime))
		}
		if len(s.TmdReached) == 0 {
			fmt.Fprintf(tw, "  column at Tmd\tnot detected\n")
		}
		for _, t := range s.TmdReached {
			fmt.Fprintf(tw, "  column at Tmd\t%s\n", fmtDay(t))
		}
		if len(s.IcePeriods) == 0 {
			fmt.Fprintf(tw, "  ice cover\tnot inferred\n")
			fmt.Fprintf(tw, "  ice duration\t0 days\n")
		}
		for _, ip := range s.IcePeriods {
			fmt.Fprintf(tw, "  ice cover\t%s .. %s (%s)\n", fmtDay(ip.From), fmtDay(ip.To), iceEndText(ip.End))
		}
		// Durations per ice period (per winter): a data gap ends a period,
		// none is counted across one.
		for _, ip := range s.IcePeriods {
			note := ""
			switch ip.End {
			case detect.IceEndGap:
				note = ", ongoing when the data stopped (data gap)"
			case detect.IceEndRecord:
				note = ", ongoing at the end of the record"
			}
			fmt.Fprintf(tw, "  ice duration\t%.1f days from %s%s\n", ip.Days, fmtDay(ip.From), note)
		}
		for _, g := range s.Gaps {
			fmt.Fprintf(tw, "  data gap\t%s .. %s (%.0f days: the detectors started afresh)\n",
				g.From.UTC().Format(tableTime), g.To.UTC().Format(tableTime), g.To.Sub(g.From).Hours()/24)
		}
		fmt.Fprintf(tw, "  sensor faults\t%d\n", s.SensorFaults)
		if err := tw.Flush(); err != nil {
			return err
		}
	}
	if len(sums) > 0 {
		fmt.Fprintln(p.w, "\nCaution: ice is inferred from water temperatures (published automated methods are within about a week of observers);"+
			"\nit says nothing about ice thickness or whether ice is safe. Follow local rules and check on site.")
	}
	return nil
}

// period is a stratified or ice-covered stretch of the season. from is nil
// when it was under way at the start of the record (the detectors saw only
// its end), to is nil
// when it lasted to the end of the record.
type period struct {
	from, to *time.Time
}

// periods pairs onsets and ends in time order: an end with no open period
// closes one that began before the record.
func periods(starts, ends []time.Time) []period {
	var out []period
	i, j := 0, 0
	open := -1
	for i < len(starts) || j < len(ends) {
		if j >= len(ends) || (i < len(starts) && !ends[j].Before(starts[i])) {
			t := starts[i]
			i++
			out = append(out, period{from: &t})
			open = len(out) - 1
			continue
		}
		t := ends[j]
		j++
		if open >= 0 {
			out[open].to = &t
			open = -1
		} else {
			out = append(out, period{to: &t})
		}
	}
	return out
}

func stratPeriods(s detect.SeasonSummary) []period { return periods(s.StratifiedFrom, s.StratifiedTo) }

// iceEndText says how an ice period ended, for the table.
func iceEndText(end string) string {
	switch end {
	case detect.IceEndOff:
		return "ice-off inferred"
	case detect.IceEndGap:
		return "end of record: data gap"
	}
	return "end of the record, still ice"
}

// fmtPeriod prints a period for the table.
func fmtPeriod(p period, openEnd string) string {
	from := "start of the record"
	if p.from != nil {
		from = fmtDay(*p.from)
	}
	to := openEnd
	if p.to != nil {
		to = fmtDay(*p.to)
		if p.from != nil {
			d := p.to.Sub(*p.from).Hours() / 24
			unit := "days"
			if math.Round(d) == 1 {
				unit = "day"
			}
			to += fmt.Sprintf(" (%.0f %s)", d, unit)
		}
	}
	return from + " .. " + to
}

// jsonPrinter prints one JSON object per line.
type jsonPrinter struct {
	enc *json.Encoder
	err error
}

type jsonEvent struct {
	Record string `json:"record"`
	detect.Event
}

type jsonPeriod struct {
	From *time.Time `json:"from"`
	To   *time.Time `json:"to"`
}

type jsonSummary struct {
	Record       string                `json:"record"`
	Site         string                `json:"site"`
	Name         string                `json:"name"`
	First        time.Time             `json:"first"`
	Last         time.Time             `json:"last"`
	Profiles     int                   `json:"profiles"`
	Stratified   []jsonPeriod          `json:"stratified"`
	Overturns    []detect.OverturnInfo `json:"overturns"`
	TmdReached   []time.Time           `json:"tmd_reached"`
	IceOn        []time.Time           `json:"ice_on"`
	IceOff       []time.Time           `json:"ice_off"`
	IceDays      float64               `json:"ice_days"`
	IceOpen      bool                  `json:"ice_open"` // ice inferred at the end of the record
	SensorFaults int                   `json:"sensor_faults"`
}

func (p *jsonPrinter) event(ev detect.Event) {
	if err := p.enc.Encode(jsonEvent{Record: "event", Event: ev}); err != nil && p.err == nil {
		p.err = err
	}
}

func nonNil[T any](xs []T) []T {
	if xs == nil {
		return []T{}
	}
	return xs
}

func (p *jsonPrinter) summaries(sums []detect.SeasonSummary, name func(string) string) error {
	if p.err != nil {
		return p.err
	}
	for _, s := range sums {
		js := jsonSummary{
			Record: "summary", Site: s.Site, Name: name(s.Site), First: s.First, Last: s.Last, Profiles: s.Profiles,
			Stratified: []jsonPeriod{}, Overturns: nonNil(s.Overturns), TmdReached: nonNil(s.TmdReached),
			IceOn: nonNil(s.IceOn), IceOff: nonNil(s.IceOff), IceDays: finiteOr0(s.IceDays),
			SensorFaults: s.SensorFaults,
		}
		for _, pr := range stratPeriods(s) {
			js.Stratified = append(js.Stratified, jsonPeriod{From: pr.from, To: pr.to})
		}
		if n := len(s.IcePeriods); n > 0 && s.IcePeriods[n-1].End == detect.IceEndRecord {
			js.IceOpen = true
		}
		if err := p.enc.Encode(js); err != nil {
			return err
		}
	}
	return nil
}

func finiteOr0(x float64) float64 {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return 0
	}
	return x
}

// csvPrinter prints one table of events and summary items.
type csvPrinter struct {
	w      *csv.Writer
	header bool
}

var csvHeader = []string{"record", "site", "time", "end", "kind", "status", "severity", "subject", "season", "from", "to", "confidence", "value", "summary"}

func (p *csvPrinter) row(r ...string) {
	if !p.header {
		p.header = true
		_ = p.w.Write(csvHeader)
	}
	_ = p.w.Write(r)
}

func rfc(t time.Time) string {
	if t.IsZero() {
		return ""
	}
	return t.UTC().Format(time.RFC3339)
}

func (p *csvPrinter) event(ev detect.Event) {
	p.row("event", ev.Site, rfc(ev.Time), "", string(ev.Kind), string(ev.Status), ev.Severity, ev.Subject,
		ev.Season, ev.From, ev.To, ev.Confidence, "", ev.Summary)
}

func (p *csvPrinter) summaries(sums []detect.SeasonSummary, name func(string) string) error {
	num := func(x float64) string { return strconv.FormatFloat(finiteOr0(x), 'f', -1, 64) }
	for _, s := range sums {
		item := func(kind string, t, end time.Time, season, value, text string) {
			p.row("summary", s.Site, rfc(t), rfc(end), kind, "", "", "", season, "", "", "", value, text)
		}
		item("profiles", s.First, s.Last, "", strconv.Itoa(s.Profiles), name(s.Site))
		for _, pr := range stratPeriods(s) {
			var from, to time.Time
			if pr.from != nil {
				from = *pr.from
			}
			if pr.to != nil {
				to = *pr.to
			}
			item("stratified", from, to, "", "", "")
		}
		for _, ov := range s.Overturns {
			item("overturn", ov.Time, ov.Detected, ov.Season, "", "")
		}
		for _, t := range s.TmdReached {
			item("tmd_reached", t, time.Time{}, "", "", "")
		}
		for _, t := range s.IceOn {
			item("ice_on", t, time.Time{}, "", "", "")
		}
		for _, t := range s.IceOff {
			item("ice_off", t, time.Time{}, "", "", "")
		}
		item("ice_days", time.Time{}, time.Time{}, "", num(s.IceDays), "")
		item("sensor_faults", time.Time{}, time.Time{}, "", strconv.Itoa(s.SensorFaults), "")
	}
	if !p.header {
		p.header = true
		_ = p.w.Write(csvHeader) // no events and no sites: the header alone
	}
	p.w.Flush()
	return p.w.Error()
}
