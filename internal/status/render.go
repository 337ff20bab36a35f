package status

import (
	"fmt"
	"html/template"
	"math"
	"net/url"
	"sort"
	"strconv"
	"strings"
	"time"

	"holomix/detect"
	"holomix/detect/water"
)

// Cautions shown wherever ice or intake water quality appear (SCIENCE.md §7).
const (
	iceCaution = "Ice is inferred from water temperatures; its thickness is unknown and no ice is guaranteed safe. " +
		"Follow local authority guidance before going on any ice."
	waterCaution = "Temperatures cannot show water quality. After an overturn or an intake warning, check dissolved oxygen " +
		"and other parameters with your own testing and follow local rules and licensed practice."
)

func fmtTime(t time.Time) string {
	if t.IsZero() {
		return "—"
	}
	return t.UTC().Format("2006-01-02 15:04 UTC")
}

// fmtAge is a short human duration: "45 s", "12 min", "3 h 5 min", "4 d 2 h".
func fmtAge(d time.Duration) string {
	if d < 0 {
		d = 0
	}
	switch {
	case d < time.Minute:
		return fmt.Sprintf("%d s", int(d.Seconds()))
	case d < time.Hour:
		return fmt.Sprintf("%d min", int(d.Minutes()))
	case d < 24*time.Hour:
		return fmt.Sprintf("%d h %d min", int(d.Hours()), int(d.Minutes())%60)
	}
	return fmt.Sprintf("%d d %d h", int(d.Hours())/24, int(d.Hours())%24)
}

// fmtSpan is a window length in days or hours: "10 days", "36 h".
func fmtSpan(d time.Duration) string {
	if d >= 48*time.Hour && d%(24*time.Hour) == 0 {
		return fmt.Sprintf("%d days", int(d.Hours())/24)
	}
	return fmt.Sprintf("%d h", int(d.Hours()))
}

func fmtNum(v float64, prec int) string {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return "—"
	}
	s := strconv.FormatFloat(v, 'f', prec, 64)
	if strings.Trim(s, "-0.") == "" {
		s = strings.TrimPrefix(s, "-")
	}
	return strings.Replace(s, "-", "\u2212", 1)
}

func seasonalLabel(s string) string {
	switch s {
	case detect.SeasonStratified:
		return "stratified (warm over cold)"
	case detect.SeasonMixed:
		return "mixed"
	case detect.SeasonMaxDensity:
		return "at maximum density (whole column near Tmd)"
	case detect.SeasonInverse:
		return "inverse stratification (cold over ~4 °C)"
	case detect.SeasonIce:
		return "ice cover (inferred)"
	case "", detect.SeasonUnknown:
		return "not yet established"
	}
	return s
}

func stateLabel(s water.State) string {
	switch s {
	case water.StateStratified:
		return "stratified"
	case water.StateMixed:
		return "mixed"
	case water.StateMaxDensity:
		return "at maximum density"
	case water.StateInverse:
		return "inverse"
	case water.StateUnknown, "":
		return "unknown"
	}
	return string(s)
}

func kindLabel(k detect.Kind) string {
	switch k {
	case detect.KindStratificationOnset:
		return "stratification onset"
	case detect.KindOverturn:
		return "overturn"
	case detect.KindMaxDensityReached:
		return "maximum density reached"
	case detect.KindInverseStratification:
		return "inverse stratification"
	case detect.KindIceOn:
		return "ice on"
	case detect.KindIceOff:
		return "ice off"
	case detect.KindIntakeChange:
		return "rapid change at intake"
	case detect.KindIntakeOverturnRisk:
		return "overturn risk at intake"
	case detect.KindFrazilRisk:
		return "frazil ice risk"
	case detect.KindSensorFault:
		return "sensor fault"
	case detect.KindDegreeDays:
		return "degree-days"
	}
	return strings.ReplaceAll(string(k), "_", " ")
}

// projectionText turns a projection into words, e.g. "column reaches Tmd in 4–7 days".
func projectionText(p detect.Projection) string {
	what := strings.ReplaceAll(p.Name, "_", " ")
	switch p.Name {
	case "days_to_tmd":
		what = "column reaches Tmd"
	case "days_to_surface_freezing":
		what = "surface reaches the freezing point"
	}
	lo, hi := p.LowDays, p.HighDays
	switch {
	case math.IsNaN(lo) || math.IsNaN(hi):
		return what + ": no estimate"
	case math.IsInf(hi, 1) || hi > 60:
		return fmt.Sprintf("%s in more than %s days", what, fmtNum(math.Max(lo, 0), 0))
	case hi < 1:
		return what + " within a day"
	}
	a, b := math.Floor(math.Max(lo, 0)), math.Ceil(hi)
	if a == b {
		return fmt.Sprintf("%s in about %s days", what, fmtNum(a, 0))
	}
	return fmt.Sprintf("%s in %s–%s days", what, fmtNum(a, 0), fmtNum(b, 0))
}

func siteURL(id string) string { return "/sites/" + url.PathEscape(id) }

// siteRow is one site in the overview table and the head of its page.
type siteRow struct {
	ID, Name, URL   string
	Thumb           template.HTML
	NoData          bool
	Seasonal        string
	SeasonalSince   string
	State           string
	TopC, BottomC   string
	DeltaRho        string
	Schmidt         string
	Thermocline     string
	LastProfile     string
	Received        string
	Age             string
	Stale           bool
	Open            []string
	Outlook         []string
	Ice             bool
	Rejected        string
	SensorsUsed     int
	SensorsExpected int
}

func makeRow(v siteView, now time.Time, staleAfter time.Duration) siteRow {
	r := siteRow{ID: v.Meta.ID, Name: v.Meta.Name, URL: siteURL(v.Meta.ID), Thumb: thumbFigure(v), NoData: !v.Has}
	r.Seasonal = seasonalLabel(v.Seasonal)
	if !v.SeasonalSince.IsZero() {
		r.SeasonalSince = fmtTime(v.SeasonalSince)
	}
	r.Ice = v.Seasonal == detect.SeasonIce || v.Col.IceInferred
	if v.RejReason != "" {
		r.Rejected = fmtTime(v.RejTime) + ": " + v.RejReason
	}
	for _, e := range v.Open {
		r.Open = append(r.Open, kindLabel(e.Kind)+subjectSuffix(e.Subject))
	}
	if !v.Has {
		r.State, r.TopC, r.BottomC, r.DeltaRho, r.Schmidt, r.Thermocline, r.LastProfile, r.Age = "—", "—", "—", "—", "—", "—", "—", "—"
		return r
	}
	m := v.Col.Metrics
	r.State = stateLabel(v.Col.State)
	r.TopC, r.BottomC = fmtNum(m.SurfaceTempC, 2), fmtNum(m.BottomTempC, 2)
	r.DeltaRho = fmtNum(m.DensityDiff, 3)
	r.Schmidt = fmtNum(m.SchmidtJM2, 1)
	r.Thermocline = fmtNum(m.ThermoclineM, 1)
	r.LastProfile = fmtTime(v.Col.Time)
	r.Received = fmtTime(v.Received)
	age := now.Sub(v.Received)
	r.Age = fmtAge(age)
	r.Stale = age > staleAfter
	r.SensorsUsed, r.SensorsExpected = v.Col.SensorsUsed, v.Col.SensorsExpected
	for _, p := range v.Col.Projections {
		r.Outlook = append(r.Outlook, projectionText(p))
	}
	return r
}

func subjectSuffix(s string) string {
	if s == "" || s == "column" {
		return ""
	}
	return " (" + s + ")"
}

type eventRow struct {
	Time, Site, SiteURL, Kind, Code, Status, Severity, Summary, Confidence string
}

func makeEventRow(e detect.Event, name string) eventRow {
	return eventRow{
		Time: fmtTime(e.Time), Site: name, SiteURL: siteURL(e.Site), Kind: kindLabel(e.Kind) + subjectSuffix(e.Subject),
		Code: kindCode(e.Kind), Status: string(e.Status), Severity: e.Severity, Summary: e.Summary, Confidence: e.Confidence,
	}
}

type alertRow struct {
	Time, Site, Kind, Status, Receiver, Summary, Delivery, Error string
	Failed                                                       bool
}

func makeAlertRow(a AlertLine) alertRow {
	r := alertRow{Time: fmtTime(a.Time), Site: a.Site, Kind: a.Kind, Status: a.Status, Receiver: a.Receiver, Summary: a.Summary, Error: a.Error}
	if a.Delivered {
		r.Delivery = "delivered"
	} else if a.Error != "" {
		r.Delivery, r.Failed = "failed", true
	} else {
		r.Delivery = "pending"
	}
	return r
}

type kv struct{ Key, Value string }

type healthView struct {
	Broker, Spool, Database, Deliveries string
	BrokerBad, DBBad, DeliveriesBad     bool
	Extra                               []kv
}

func makeHealth(h Health) healthView {
	v := healthView{}
	if h.BrokerConnected {
		v.Broker = "connected"
	} else {
		v.Broker, v.BrokerBad = "DISCONNECTED", true
	}
	v.Spool = fmt.Sprintf("%d readings waiting", h.SpoolDepth)
	if h.SpoolDepth > 0 {
		v.Spool += ", oldest " + fmtAge(h.SpoolOldest)
	}
	switch {
	case h.DBNotConfigured:
		v.Database = "not configured (readings stay spooled)"
	case h.DBReachable:
		v.Database = "reachable"
	default:
		v.Database, v.DBBad = "UNREACHABLE", true
	}
	v.Deliveries = fmt.Sprintf("%d pending, %d failed", h.PendingDeliveries, h.FailedDeliveries)
	v.DeliveriesBad = h.FailedDeliveries > 0
	keys := make([]string, 0, len(h.Extra))
	for k := range h.Extra {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	for _, k := range keys {
		v.Extra = append(v.Extra, kv{k, h.Extra[k]})
	}
	return v
}

type PageHead struct {
	Title     string
	Generated string
	Refresh   int
}

type overviewPage struct {
	PageHead
	Sites    []siteRow
	Health   healthView
	Events   []eventRow
	Alerts   []alertRow
	Counters Counters
	Stale    string
	Cautions []string
}

type metricRow struct{ Name, Value, Unit, Note string }

type intakeRow struct {
	Name, Depth, Temp, Rate, DegreeDays string
}

type sitePage struct {
	PageHead
	Row         siteRow
	MaxDepth    string
	Expected    string
	Missing     string
	Reason      string
	Profile     template.HTML
	Heat        template.HTML
	HeatWindow  string
	Metrics     []metricRow
	Formula     string
	Open        []eventRow
	Intakes     []intakeRow
	Events      []eventRow
	Alerts      []alertRow
	IceCaution  bool
	WaterNotice bool
	Cautions    []string
}

func joinDepths(ds []float64) string {
	if len(ds) == 0 {
		return "—"
	}
	parts := make([]string, len(ds))
	for i, d := range ds {
		parts[i] = strconv.FormatFloat(d, 'f', -1, 64)
	}
	return strings.Join(parts, ", ") + " m"
}

func makeMetrics(m water.Metrics) []metricRow {
	return []metricRow{
		{"surface temperature", fmtNum(m.SurfaceTempC, 3), "°C", "top sensor"},
		{"bottom temperature", fmtNum(m.BottomTempC, 3), "°C", "deepest sensor"},
		{"mean temperature", fmtNum(m.MeanTempC, 3), "°C", m.MeanMethod},
		{"surface density", fmtNum(m.SurfaceDensity, 4), "kg m⁻³", "potential density"},
		{"bottom density", fmtNum(m.BottomDensity, 4), "kg m⁻³", "potential density"},
		{"bottom − surface density", fmtNum(m.DensityDiff, 4), "kg m⁻³", ""},
		{"Schmidt stability", fmtNum(m.SchmidtJM2, 1), "J m⁻²", "Idso 1973"},
		{"max. buoyancy frequency N²", fmtNum(m.MaxN2, 6), "s⁻²", ""},
		{"thermocline depth", fmtNum(m.ThermoclineM, 2), "m", m.ThermoclineMethod},
		{"metalimnion top", fmtNum(m.MetaTopM, 2), "m", ""},
		{"metalimnion bottom", fmtNum(m.MetaBottomM, 2), "m", ""},
		{"heat to lose to reach Tmd", fmtNum(m.HeatToTmdJM2/1e6, 2), "MJ m⁻²", "per unit surface area"},
		{"freezing point at the surface", fmtNum(m.FreezingPointC, 3), "°C", "UNESCO 1983"},
		{"integration depth", fmtNum(m.IntegrationDepthM, 1), "m", ""},
	}
}

func makeIntakes(v siteView) []intakeRow {
	var rows []intakeRow
	status := map[string]detect.IntakeStatus{}
	for _, is := range v.Col.Intakes {
		status[is.Name] = is
	}
	for _, in := range v.Meta.Intakes {
		r := intakeRow{Name: in.Name, Depth: fmtNum(in.Depth, 1) + " m", Temp: "—", Rate: "—", DegreeDays: "—"}
		if is, ok := status[in.Name]; ok {
			if is.TempOK {
				r.Temp = fmtNum(is.TempC, 2) + " °C"
			}
			if is.RateOK {
				r.Rate = fmtNum(is.RateCPerH, 2) + " °C/h"
			}
			if is.HasDegreeDays {
				r.DegreeDays = fmtNum(is.DegreeDays, 1) + " °C·day above " + fmtNum(is.DegreeDaysBaseC, 1) + " °C"
			}
		}
		rows = append(rows, r)
	}
	return rows
}

const baseCSS = `
:root{color-scheme:light}
*{box-sizing:border-box}
body{font-family:Charter,"Bitstream Charter","Sitka Text",Cambria,"Noto Serif","DejaVu Serif",Georgia,serif;
 font-size:15px;line-height:1.4;color:#111;background:#fff;margin:0 auto;padding:12px 16px 40px;max-width:1120px}
h1{font-size:1.45em;margin:.3em 0 .1em;font-weight:normal}
h2{font-size:1.1em;margin:1.6em 0 .4em;font-weight:bold;border-bottom:1px solid #000;padding-bottom:2px}
a{color:#0b3d91}
.sub{color:#444;font-size:.9em;margin:0 0 .8em}
.wrap{overflow-x:auto;-webkit-overflow-scrolling:touch}
table{border-collapse:collapse;font-size:.88em;width:100%;font-variant-numeric:tabular-nums}
thead th{border-top:1.5px solid #000;border-bottom:.8px solid #000;text-align:left;font-weight:bold;padding:3px 6px;vertical-align:bottom}
tbody td{padding:3px 6px;vertical-align:top;border-bottom:.5px solid #ccc}
tbody tr:last-child td{border-bottom:1.5px solid #000}
td.num,th.num{text-align:right;white-space:nowrap}
td.nw{white-space:nowrap}
td.wide{min-width:15em}
table.sites td{vertical-align:middle}
.flag{font-weight:bold;border:1px solid #000;padding:0 3px;font-size:.85em;letter-spacing:.04em}
.caution{border-left:3px solid #000;padding:4px 10px;margin:.8em 0;background:#f4f4f4;font-size:.92em}
dl.kv{display:grid;grid-template-columns:max-content 1fr;gap:2px 14px;margin:.3em 0;font-size:.92em}
dl.kv dt{color:#333}
dl.kv dd{margin:0}
figure{margin:.6em 0 1.2em}
figcaption{font-size:.86em;color:#222;margin-top:.3em;max-width:900px}
svg.fig{width:100%;height:auto;max-width:900px;display:block;font-family:inherit}
svg.thumb{width:72px;height:90px;display:block}
.panels{display:flex;flex-wrap:wrap;gap:8px 24px}
svg.panel{width:100%;max-width:400px;height:auto;flex:1 1 300px;font-family:inherit}
p.key{font-size:.85em;margin:.3em 0}
p.key span{margin-right:1.2em;white-space:nowrap}
.figwrap{overflow-x:auto}
.figwrap svg.fig{min-width:620px}
ul.plain{margin:.2em 0;padding-left:1.1em}
footer{margin-top:2em;font-size:.82em;color:#333;border-top:1px solid #000;padding-top:.4em}
@media (max-width:640px){body{font-size:14px;padding:8px}table{font-size:.82em}}
@media print{a{color:#000;text-decoration:none}.wrap{overflow:visible}}
`

const headTmpl = `{{define "head"}}<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
{{if gt .Refresh 0}}<meta http-equiv="refresh" content="{{.Refresh}}">{{end}}
<title>{{.Title}}</title>
<style>` + baseCSS + `</style></head><body>{{end}}
{{define "foot"}}<footer>Generated {{.Generated}}{{if gt .Refresh 0}} · this page reloads every {{.Refresh}} s{{end}}. Times are UTC, depths in metres below the surface, temperatures in °C.
JSON: <a href="/api/sites">/api/sites</a>.</footer></body></html>{{end}}
{{define "events"}}<div class="wrap"><table><thead><tr><th>time (UTC)</th>{{if .ShowSite}}<th>site</th>{{end}}<th>code</th><th>event</th><th>status</th><th>severity</th><th>summary</th></tr></thead><tbody>
{{range .Rows}}<tr><td class="nw">{{.Time}}</td>{{if $.ShowSite}}<td><a href="{{.SiteURL}}">{{.Site}}</a></td>{{end}}<td>{{.Code}}</td><td>{{.Kind}}</td><td>{{.Status}}</td><td>{{.Severity}}</td><td>{{.Summary}}</td></tr>
{{else}}<tr><td colspan="7">{{.Empty}}</td></tr>{{end}}</tbody></table></div>{{end}}
{{define "alerts"}}<div class="wrap"><table><thead><tr><th>time (UTC)</th><th>site</th><th>event</th><th>status</th><th>receiver</th><th>delivery</th><th>summary</th></tr></thead><tbody>
{{range .}}<tr><td class="nw">{{.Time}}</td><td>{{.Site}}</td><td>{{.Kind}}</td><td>{{.Status}}</td><td>{{.Receiver}}</td><td>{{if .Failed}}<span class="flag">FAILED</span> {{.Error}}{{else}}{{.Delivery}}{{end}}</td><td>{{.Summary}}</td></tr>
{{else}}<tr><td colspan="7">no alerts sent yet</td></tr>{{end}}</tbody></table></div>{{end}}`

const overviewTmpl = `{{template "head" .PageHead}}
<h1>{{.Title}}</h1>
<p class="sub">Water columns of {{len .Sites}} site{{if ne (len .Sites) 1}}s{{end}} · generated {{.Generated}}</p>
<h2>Sites</h2>
<div class="wrap"><table class="sites"><thead><tr><th>site</th><th>profile</th><th>state</th>
<th class="num">top / bottom<br>°C</th><th class="num">Δρ<br>kg m⁻³</th><th class="num">Schmidt<br>J m⁻²</th>
<th>last profile (UTC)</th><th>open episodes · outlook</th></tr></thead><tbody>
{{range .Sites}}<tr><td><a href="{{.URL}}">{{.Name}}</a><br><small>{{.ID}}</small></td><td>{{.Thumb}}</td>
<td><b>{{.Seasonal}}</b>{{if .SeasonalSince}}<br><small>since {{.SeasonalSince}}</small>{{end}}<br><small>this profile: {{.State}}</small></td>
<td class="num">{{.TopC}} / {{.BottomC}}</td><td class="num">{{.DeltaRho}}</td><td class="num">{{.Schmidt}}</td>
<td class="nw">{{if .NoData}}no data yet{{else}}{{.LastProfile}}<br><small>received {{.Age}} ago{{if .Stale}} <span class="flag">STALE</span>{{end}}</small>{{end}}</td>
<td class="wide">{{if or .Open .Outlook}}<ul class="plain">{{range .Open}}<li>open: {{.}}</li>{{end}}{{range .Outlook}}<li>{{.}}</li>{{end}}</ul>{{else}}none{{end}}</td></tr>
{{else}}<tr><td colspan="8">no sites configured</td></tr>{{end}}</tbody></table></div>
<p class="sub">Δρ: bottom minus surface potential density. Profile sketches: temperature (solid) and Tmd (dashed) against depth. {{.Stale}}</p>
<h2>System</h2>
<dl class="kv"><dt>MQTT broker</dt><dd>{{if .Health.BrokerBad}}<span class="flag">{{.Health.Broker}}</span>{{else}}{{.Health.Broker}}{{end}}</dd>
<dt>spool</dt><dd>{{.Health.Spool}}</dd>
<dt>database</dt><dd>{{if .Health.DBBad}}<span class="flag">{{.Health.Database}}</span>{{else}}{{.Health.Database}}{{end}}</dd>
<dt>alert deliveries</dt><dd>{{if .Health.DeliveriesBad}}<span class="flag">{{.Health.Deliveries}}</span>{{else}}{{.Health.Deliveries}}{{end}}</dd>
{{range .Health.Extra}}<dt>{{.Key}}</dt><dd>{{.Value}}</dd>{{end}}
<dt>status page input</dt><dd>{{.Counters.Columns}} profiles, {{.Counters.Events}} events, {{.Counters.Alerts}} alert lines; refused: {{.Counters.Rejected}} rejected profiles, {{.Counters.Ignored}} out of order, {{.Counters.Dropped}} dropped</dd></dl>
<h2>Recent events</h2>
{{template "events" (eventsArgs .Events true "no events yet")}}
<h2>Alert log</h2>
{{template "alerts" .Alerts}}
{{range .Cautions}}<p class="caution">{{.}}</p>{{end}}
{{template "foot" .PageHead}}`

const siteTmpl = `{{template "head" .PageHead}}
<p class="sub"><a href="/">← all sites</a></p>
<h1>{{.Row.Name}}</h1>
<p class="sub">site id {{.Row.ID}} · maximum depth {{.MaxDepth}} · sensors {{.Expected}}</p>
{{if .IceCaution}}<p class="caution"><b>Ice.</b> {{index .Cautions 0}}</p>{{end}}
{{if .WaterNotice}}<p class="caution"><b>Intake water.</b> {{index .Cautions 1}}</p>{{end}}
<dl class="kv">
<dt>seasonal state</dt><dd>{{.Row.Seasonal}}{{if .Row.SeasonalSince}} since {{.Row.SeasonalSince}}{{end}}</dd>
<dt>this profile</dt><dd>{{.Row.State}}{{if .Reason}} — {{.Reason}}{{end}}</dd>
<dt>last profile</dt><dd>{{if .Row.NoData}}no data yet{{else}}{{.Row.LastProfile}}, received {{.Row.Age}} ago{{if .Row.Stale}} <span class="flag">STALE</span>{{end}}{{end}}</dd>
<dt>sensors in profile</dt><dd>{{.Row.SensorsUsed}} of {{.Row.SensorsExpected}}{{if ne .Missing "—"}}; missing {{.Missing}}{{end}}</dd>
{{if .Row.Rejected}}<dt>last rejected profile</dt><dd>{{.Row.Rejected}}</dd>{{end}}
<dt>open episodes</dt><dd>{{if .Row.Open}}{{range $i, $o := .Row.Open}}{{if $i}}; {{end}}{{$o}}{{end}}{{else}}none{{end}}</dd>
<dt>outlook</dt><dd>{{if .Row.Outlook}}{{range $i, $o := .Row.Outlook}}{{if $i}}; {{end}}{{$o}}{{end}}{{else}}no projection (needs steady cooling over several days){{end}}</dd>
</dl>
<h2>Latest profile</h2>
<figure>{{.Profile}}<figcaption><b>Figure 1.</b> Profile of {{.Row.LastProfile}}. (a) Temperature; Tmd is the temperature of maximum density at each sensor's pressure (Chen &amp; Millero 1986); Tf the surface freezing point. (b) Potential density ({{.Formula}}). Depth positive downward.</figcaption></figure>
<div class="wrap"><table><thead><tr><th>quantity</th><th class="num">value</th><th>unit</th><th>note</th></tr></thead><tbody>
{{range .Metrics}}<tr><td>{{.Name}}</td><td class="num">{{.Value}}</td><td>{{.Unit}}</td><td>{{.Note}}</td></tr>{{end}}</tbody></table></div>
{{if .Intakes}}<h2>Intakes</h2>
<div class="wrap"><table><thead><tr><th>intake</th><th class="num">depth</th><th class="num">temperature</th><th class="num">rate</th><th>thermal units</th></tr></thead><tbody>
{{range .Intakes}}<tr><td>{{.Name}}</td><td class="num">{{.Depth}}</td><td class="num">{{.Temp}}</td><td class="num">{{.Rate}}</td><td>{{.DegreeDays}}</td></tr>{{end}}</tbody></table></div>{{end}}
<h2>Depth–time temperature</h2>
<figure><div class="figwrap">{{.Heat}}</div><figcaption><b>Figure 2.</b> Temperature over the last {{.HeatWindow}}, interpolated linearly in depth between sensors. Letters above the panel mark events (hover for details); dash-dot lines mark intakes. Colour scale: viridis, readable in greyscale.</figcaption></figure>
<h2>Open episodes</h2>
{{template "events" (eventsArgs .Open false "none open")}}
<h2>Event timeline</h2>
{{template "events" (eventsArgs .Events false "no events yet")}}
<h2>Alert log</h2>
{{template "alerts" .Alerts}}
{{template "foot" .PageHead}}`

type eventsArgsT struct {
	Rows     []eventRow
	ShowSite bool
	Empty    string
}

func parseTemplates() (*template.Template, *template.Template) {
	fm := template.FuncMap{"eventsArgs": func(rows []eventRow, show bool, empty string) eventsArgsT {
		return eventsArgsT{rows, show, empty}
	}}
	base := template.Must(template.New("base").Funcs(fm).Parse(headTmpl))
	ov := template.Must(template.Must(base.Clone()).New("overview").Parse(overviewTmpl))
	st := template.Must(template.Must(base.Clone()).New("site").Parse(siteTmpl))
	return ov, st
}
