package status

import (
	"bytes"
	"encoding/json"
	"html/template"
	"log/slog"
	"math"
	"net/http"
	"sort"
	"strconv"
	"time"

	"holomix/detect"
	"holomix/detect/water"
)

// Options tune the status page.
type Options struct {
	Title string // page title; "" means "holomix — lake water columns"
	// Refresh is the meta-refresh interval; 0 means 60 s, negative turns it off.
	Refresh time.Duration
	// StaleAfter marks a site stale when its last profile arrived longer ago
	// than this (wall time); 0 means 30 min.
	StaleAfter time.Duration
	Logger     *slog.Logger // nil: slog.Default()
}

func (o Options) withDefaults() Options {
	if o.Title == "" {
		o.Title = "holomix — lake water columns"
	}
	if o.Refresh == 0 {
		o.Refresh = 60 * time.Second
	}
	if o.StaleAfter <= 0 {
		o.StaleAfter = 30 * time.Minute
	}
	if o.Logger == nil {
		o.Logger = slog.Default()
	}
	return o
}

type handler struct {
	store    *Store
	health   func() Health
	opts     Options
	overview *template.Template
	site     *template.Template
}

// Handler serves the status page and its JSON API (GET and HEAD only; other
// methods get 405 with an Allow header):
//
//	/                         overview of all sites and of the daemon's health
//	/sites/{id}               one site: profile, heat map, events, alert log
//	/api/sites                JSON list of site summaries
//	/api/sites/{id}           JSON detail: latest profile, column metrics, projections, open episodes
//	/api/sites/{id}/events    JSON list of the site's recent events (oldest first)
//
// health may be nil (the health section then shows nothing known).
func Handler(s *Store, health func() Health, opts Options) http.Handler {
	h := &handler{store: s, health: health, opts: opts.withDefaults()}
	h.overview, h.site = parseTemplates()
	mux := http.NewServeMux()
	mux.HandleFunc("GET /{$}", h.serveOverview)
	mux.HandleFunc("GET /sites/{id}", h.serveSite)
	mux.HandleFunc("GET /api/sites", h.serveAPISites)
	mux.HandleFunc("GET /api/sites/{id}", h.serveAPISite)
	mux.HandleFunc("GET /api/sites/{id}/events", h.serveAPIEvents)
	return secure(mux)
}

// secure adds headers that forbid scripts, framing and remote loads.
func secure(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		hd := w.Header()
		hd.Set("Content-Security-Policy", "default-src 'none'; style-src 'unsafe-inline'; img-src data:; base-uri 'none'; form-action 'none'; frame-ancestors 'none'")
		hd.Set("X-Content-Type-Options", "nosniff")
		hd.Set("Referrer-Policy", "no-referrer")
		hd.Set("X-Frame-Options", "DENY")
		hd.Set("Cache-Control", "no-store")
		next.ServeHTTP(w, r)
	})
}

func (h *handler) getHealth() (Health, bool) {
	if h.health == nil {
		return Health{}, false
	}
	return h.health(), true
}

func (h *handler) head(now time.Time) PageHead {
	ph := PageHead{Title: h.opts.Title, Generated: now.UTC().Format("2006-01-02 15:04:05 UTC")}
	if h.opts.Refresh > 0 {
		ph.Refresh = int(math.Max(1, math.Round(h.opts.Refresh.Seconds())))
	}
	return ph
}

func (h *handler) render(w http.ResponseWriter, r *http.Request, t *template.Template, data any) {
	var buf bytes.Buffer
	if err := t.Execute(&buf, data); err != nil {
		h.opts.Logger.Error("status page render failed", "path", r.URL.Path, "err", err)
		http.Error(w, "internal error while rendering the page", http.StatusInternalServerError)
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	writeBody(w, r, buf.Bytes())
}

func (h *handler) serveOverview(w http.ResponseWriter, r *http.Request) {
	views, alerts, counters, now := h.store.snapshot()
	page := overviewPage{PageHead: h.head(now), Counters: counters, Cautions: []string{iceCaution, waterCaution}}
	names := map[string]string{}
	var events []detect.Event
	for _, v := range views {
		page.Sites = append(page.Sites, makeRow(v, now, h.opts.StaleAfter))
		names[v.Meta.ID] = v.Meta.Name
		events = append(events, v.Events...)
	}
	sort.SliceStable(events, func(i, j int) bool { return events[i].Time.After(events[j].Time) })
	for i, e := range events {
		if i == 20 {
			break
		}
		page.Events = append(page.Events, makeEventRow(e, names[e.Site]))
	}
	for i := len(alerts) - 1; i >= 0 && len(page.Alerts) < 20; i-- {
		page.Alerts = append(page.Alerts, makeAlertRow(alerts[i]))
	}
	if hl, ok := h.getHealth(); ok {
		page.Health = makeHealth(hl)
	} else {
		page.Health = healthView{Broker: "not reported", Spool: "not reported", Database: "not reported", Deliveries: "not reported"}
	}
	page.Stale = "A site is marked STALE when no profile has arrived for " + fmtAge(h.opts.StaleAfter) + "."
	h.render(w, r, h.overview, page)
}

func (h *handler) serveSite(w http.ResponseWriter, r *http.Request) {
	id := r.PathValue("id")
	v, alerts, now, ok := h.store.siteSnapshot(id)
	if !ok {
		http.Error(w, "unknown site", http.StatusNotFound)
		return
	}
	heat, err := heatFigure(v, h.store.HistoryWindow())
	if err != nil {
		h.opts.Logger.Error("status heat map failed", "site", id, "err", err)
		http.Error(w, "internal error while drawing the heat map", http.StatusInternalServerError)
		return
	}
	page := sitePage{
		PageHead:   h.head(now),
		Row:        makeRow(v, now, h.opts.StaleAfter),
		MaxDepth:   fmtNum(v.MaxDepth, 1) + " m",
		Expected:   joinDepths(v.Meta.Depths),
		Missing:    joinDepths(v.Col.Missing),
		Reason:     v.Col.Reason,
		Profile:    profileFigure(v),
		Heat:       heat,
		HeatWindow: fmtSpan(h.store.HistoryWindow()),
		Metrics:    makeMetrics(v.Col.Metrics),
		Formula:    string(v.Col.Metrics.Formula),
		Intakes:    makeIntakes(v),
		Cautions:   []string{iceCaution, waterCaution},
	}
	page.PageHead.Title = v.Meta.Name + " — " + h.opts.Title
	if page.Formula == "" {
		page.Formula = "no profile yet"
	}
	for _, e := range v.Open {
		page.Open = append(page.Open, makeEventRow(e, v.Meta.Name))
		if e.Kind == detect.KindIntakeOverturnRisk || e.Kind == detect.KindIntakeChange {
			page.WaterNotice = true
		}
		if e.Kind == detect.KindFrazilRisk {
			page.IceCaution = true
		}
	}
	for i := len(v.Events) - 1; i >= 0; i-- {
		e := v.Events[i]
		page.Events = append(page.Events, makeEventRow(e, v.Meta.Name))
		switch e.Kind {
		case detect.KindIceOn, detect.KindIceOff:
			page.IceCaution = true
		case detect.KindOverturn:
			if len(v.Meta.Intakes) > 0 {
				page.WaterNotice = true
			}
		}
	}
	if page.Row.Ice {
		page.IceCaution = true
	}
	for i := len(alerts) - 1; i >= 0; i-- {
		page.Alerts = append(page.Alerts, makeAlertRow(alerts[i]))
	}
	h.render(w, r, h.site, page)
}

// writeBody sends b with its length; a HEAD request gets the headers only.
func writeBody(w http.ResponseWriter, r *http.Request, b []byte) {
	w.Header().Set("Content-Length", strconv.Itoa(len(b)))
	if r.Method == http.MethodHead {
		return
	}
	_, _ = w.Write(b)
}

// JSON API.

// jfloat marshals NaN and ±Inf as null.
type jfloat float64

func (f jfloat) MarshalJSON() ([]byte, error) {
	x := float64(f)
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return []byte("null"), nil
	}
	return json.Marshal(x)
}

func jfloats(xs []float64) []jfloat {
	out := make([]jfloat, len(xs))
	for i, x := range xs {
		out[i] = jfloat(x)
	}
	return out
}

type apiProjection struct {
	Name     string `json:"name"`
	LowDays  jfloat `json:"low_days"`
	HighDays jfloat `json:"high_days"`
	Method   string `json:"method"`
	Text     string `json:"text"`
}

func apiProjections(ps []detect.Projection) []apiProjection {
	out := make([]apiProjection, 0, len(ps))
	for _, p := range ps {
		out = append(out, apiProjection{p.Name, jfloat(p.LowDays), jfloat(p.HighDays), p.Method, projectionText(p)})
	}
	return out
}

type apiMetric struct {
	Name  string `json:"name"`
	Value jfloat `json:"value"`
	Unit  string `json:"unit"`
}

type apiEvent struct {
	Time        time.Time         `json:"time"`
	Site        string            `json:"site"`
	Kind        detect.Kind       `json:"kind"`
	Status      detect.Status     `json:"status"`
	Severity    string            `json:"severity"`
	Subject     string            `json:"subject,omitempty"`
	From        string            `json:"from,omitempty"`
	To          string            `json:"to,omitempty"`
	Season      string            `json:"season,omitempty"`
	Summary     string            `json:"summary"`
	Confidence  string            `json:"confidence"`
	Metrics     []apiMetric       `json:"metrics"`
	Projections []apiProjection   `json:"projections,omitempty"`
	Details     map[string]string `json:"details,omitempty"`
}

func toAPIEvent(e detect.Event) apiEvent {
	a := apiEvent{Time: e.Time, Site: e.Site, Kind: e.Kind, Status: e.Status, Severity: e.Severity, Subject: e.Subject,
		From: e.From, To: e.To, Season: e.Season, Summary: e.Summary, Confidence: e.Confidence, Details: e.Details,
		Metrics: make([]apiMetric, 0, len(e.Metrics))}
	for _, m := range e.Metrics {
		a.Metrics = append(a.Metrics, apiMetric{m.Name, jfloat(m.Value), m.Unit})
	}
	if len(e.Projections) > 0 {
		a.Projections = apiProjections(e.Projections)
	}
	return a
}

type apiSiteSummary struct {
	ID              string          `json:"id"`
	Name            string          `json:"name"`
	MaxDepthM       jfloat          `json:"max_depth_m"`
	Seasonal        string          `json:"seasonal_state"`
	SeasonalSince   *time.Time      `json:"seasonal_since"`
	State           water.State     `json:"state"`
	IceInferred     bool            `json:"ice_inferred"`
	LastProfile     *time.Time      `json:"last_profile_time"`
	Received        *time.Time      `json:"received_at"`
	AgeSeconds      *float64        `json:"age_seconds"`
	Stale           bool            `json:"stale"`
	SurfaceTempC    *jfloat         `json:"surface_temp_c"`
	BottomTempC     *jfloat         `json:"bottom_temp_c"`
	OpenEpisodes    int             `json:"open_episodes"`
	Projections     []apiProjection `json:"projections"`
	SensorsUsed     int             `json:"sensors_used"`
	SensorsExpected int             `json:"sensors_expected"`
}

func tp(t time.Time) *time.Time {
	if t.IsZero() {
		return nil
	}
	u := t.UTC()
	return &u
}

func (h *handler) summary(v siteView, now time.Time) apiSiteSummary {
	s := apiSiteSummary{ID: v.Meta.ID, Name: v.Meta.Name, MaxDepthM: jfloat(v.MaxDepth), Seasonal: v.Seasonal,
		SeasonalSince: tp(v.SeasonalSince), OpenEpisodes: len(v.Open), Projections: []apiProjection{}}
	if s.Seasonal == "" {
		s.Seasonal = detect.SeasonUnknown
	}
	if !v.Has {
		s.State = water.StateUnknown
		return s
	}
	m := v.Col.Metrics
	st, bt := jfloat(m.SurfaceTempC), jfloat(m.BottomTempC)
	age := now.Sub(v.Received).Seconds()
	s.State, s.IceInferred = v.Col.State, v.Col.IceInferred
	s.LastProfile, s.Received, s.AgeSeconds = tp(v.Col.Time), tp(v.Received), &age
	s.Stale = now.Sub(v.Received) > h.opts.StaleAfter
	s.SurfaceTempC, s.BottomTempC = &st, &bt
	s.Projections = apiProjections(v.Col.Projections)
	s.SensorsUsed, s.SensorsExpected = v.Col.SensorsUsed, v.Col.SensorsExpected
	return s
}

func (h *handler) writeJSON(w http.ResponseWriter, r *http.Request, v any) {
	b, err := json.MarshalIndent(v, "", "  ")
	if err != nil {
		h.opts.Logger.Error("status JSON encoding failed", "path", r.URL.Path, "err", err)
		http.Error(w, "internal error while encoding JSON", http.StatusInternalServerError)
		return
	}
	w.Header().Set("Content-Type", "application/json")
	writeBody(w, r, append(b, '\n'))
}

func (h *handler) serveAPISites(w http.ResponseWriter, r *http.Request) {
	views, _, _, now := h.store.snapshot()
	out := make([]apiSiteSummary, 0, len(views))
	for _, v := range views {
		out = append(out, h.summary(v, now))
	}
	h.writeJSON(w, r, out)
}

type apiIntake struct {
	Name            string  `json:"name"`
	DepthM          float64 `json:"depth_m"`
	TempC           *jfloat `json:"temp_c"`
	RateCPerH       *jfloat `json:"rate_c_per_h"`
	DegreeDays      *jfloat `json:"degree_days"`
	DegreeDaysBaseC *jfloat `json:"degree_days_base_c,omitempty"`
}

type apiProfile struct {
	Time    time.Time `json:"time"`
	DepthsM []jfloat  `json:"depths_m"`
	TempsC  []jfloat  `json:"temps_c"`
}

type apiColumn struct {
	State           water.State   `json:"state"`
	Reason          string        `json:"reason"`
	Seasonal        string        `json:"seasonal_state"`
	IceInferred     bool          `json:"ice_inferred"`
	SensorsUsed     int           `json:"sensors_used"`
	SensorsExpected int           `json:"sensors_expected"`
	MissingM        []jfloat      `json:"missing_depths_m"`
	Metrics         water.Metrics `json:"metrics"`
}

type apiSiteDetail struct {
	apiSiteSummary
	SensorDepthsM []float64     `json:"sensor_depths_m"`
	Intakes       []apiIntake   `json:"intakes"`
	Profile       *apiProfile   `json:"profile"`
	Column        *apiColumn    `json:"column"`
	Open          []apiEvent    `json:"open_episodes_detail"`
	LastRejected  *apiRejection `json:"last_rejected,omitempty"`
	History       apiHistory    `json:"history"`
	Cautions      []string      `json:"cautions"`
}

type apiRejection struct {
	Time   time.Time `json:"time"`
	Reason string    `json:"reason"`
}

type apiHistory struct {
	Profiles int        `json:"profiles"`
	From     *time.Time `json:"from"`
	To       *time.Time `json:"to"`
}

func (h *handler) serveAPISite(w http.ResponseWriter, r *http.Request) {
	v, _, now, ok := h.store.siteSnapshot(r.PathValue("id"))
	if !ok {
		h.notFoundJSON(w)
		return
	}
	d := apiSiteDetail{apiSiteSummary: h.summary(v, now), SensorDepthsM: v.Meta.Depths, Intakes: []apiIntake{},
		Open: []apiEvent{}, Cautions: []string{iceCaution, waterCaution}}
	if d.SensorDepthsM == nil {
		d.SensorDepthsM = []float64{}
	}
	status := map[string]detect.IntakeStatus{}
	for _, is := range v.Col.Intakes {
		status[is.Name] = is
	}
	for _, in := range v.Meta.Intakes {
		ai := apiIntake{Name: in.Name, DepthM: in.Depth}
		if is, ok := status[in.Name]; ok {
			if is.TempOK {
				x := jfloat(is.TempC)
				ai.TempC = &x
			}
			if is.RateOK {
				x := jfloat(is.RateCPerH)
				ai.RateCPerH = &x
			}
			if is.HasDegreeDays {
				x, b := jfloat(is.DegreeDays), jfloat(is.DegreeDaysBaseC)
				ai.DegreeDays, ai.DegreeDaysBaseC = &x, &b
			}
		}
		d.Intakes = append(d.Intakes, ai)
	}
	if v.Has {
		d.Profile = &apiProfile{Time: v.Prof.Time.UTC(), DepthsM: jfloats(v.Prof.Depths), TempsC: jfloats(v.Prof.Temps)}
		if d.Profile.Time.IsZero() {
			d.Profile.Time = v.Col.Time.UTC()
		}
		d.Column = &apiColumn{State: v.Col.State, Reason: v.Col.Reason, Seasonal: v.Col.Seasonal, IceInferred: v.Col.IceInferred,
			SensorsUsed: v.Col.SensorsUsed, SensorsExpected: v.Col.SensorsExpected, MissingM: jfloats(v.Col.Missing), Metrics: v.Col.Metrics}
	}
	for _, e := range v.Open {
		d.Open = append(d.Open, toAPIEvent(e))
	}
	if v.RejReason != "" {
		d.LastRejected = &apiRejection{Time: v.RejTime, Reason: v.RejReason}
	}
	d.History.Profiles = len(v.Hist)
	if len(v.Hist) > 0 {
		d.History.From, d.History.To = tp(v.Hist[0].t), tp(v.Hist[len(v.Hist)-1].t)
	}
	h.writeJSON(w, r, d)
}

func (h *handler) serveAPIEvents(w http.ResponseWriter, r *http.Request) {
	v, _, _, ok := h.store.siteSnapshot(r.PathValue("id"))
	if !ok {
		h.notFoundJSON(w)
		return
	}
	out := make([]apiEvent, 0, len(v.Events))
	for _, e := range v.Events {
		out = append(out, toAPIEvent(e))
	}
	h.writeJSON(w, r, out)
}

func (h *handler) notFoundJSON(w http.ResponseWriter) {
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(http.StatusNotFound)
	_, _ = w.Write([]byte(`{"error":"unknown site"}` + "\n"))
}
