package alert

import (
	"fmt"
	"math"
	"sort"
	"strconv"
	"strings"
	"time"

	"holomix/detect"
)

// Message is the text of an alert for people. Summary is one line that leads
// with the fact and its time; Body explains why it matters and what to check,
// lists the measurements with their units and any projections; Cautions are the
// safety notes that must travel with the message.
type Message struct {
	Summary  string
	Body     string
	Cautions []string
}

// Text is the whole message as plain text: summary, body, cautions.
func (m Message) Text() string {
	var b strings.Builder
	b.WriteString(m.Summary)
	if m.Body != "" {
		b.WriteString("\n\n")
		b.WriteString(m.Body)
	}
	if len(m.Cautions) > 0 {
		b.WriteString("\n\nCautions:")
		for _, c := range m.Cautions {
			b.WriteString("\n- ")
			b.WriteString(c)
		}
	}
	return b.String()
}

// Safety notes. Each defers to the operator's own procedures, local codes and
// licensed practice (SCIENCE.md §6-§7).
const (
	// Fall overturn at a deep intake: Noell et al. 1978, Environ. Conserv. 5:287;
	// Horne 2019, Lake Reserv. Manage. 35:308.
	cautionTurnover = "Turnover can bring low-oxygen water carrying hydrogen sulphide, ammonia, iron and manganese to a deep intake; " +
		"hatchery fish kills have followed it (Noell et al. 1978; Horne 2019). Check water quality at the intake before relying on it. " +
		"This alert is based on water temperatures only: follow your own procedures and water tests, local codes and licensed practice."
	// Ice inferred from temperatures: SCIENCE.md §7.
	cautionIce = "Ice is inferred from water temperatures only: its thickness and strength are unknown, and no ice is guaranteed safe. " +
		"Do not go onto the ice because of this message; follow local authority guidance and local codes."
	// Frazil at intakes: Daly 1991, CRREL Cold Regions Tech. Digest 91-1.
	cautionFrazil = "Frazil ice can block intake screens and racks within hours, mostly on clear, cold nights over open water (Daly 1991). " +
		"This is a risk flag from temperatures, not an observation: follow your own intake procedures, local codes and licensed practice."
	// Any other message about water at an intake.
	cautionQuality = "Temperature alone does not show water quality: rely on your own testing and follow your own procedures, " +
		"local codes and licensed practice."
)

// kindText holds the wording of one event kind. Placeholders: {where} (site
// and subject), {when} (event time), {tmd} (Tmd from the metrics, else "about 4 °C").
type kindText struct {
	subject   string // how the subject is named, e.g. "intake %s"; "" → "%s"
	condition string // noun phrase for updates and reminders
	firing    string // first sentence: the fact and the time
	explain   string // what it is, with plain glosses of the terms
	why       string
	check     string
	resolved  string // first sentence of the resolved message
	afterNote string // what the end of the condition means
	cautions  []string
	resolvedC []string // cautions on the resolved message
}

// texts is a constant lookup table of the wording per kind (and overturn season).
var texts = map[string]kindText{
	string(detect.KindStratificationOnset): {
		condition: "summer stratification",
		firing:    "The lake at {where} has stratified since {when}: the surface water is now warmer and lighter than the water below.",
		explain: "Stratification means a warm upper layer floating on colder, denser deep water; wind no longer mixes the lake from top to bottom. " +
			"The thermocline is the boundary between the two layers.",
		why:       "The deep water is now cut off from the air. Over the summer it can lose oxygen, most of all in nutrient-rich lakes, and water drawn from a deep intake slowly changes.",
		check:     "Nothing urgent. Keep your usual water-quality schedule for any deep intake; the fall overturn is announced in its own message.",
		resolved:  "The lake at {where} is no longer stratified since {when}.",
		afterNote: "The layers that formed earlier have gone. In fall this is the overturn: see that message for what it means at an intake.",
		resolvedC: []string{cautionQuality},
	},
	string(detect.KindOverturn) + "/fall": {
		condition: "fall overturn",
		firing:    "Fall overturn at {where} since {when}: the water column has mixed from top to bottom.",
		explain: "Overturn (also called turnover) is the lake mixing through its whole depth once the surface has cooled to the temperature of the deep water. " +
			"Surface and bottom are now at nearly the same temperature and density.",
		why:       "Deep water that was cut off from the air all summer is being stirred up through the lake and can reach intakes at any depth.",
		check:     "If you draw water from this lake, check its quality at the intake now and over the next days (dissolved oxygen first; also ammonia, hydrogen sulphide smell, iron and manganese).",
		resolved:  "The fall overturn at {where} has ended since {when}: the water column is layered again.",
		afterNote: "Water quality at an intake can take days to recover after turnover; keep checking until your own tests are back to normal.",
		cautions:  []string{cautionTurnover},
		resolvedC: []string{cautionTurnover},
	},
	string(detect.KindOverturn) + "/spring": {
		condition: "spring overturn",
		firing:    "Spring overturn at {where} since {when}: the water column has mixed from top to bottom.",
		explain: "Overturn (also called turnover) is the lake mixing through its whole depth. In spring it follows the ice: the surface warms toward about 4 °C, " +
			"the temperature at which fresh water is densest, and then nothing holds the layers apart.",
		why:       "Water that lay under the ice all winter, possibly low in oxygen, is being mixed through the lake and can reach intakes at any depth.",
		check:     "If you draw water from this lake, check its quality at the intake before relying on it (dissolved oxygen first).",
		resolved:  "The spring overturn at {where} has ended since {when}: the water column is layering for summer.",
		afterNote: "Keep your usual water-quality schedule.",
		cautions:  []string{cautionTurnover},
		resolvedC: []string{cautionQuality},
	},
	string(detect.KindOverturn): {
		condition: "overturn",
		firing:    "Overturn at {where} since {when}: the water column has mixed from top to bottom.",
		explain:   "Overturn (also called turnover) is the lake mixing through its whole depth; surface and bottom are now at nearly the same temperature and density.",
		why:       "Deep water that was cut off from the air is being stirred up through the lake and can reach intakes at any depth.",
		check:     "If you draw water from this lake, check its quality at the intake before relying on it (dissolved oxygen first).",
		resolved:  "The overturn at {where} has ended since {when}: the water column is layered again.",
		afterNote: "Water quality at an intake can take days to recover after turnover; keep checking until your own tests are back to normal.",
		cautions:  []string{cautionTurnover},
		resolvedC: []string{cautionTurnover},
	},
	string(detect.KindMaxDensityReached): {
		condition: "the water column at Tmd",
		firing:    "The whole water column at {where} has cooled to {tmd}, the temperature at which this water is densest (Tmd), since {when}.",
		explain:   "For fresh water Tmd is close to 4 °C, slightly lower at depth.",
		why: "A lake must cool to about Tmd throughout before its surface can cool further and freeze. From now on, calm, clear, cold nights can form surface ice, " +
			"and frazil ice (loose ice crystals in open, stirred-up water) can form in windy cold weather.",
		check:     "Get ready for winter operation: intake screens, heaters or bubblers if you use them, and your ice procedures.",
		resolved:  "The water column at {where} is no longer uniformly at Tmd since {when}.",
		afterNote: "It has either layered under colder surface water, the usual step toward ice, or warmed again.",
		cautions:  []string{cautionIce, cautionFrazil},
		resolvedC: []string{cautionIce},
	},
	string(detect.KindInverseStratification): {
		condition: "inverse stratification",
		firing:    "Inverse stratification at {where} since {when}: the surface water is colder than the bottom water.",
		explain: "Below Tmd (the temperature at which this water is densest, about 4 °C) colder water is lighter, so water near 0 °C floats on water near 4 °C. " +
			"This is the usual winter layering, under ice or just before ice forms.",
		why:       "Ice can form quickly on the cold surface layer. A shallow intake now draws water near freezing; a deep intake draws water near 4 °C.",
		check:     "Check intake temperatures and screens, and watch for ice.",
		resolved:  "Inverse stratification at {where} has ended since {when}.",
		afterNote: "The cold surface layer has mixed away; in spring this usually means the ice has gone and the lake is warming toward 4 °C.",
		cautions:  []string{cautionIce},
		resolvedC: []string{cautionIce},
	},
	string(detect.KindIceOn): {
		condition: "likely ice cover",
		firing:    "Ice cover is likely at {where} since {when} (inferred from water temperatures, not observed).",
		explain: "The surface sensor has stayed near 0 °C above warmer water for longer than the configured hold time (how long a sign must last before it counts). " +
			"That is how the water under ice looks.",
		why: "Dates from this method differ from observers' by about a week (root-mean-square difference 7.1 days for ice-on, Pierson et al. 2011). " +
			"Shallow intakes may freeze or draw water near 0 °C.",
		check:     "Confirm by looking before acting on this message. Check shallow intakes, screens and any aeration.",
		resolved:  "The likely ice cover at {where} has ended since {when} (inferred from water temperatures, not observed).",
		afterNote: "Water temperatures no longer show the under-ice layering. Confirm by looking: ice can linger along shores and in bays.",
		cautions:  []string{cautionIce},
		resolvedC: []string{cautionIce},
	},
	string(detect.KindIceOff): {
		condition: "ice-off",
		firing:    "The ice at {where} has likely gone since {when} (inferred from water temperatures, not observed).",
		explain:   "The cold surface layer that marked ice cover has mixed away and the surface is warming.",
		why: "Dates from this method differ from observers' by about a week (root-mean-square difference 6.4 days for ice-off, Pierson et al. 2011). " +
			"Spring overturn often follows within days.",
		check:     "Confirm by looking. Ice left along shores and in bays is weak in spring.",
		resolved:  "The ice-off episode at {where} has ended since {when}.",
		afterNote: "No further ice-off messages follow for this episode.",
		cautions:  []string{cautionIce},
		resolvedC: []string{cautionIce},
	},
	string(detect.KindIntakeChange): {
		subject:   "intake %s",
		condition: "fast temperature change",
		firing:    "The water temperature at {where} has been changing fast since {when}.",
		explain:   "The temperature at the intake depth moved faster than the configured limit.",
		why: "A fast change at a fixed depth usually means different water has reached the intake: the thermocline (the boundary between warm upper and cold deep water) " +
			"moving up or down, often tilted by wind, or the lake mixing. Eggs and fish can be stressed by fast temperature changes, and deeper water may differ in quality.",
		check:     "Check the supply temperature and your tempering, and check water quality if the intake is drawing colder, deeper water.",
		resolved:  "The water temperature at {where} has been steady again since {when}.",
		afterNote: "The change rate is back within the configured limit.",
		cautions:  []string{cautionQuality},
	},
	string(detect.KindIntakeOverturnRisk): {
		subject:   "intake %s",
		condition: "overturn risk at the intake",
		firing:    "Overturn risk at {where} since {when}: the layering that kept the deep water apart is breaking down at the intake depth.",
		explain:   "Overturn (also called turnover) is the lake mixing through its whole depth as the surface cools to the temperature of the deep water.",
		why:       "Deep water that was cut off from the air all summer can reach the intake when the lake turns over.",
		check:     "Check water quality at the intake now and over the next days (dissolved oxygen first) before relying on it; have your alternative supply or treatment ready.",
		resolved:  "The overturn risk at {where} has passed since {when}.",
		afterNote: "Keep checking water quality until your own tests show it is back to normal.",
		cautions:  []string{cautionTurnover},
		resolvedC: []string{cautionTurnover},
	},
	string(detect.KindFrazilRisk): {
		subject:   "intake %s",
		condition: "frazil ice risk",
		firing:    "Frazil ice risk at {where} since {when}: open water near 0 °C under cold air.",
		explain: "Frazil ice consists of loose, needle-like ice crystals that form in open, stirred-up water cooled slightly below freezing (supercooled), mostly on clear, cold nights. " +
			"The crystals stick to metal and to each other.",
		why:       "Frazil can block intake screens and racks within hours and cut the water supply.",
		check:     "Watch intake flow and screen head loss overnight; be ready to clear screens or switch supply.",
		resolved:  "The frazil ice risk at {where} has passed since {when}.",
		afterNote: "Surface water or air is no longer cold enough for the frazil risk flag.",
		cautions:  []string{cautionFrazil},
	},
	string(detect.KindSensorFault): {
		subject:   "sensor %s",
		condition: "sensor fault",
		firing:    "No usable readings from {where} since {when}.",
		explain:   "The sensor is silent, or its readings failed quality control.",
		why:       "Detections that need this sensor are less certain, or paused, until it is fixed: do not rely on the absence of other alerts for this site meanwhile.",
		check:     "Check the buoy, the logger, the cable and the sensor's recent readings on the status page.",
		resolved:  "{where} has been reporting usable readings again since {when}.",
		afterNote: "Detections use this sensor again.",
	},
	string(detect.KindDegreeDays): {
		subject:   "intake %s",
		condition: "degree-day count",
		firing:    "Accumulated thermal units at {where} reached {atu} on {when}.",
		explain: "Accumulated thermal units (ATU, in °C·day) are the sum of daily mean water temperatures above the base since the start date; " +
			"for example, 10 days at 10 °C with base 0 °C make 100 ATU. Egg development follows them closely.",
		why:       "Development stages (eye-up, hatch, swim-up) are scheduled in ATU: rainbow trout eggs, for example, hatch near 300-310 ATU. Use your own stock's schedule.",
		check:     "Check your incubation schedule for the stage due at this count.",
		resolved:  "The degree-day episode at {where} has ended since {when}.",
		afterNote: "No further messages follow for this count.",
	},
}

// resolvedVariant is the wording of a resolved message whose Details["reason"]
// says the condition was not seen to end, keyed by kind "/" reason (a
// constant lookup table). detect resolves ice_on with reason "data gap" when
// the data stop during ice cover: the message must not say the ice has gone.
var resolvedVariant = map[string]struct{ resolved, afterNote string }{
	string(detect.KindIceOn) + "/data gap": {
		resolved: "The likely ice cover at {where} can no longer be followed because the data stopped; this does not mean that the ice has gone (noted {when}, inferred from water temperatures, not observed).",
		afterNote: "No water temperatures arrived for longer than the detector bridges, so it no longer follows this ice cover and this episode is closed. " +
			"Ice may still be there: confirm by looking, and check the buoy and its data link. If the new data show ice cover again, a new ice-on message follows.",
	},
}

// Compose writes the message for an event at a site. It is deterministic: the
// same event and site give the same text (golden-file tested). The event's
// Status selects the wording: firing, resolved, update or reminder.
func Compose(ev detect.Event, site SiteInfo) Message {
	return compose(ev, site, time.Time{})
}

// compose is Compose with the episode's onset, used by update and reminder
// messages to say since when the condition has held (zero: unknown).
func compose(ev detect.Event, site SiteInfo, onset time.Time) Message {
	kt, known := lookupText(ev)
	name := site.Name
	if name == "" {
		name = site.ID
	}
	if name == "" {
		name = ev.Site
	}
	where := name
	if ev.Subject != "" {
		f := kt.subject
		if f == "" {
			f = "%s"
		}
		where = name + " (" + fmt.Sprintf(f, ev.Subject) + ")"
	}
	when := formatTime(ev.Time, site.Location)
	rep := strings.NewReplacer("{where}", where, "{when}", when, "{tmd}", tmdPhrase(ev.Metrics), "{atu}", atuPhrase(ev))
	if !known {
		kt = kindText{
			condition: humanise(string(ev.Kind)),
			firing:    "{where}: " + humanise(string(ev.Kind)) + " since {when}.",
			resolved:  "{where}: " + humanise(string(ev.Kind)) + " has ended since {when}.",
		}
	}

	var m Message
	var paras []string
	since := ""
	if !onset.IsZero() {
		since = ", since " + formatTime(onset, site.Location)
	}
	switch ev.Status {
	case detect.StatusResolved:
		resolved, afterNote := kt.resolved, kt.afterNote
		if v, ok := resolvedVariant[string(ev.Kind)+"/"+ev.Details["reason"]]; ok {
			resolved, afterNote = v.resolved, v.afterNote
		}
		first := rep.Replace(resolved)
		if !strings.HasPrefix(resolved, "{where}") { // a site name keeps its capital
			first = strings.ToLower(first[:1]) + first[1:]
		}
		m.Summary = "Resolved: " + first
		paras = append(paras, rep.Replace(afterNote))
		m.Cautions = kt.resolvedC
	case detect.StatusUpdate:
		m.Summary = fmt.Sprintf("Update, %s: %s continues%s; new figures as of %s.", where, kt.condition, since, when)
		paras = append(paras, rep.Replace(kt.explain), why(rep.Replace(kt.why)), check(rep.Replace(kt.check)))
		m.Cautions = kt.cautions
	case StatusReminder:
		m.Summary = fmt.Sprintf("Reminder, %s: %s continues%s; latest data %s.", where, kt.condition, since, when)
		paras = append(paras, rep.Replace(kt.explain), why(rep.Replace(kt.why)), check(rep.Replace(kt.check)))
		m.Cautions = kt.cautions
	default: // firing
		m.Summary = rep.Replace(kt.firing)
		paras = append(paras, rep.Replace(kt.explain), why(rep.Replace(kt.why)), check(rep.Replace(kt.check)))
		m.Cautions = kt.cautions
	}
	if ev.Summary != "" {
		paras = append(paras, "Detector note: "+ev.Summary)
	}
	if s := stateLine(ev); s != "" {
		paras = append(paras, s)
	}
	if s := metricsBlock(ev.Metrics); s != "" {
		paras = append(paras, s)
	}
	if ev.Status != detect.StatusResolved { // an outlook means nothing once the condition has ended
		if s := projectionsBlock(ev.Projections, ev.Time, site.Location); s != "" {
			paras = append(paras, s)
		}
	}
	if s := detailsBlock(ev.Details); s != "" {
		paras = append(paras, s)
	}
	if ev.Confidence != "" {
		paras = append(paras, "Confidence: "+ev.Confidence+".")
	}
	var kept []string
	for _, p := range paras {
		if strings.TrimSpace(p) != "" {
			kept = append(kept, p)
		}
	}
	m.Body = strings.Join(kept, "\n\n")
	m.Cautions = append([]string(nil), m.Cautions...)
	return m
}

func why(s string) string {
	if s == "" {
		return ""
	}
	return "Why it matters: " + s
}

func check(s string) string {
	if s == "" {
		return ""
	}
	return "What to check: " + s
}

func lookupText(ev detect.Event) (kindText, bool) {
	if ev.Kind == detect.KindOverturn && ev.Season != "" {
		if kt, ok := texts[string(ev.Kind)+"/"+strings.ToLower(ev.Season)]; ok {
			return kt, true
		}
	}
	kt, ok := texts[string(ev.Kind)]
	return kt, ok
}

// formatTime prints a time as "3 Nov 2025 06:40 UTC", with the site's local
// time first when a zone other than UTC is known.
func formatTime(t time.Time, loc *time.Location) string {
	u := t.UTC()
	utc := u.Format("2 Jan 2006 15:04") + " UTC"
	if loc == nil || loc == time.UTC {
		return utc
	}
	l := t.In(loc)
	if l.Format("2006-01-02 15:04") == u.Format("2006-01-02 15:04") {
		return utc
	}
	local := l.Format("2 Jan 2006 15:04 MST")
	if l.Format("2006-01-02") == u.Format("2006-01-02") {
		return local + " (" + u.Format("15:04") + " UTC)"
	}
	return local + " (" + utc + ")"
}

func formatDate(t time.Time, loc *time.Location) string {
	if loc != nil {
		t = t.In(loc)
	} else {
		t = t.UTC()
	}
	return t.Format("2 Jan 2006")
}

// tmdPhrase gives Tmd from the metrics, else the fresh-water value in words.
func tmdPhrase(ms []detect.Metric) string {
	for _, m := range ms {
		switch m.Name {
		case "tmd_c", "tmd", "bottom_tmd_c", "tmd_bottom_c":
			return formatValue(m.Value) + " " + prettyUnit(m.Unit)
		}
	}
	return "about 4 °C"
}

// atuPhrase gives the degree-day count with unit and base for degree_days events.
func atuPhrase(ev detect.Event) string {
	val := ""
	for _, m := range ev.Metrics {
		u := prettyUnit(m.Unit)
		if strings.Contains(u, "day") || m.Name == "atu" || m.Name == "degree_days" {
			val = formatValue(m.Value) + " " + u
			break
		}
	}
	if val == "" {
		val = "the configured threshold"
	}
	base := ""
	for _, k := range []string{"base_c", "base", "base_temp_c"} {
		if v, ok := ev.Details[k]; ok && v != "" {
			base = v
			break
		}
	}
	if base == "" {
		for _, m := range ev.Metrics {
			if m.Name == "base_c" || m.Name == "base_temp_c" {
				base = formatValue(m.Value)
			}
		}
	}
	if base == "" {
		return val + " (base temperature not given by the detector)"
	}
	base = strings.TrimSuffix(strings.TrimSpace(base), "°C")
	base = strings.TrimSpace(strings.TrimSuffix(base, "C"))
	return val + " (base " + base + " °C)"
}

func stateLine(ev detect.Event) string {
	if ev.From == "" && ev.To == "" {
		return ""
	}
	from, to := ev.From, ev.To
	if from == "" {
		from = "unknown"
	}
	if to == "" {
		to = "unknown"
	}
	return "Column state: " + humanise(from) + " → " + humanise(to) + "."
}

// metricGloss names known metrics in plain words (a constant lookup table).
var metricGloss = map[string]string{
	"surface_temp_c":        "surface water temperature",
	"surface_temp":          "surface water temperature",
	"bottom_temp_c":         "bottom water temperature",
	"bottom_temp":           "bottom water temperature",
	"mean_temp_c":           "mean temperature of the whole column",
	"intake_temp_c":         "water temperature at the intake",
	"air_temp_c":            "air temperature",
	"tmd_c":                 "Tmd, the temperature at which this water is densest",
	"tmd":                   "Tmd, the temperature at which this water is densest",
	"bottom_tmd_c":          "Tmd at the bottom, the temperature at which the bottom water is densest",
	"freezing_point_c":      "freezing point at the surface",
	"density_diff_kg_m3":    "density difference, bottom minus surface (how strongly the layers resist mixing)",
	"density_diff":          "density difference, bottom minus surface (how strongly the layers resist mixing)",
	"top_bottom_diff_c":     "temperature difference, top minus bottom",
	"delta_t_c":             "temperature difference, top minus bottom",
	"schmidt_stability":     "Schmidt stability, the energy needed to mix the column completely",
	"schmidt_j_m2":          "Schmidt stability, the energy needed to mix the column completely",
	"thermocline_m":         "thermocline depth, the boundary between the warm upper and the cold deep layer",
	"thermocline_depth_m":   "thermocline depth, the boundary between the warm upper and the cold deep layer",
	"heat_to_tmd_j_m2":      "heat the column must still lose to reach Tmd",
	"max_n2_s2":             "N², the stability of the sharpest layer (buoyancy frequency squared)",
	"n2_s2":                 "N², the stability of the layer (buoyancy frequency squared)",
	"rate_c_per_h":          "rate of temperature change",
	"change_rate_c_per_h":   "rate of temperature change",
	"intake_depth_m":        "intake depth",
	"sensor_depth_m":        "sensor depth",
	"depth_m":               "depth",
	"silent_h":              "time without usable readings",
	"gap_h":                 "time without usable readings",
	"gap_days":              "time without data",
	"max_gap_days":          "longest silence the detector bridges",
	"atu":                   "accumulated thermal units (ATU)",
	"degree_days":           "accumulated thermal units (ATU)",
	"threshold_c_day":       "threshold",
	"base_c":                "base temperature",
	"days_since_start":      "days since the start date",
	"ice_days":              "days of likely ice cover",
	"surface_freezing_days": "days until the surface may reach freezing",
}

// humanise turns a snake_case name into words.
func humanise(s string) string {
	return strings.ReplaceAll(s, "_", " ")
}

func metricLabel(name string) string {
	if g, ok := metricGloss[name]; ok {
		return g
	}
	return humanise(name)
}

// prettyUnit prints a unit the way people read it. An empty unit is shown as
// "(no unit)" so every number carries one.
func prettyUnit(u string) string {
	switch strings.TrimSpace(u) {
	case "":
		return "(no unit)"
	case "C", "degC", "°C", "celsius":
		return "°C"
	case "C/h", "degC/h", "°C/h":
		return "°C/h"
	case "J/m2", "J m-2", "J/m^2":
		return "J/m²"
	case "kg/m3", "kg m-3", "kg/m^3":
		return "kg/m³"
	case "kg/m3/m", "kg/m4", "kg m-3 m-1":
		return "kg/m³ per m"
	case "s-2", "1/s2", "s^-2":
		return "s⁻²"
	case "C*day", "C·day", "degC*day", "degC.day", "°C·day", "°C*day", "C.day", "degree_day", "degC_day", "C_day":
		return "°C·day"
	case "g/kg":
		return "g/kg"
	}
	return u
}

// formatValue prints a number with sensible precision and no trailing zeros:
// one decimal from 100, two from 1, three significant digits below 1, and
// digits grouped by thousands from 10 000 ("3 200 000").
func formatValue(v float64) string {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return "not available"
	}
	a := math.Abs(v)
	var s string
	switch {
	case a == 0:
		return "0"
	case a >= 10000:
		return groupThousands(strconv.FormatFloat(math.Round(v), 'f', 0, 64))
	case a >= 100:
		s = strconv.FormatFloat(v, 'f', 1, 64)
	case a >= 1:
		s = strconv.FormatFloat(v, 'f', 2, 64)
	default:
		// three significant digits, without an exponent
		digits := 2 - int(math.Floor(math.Log10(a)))
		s = strconv.FormatFloat(v, 'f', digits, 64)
	}
	if strings.Contains(s, ".") {
		s = strings.TrimRight(strings.TrimRight(s, "0"), ".")
	}
	if s == "-0" {
		s = "0"
	}
	return s
}

func groupThousands(s string) string {
	neg := strings.HasPrefix(s, "-")
	s = strings.TrimPrefix(s, "-")
	var b strings.Builder
	for i, r := range s {
		if i > 0 && (len(s)-i)%3 == 0 {
			b.WriteByte(' ')
		}
		b.WriteRune(r)
	}
	if neg {
		return "-" + b.String()
	}
	return b.String()
}

func metricsBlock(ms []detect.Metric) string {
	if len(ms) == 0 {
		return ""
	}
	var b strings.Builder
	b.WriteString("Measurements:")
	for _, m := range ms {
		fmt.Fprintf(&b, "\n- %s: %s %s", metricLabel(m.Name), formatValue(m.Value), prettyUnit(m.Unit))
	}
	return b.String()
}

// projectionGloss names known projections.
var projectionGloss = map[string]string{
	"days_to_tmd":              "The whole column reaches Tmd (about 4 °C, when surface ice becomes possible)",
	"days_to_surface_freezing": "The surface reaches freezing",
	"days_to_overturn":         "Overturn reaches the bottom",
	"days_to_threshold":        "The next degree-day threshold is reached",
}

func projectionsBlock(ps []detect.Projection, from time.Time, loc *time.Location) string {
	if len(ps) == 0 {
		return ""
	}
	var b strings.Builder
	b.WriteString("Outlook (if the recent steady trend continues; weather can change it):")
	for _, p := range ps {
		label, ok := projectionGloss[p.Name]
		if !ok {
			label = humanise(p.Name)
			if label == "" {
				label = "projection"
			}
			label = strings.ToUpper(label[:1]) + label[1:]
		}
		lo, hi := p.LowDays, p.HighDays
		if hi < lo {
			lo, hi = hi, lo
		}
		var rng string
		d1 := formatDate(from.Add(daysDur(lo)), loc)
		d2 := formatDate(from.Add(daysDur(hi)), loc)
		switch {
		case math.IsNaN(lo) || math.IsNaN(hi):
			rng = "no estimate"
		case formatDays(lo) == formatDays(hi):
			rng = fmt.Sprintf("in about %s days (about %s)", formatDays(lo), d1)
		default:
			rng = fmt.Sprintf("in %s to %s days (between %s and %s)", formatDays(lo), formatDays(hi), d1, d2)
		}
		fmt.Fprintf(&b, "\n- %s %s", label, rng)
		if p.Method != "" {
			fmt.Fprintf(&b, "; method: %s", p.Method)
		}
		b.WriteString(".")
	}
	return b.String()
}

func daysDur(d float64) time.Duration {
	if math.IsNaN(d) || math.IsInf(d, 0) {
		return 0
	}
	return time.Duration(d * float64(24*time.Hour))
}

func formatDays(d float64) string {
	s := strconv.FormatFloat(d, 'f', 1, 64)
	return strings.TrimSuffix(s, ".0")
}

// detailLabel turns a detail key into words, with a unit suffix shown as a unit.
func detailLabel(k string) string {
	for _, su := range [][2]string{{"_c_per_h", "°C/h"}, {"_c_day", "°C·day"}, {"_c", "°C"}, {"_m", "m"}, {"_h", "h"}} {
		if base, ok := strings.CutSuffix(k, su[0]); ok && base != "" {
			return humanise(base) + " (" + su[1] + ")"
		}
	}
	return humanise(k)
}

func detailsBlock(d map[string]string) string {
	if len(d) == 0 {
		return ""
	}
	keys := make([]string, 0, len(d))
	for k := range d {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	var b strings.Builder
	b.WriteString("Details:")
	for _, k := range keys {
		fmt.Fprintf(&b, "\n- %s: %s", detailLabel(k), d[k])
	}
	return b.String()
}
