package status

import (
	"encoding/json"
	"io"
	"net/http"
	"net/http/httptest"
	"regexp"
	"strings"
	"sync"
	"testing"
	"time"

	"holomix/config"
	"holomix/detect"
	"holomix/detect/water"
)

var t0 = time.Date(2025, time.November, 1, 0, 0, 0, 0, time.UTC)

// column builds a detect.Column for a profile with the project's own physics.
func column(t *testing.T, site string, at time.Time, depths, temps []float64, seasonal string) (detect.Column, detect.Profile) {
	t.Helper()
	var m water.Metrics
	wc := water.Column{Depths: depths, Temps: temps, MaxDepth: depths[len(depths)-1] + 1}
	if err := water.Compute(wc, &m); err != nil {
		t.Fatalf("compute: %v", err)
	}
	state, reason := water.Classify(wc, &m, water.DefaultThresholds())
	c := detect.Column{Site: site, Time: at, State: state, Reason: reason, Seasonal: seasonal, Metrics: m,
		SensorsUsed: len(depths), SensorsExpected: len(depths)}
	return c, detect.Profile{Site: site, Time: at, Depths: depths, Temps: temps}
}

func testStore(t *testing.T, name string) *Store {
	t.Helper()
	st := NewStore([]SiteMeta{
		{ID: "res", Name: name, MaxDepth: 20, Depths: []float64{1, 5, 10, 15, 19},
			Intakes: []config.Intake{{Name: "hatchery", Depth: 15}}},
		{ID: "pond", Name: "Test Pond", MaxDepth: 3, Depths: []float64{0.5, 1.5, 2.5}},
	}, 3)
	st.SetClock(func() time.Time { return t0.Add(36*time.Hour + time.Minute) })
	return st
}

// feed adds 36 hours of 10-minute profiles of a cooling stratified column.
func feed(t *testing.T, st *Store) {
	t.Helper()
	for i := 0; i <= 36*6; i++ {
		at := t0.Add(time.Duration(i) * 10 * time.Minute)
		f := float64(i) / 216
		c, p := column(t, "res", at, []float64{1, 5, 10, 15, 19}, []float64{14 - 4*f, 13.5 - 4*f, 9, 7, 6.5}, detect.SeasonStratified)
		if i == 36*6 {
			c.Projections = []detect.Projection{{Name: "days_to_tmd", LowDays: 4.2, HighDays: 6.8, Method: "linear fit of the mean temperature over 5 days"}}
			c.Intakes = []detect.IntakeStatus{{Name: "hatchery", DepthM: 15, TempC: 7, TempOK: true, RateCPerH: -0.01, RateOK: true}}
		}
		st.ObserveColumn(c, p)
	}
	st.ObserveEvent(detect.Event{Time: t0.Add(20 * time.Hour), Site: "res", Kind: detect.KindIntakeOverturnRisk, Status: detect.StatusFiring,
		Severity: "warning", Subject: "hatchery", Summary: "intake risk", Metrics: []detect.Metric{{Name: "thermocline_m", Value: nanValue(), Unit: "m"}}})
	st.ObserveEvent(detect.Event{Time: t0.Add(30 * time.Hour), Site: "res", Kind: detect.KindOverturn, Status: detect.StatusFiring,
		Severity: "warning", Subject: "column", Summary: "fall overturn"})
	st.ObserveAlert(AlertLine{Time: t0.Add(30 * time.Hour), Site: "res", Kind: "overturn", Status: "firing", Receiver: "ops", Summary: "fall overturn", Delivered: true})
	st.ObserveAlert(AlertLine{Time: t0.Add(31 * time.Hour), Site: "res", Kind: "overturn", Status: "firing", Receiver: "lab", Summary: "fall overturn", Error: "HTTP 503"})
}

func nanValue() float64 { var z float64; return z / z }

func serve(t *testing.T, h http.Handler, method, path string) (*http.Response, string) {
	t.Helper()
	rec := httptest.NewRecorder()
	h.ServeHTTP(rec, httptest.NewRequest(method, path, nil))
	res := rec.Result()
	b, err := io.ReadAll(res.Body)
	if err != nil {
		t.Fatal(err)
	}
	return res, string(b)
}

func health() Health {
	return Health{BrokerConnected: true, SpoolDepth: 12, SpoolOldest: 3 * time.Second, DBReachable: false, PendingDeliveries: 2, FailedDeliveries: 1,
		Extra: map[string]string{"version": "test"}}
}

func TestRoutes_HTML(t *testing.T) {
	st := testStore(t, "Test Reservoir")
	feed(t, st)
	h := Handler(st, health, Options{})
	res, body := serve(t, h, "GET", "/")
	if res.StatusCode != 200 || !strings.HasPrefix(res.Header.Get("Content-Type"), "text/html") {
		t.Fatalf("/: %d %s", res.StatusCode, res.Header.Get("Content-Type"))
	}
	for _, want := range []string{
		"Test Reservoir", "Test Pond", `href="/sites/res"`, "UNREACHABLE", "12 readings waiting", "2 pending, 1 failed",
		"column reaches Tmd in 4–7 days", "overturn risk at intake (hatchery)", `<meta name="viewport"`, `http-equiv="refresh" content="60"`,
		"FAILED", "HTTP 503", "no data yet", "Ice is inferred from water temperatures",
	} {
		if !strings.Contains(body, want) {
			t.Errorf("overview lacks %q", want)
		}
	}
	res, body = serve(t, h, "GET", "/sites/res")
	if res.StatusCode != 200 {
		t.Fatalf("/sites/res: %d", res.StatusCode)
	}
	for _, want := range []string{"<svg", "temperature (°C)", "potential density (kg m⁻³)", "depth (m)", "time (UTC)", "Tmd", "hatchery, 15 m",
		`id="heatmap"`, "data:image/png;base64,", "fall overturn", "Figure 1.", "Figure 2.", "Intake water.", "J m⁻²", "7.00 °C"} {
		if !strings.Contains(body, want) {
			t.Errorf("site page lacks %q", want)
		}
	}
	if res.Header.Get("Content-Security-Policy") == "" || res.Header.Get("X-Content-Type-Options") != "nosniff" {
		t.Error("security headers missing")
	}
}

// Nothing on the page is loaded from elsewhere and no script runs: the only
// URL with a scheme is the SVG namespace name, which is never fetched.
func TestPage_SelfContained(t *testing.T) {
	st := testStore(t, "Test Reservoir")
	feed(t, st)
	h := Handler(st, health, Options{})
	for _, path := range []string{"/", "/sites/res", "/sites/pond"} {
		_, body := serve(t, h, "GET", path)
		if strings.Contains(strings.ToLower(body), "<script") || strings.Contains(body, "<link") {
			t.Errorf("%s has a script or link element", path)
		}
		for _, m := range regexp.MustCompile(`(?:src|href)="([^"]*)"`).FindAllStringSubmatch(body, -1) {
			u := m[1]
			if strings.HasPrefix(u, "data:image/png;base64,") {
				continue
			}
			if strings.Contains(u, "//") || strings.Contains(u, ":") {
				t.Errorf("%s references %q", path, u)
			}
		}
		if n := strings.Count(body, "http://") + strings.Count(body, "https://"); n != strings.Count(body, `xmlns="http://www.w3.org/2000/svg"`) || n == 0 {
			t.Errorf("%s: %d URLs with a scheme besides the SVG namespace", path, n)
		}
	}
}

func TestRoutes_JSON(t *testing.T) {
	st := testStore(t, "Test Reservoir")
	feed(t, st)
	h := Handler(st, health, Options{})

	res, body := serve(t, h, "GET", "/api/sites")
	if res.StatusCode != 200 || res.Header.Get("Content-Type") != "application/json" {
		t.Fatalf("/api/sites: %d %s", res.StatusCode, res.Header.Get("Content-Type"))
	}
	var list []map[string]any
	if err := json.Unmarshal([]byte(body), &list); err != nil {
		t.Fatal(err)
	}
	if len(list) != 2 || list[0]["id"] != "res" || list[1]["id"] != "pond" {
		t.Fatalf("list %v", list)
	}
	for _, k := range []string{"name", "seasonal_state", "state", "last_profile_time", "age_seconds", "stale", "open_episodes", "projections", "surface_temp_c"} {
		if _, ok := list[0][k]; !ok {
			t.Errorf("summary lacks %q", k)
		}
	}
	if list[1]["last_profile_time"] != nil || list[1]["state"] != "unknown" {
		t.Errorf("site without data: %v", list[1])
	}
	if list[0]["open_episodes"].(float64) != 1 || list[0]["stale"] != false {
		t.Errorf("summary %v", list[0])
	}

	res, body = serve(t, h, "GET", "/api/sites/res")
	if res.StatusCode != 200 {
		t.Fatalf("/api/sites/res: %d", res.StatusCode)
	}
	var d struct {
		ID      string `json:"id"`
		Profile struct {
			Time    time.Time `json:"time"`
			DepthsM []float64 `json:"depths_m"`
			TempsC  []float64 `json:"temps_c"`
		} `json:"profile"`
		Column struct {
			State   string         `json:"state"`
			Metrics map[string]any `json:"metrics"`
		} `json:"column"`
		Projections []struct {
			Name     string  `json:"name"`
			LowDays  float64 `json:"low_days"`
			HighDays float64 `json:"high_days"`
			Text     string  `json:"text"`
		} `json:"projections"`
		Open    []map[string]any `json:"open_episodes_detail"`
		Intakes []map[string]any `json:"intakes"`
		History struct {
			Profiles int `json:"profiles"`
		} `json:"history"`
		Cautions []string `json:"cautions"`
	}
	if err := json.Unmarshal([]byte(body), &d); err != nil {
		t.Fatalf("%v\n%s", err, body)
	}
	if d.ID != "res" || len(d.Profile.DepthsM) != 5 || d.Profile.TempsC[4] != 6.5 || !d.Profile.Time.Equal(t0.Add(36*time.Hour)) {
		t.Errorf("profile %+v", d.Profile)
	}
	if d.Column.State != "stratified" || len(d.Column.Metrics["density_kg_m3"].([]any)) != 5 {
		t.Errorf("column %+v", d.Column)
	}
	if len(d.Projections) != 1 || d.Projections[0].Name != "days_to_tmd" || d.Projections[0].Text != "column reaches Tmd in 4–7 days" {
		t.Errorf("projections %+v", d.Projections)
	}
	if len(d.Open) != 1 || d.Open[0]["kind"] != "intake_overturn_risk" {
		t.Errorf("open %v", d.Open)
	}
	// NaN metric values become null, not an encoding failure.
	if ms := d.Open[0]["metrics"].([]any); ms[0].(map[string]any)["value"] != nil {
		t.Errorf("NaN metric encoded as %v", ms[0])
	}
	if len(d.Intakes) != 1 || d.Intakes[0]["temp_c"].(float64) != 7 {
		t.Errorf("intakes %v", d.Intakes)
	}
	if d.History.Profiles < 200 || len(d.Cautions) != 2 {
		t.Errorf("history %d cautions %d", d.History.Profiles, len(d.Cautions))
	}

	res, body = serve(t, h, "GET", "/api/sites/res/events")
	var evs []map[string]any
	if err := json.Unmarshal([]byte(body), &evs); err != nil || res.StatusCode != 200 {
		t.Fatalf("%d %v", res.StatusCode, err)
	}
	if len(evs) != 2 || evs[0]["kind"] != "intake_overturn_risk" || evs[1]["kind"] != "overturn" {
		t.Errorf("events %v", evs)
	}
	_, body = serve(t, h, "GET", "/api/sites/pond/events")
	if strings.TrimSpace(body) != "[]" {
		t.Errorf("no events should be [], got %s", body)
	}
}

func TestUnknownSiteIs404(t *testing.T) {
	h := Handler(testStore(t, "R"), nil, Options{})
	for _, p := range []string{"/sites/nope", "/api/sites/nope", "/api/sites/nope/events", "/nope", "/sites/", "/api/sites/res/other"} {
		if res, _ := serve(t, h, "GET", p); res.StatusCode != http.StatusNotFound {
			t.Errorf("GET %s: %d, want 404", p, res.StatusCode)
		}
	}
}

func TestReadOnly_405(t *testing.T) {
	h := Handler(testStore(t, "R"), nil, Options{})
	for _, m := range []string{"POST", "PUT", "DELETE", "PATCH"} {
		for _, p := range []string{"/", "/sites/res", "/api/sites", "/api/sites/res", "/api/sites/res/events"} {
			res, _ := serve(t, h, m, p)
			if res.StatusCode != http.StatusMethodNotAllowed {
				t.Errorf("%s %s: %d, want 405", m, p, res.StatusCode)
			}
			if a := res.Header.Get("Allow"); !strings.Contains(a, "GET") || !strings.Contains(a, "HEAD") {
				t.Errorf("%s %s: Allow %q", m, p, a)
			}
		}
	}
	res, body := serve(t, h, "HEAD", "/sites/res")
	if res.StatusCode != 200 || body != "" {
		t.Errorf("HEAD: %d with %d bytes", res.StatusCode, len(body))
	}
}

func TestHeatMapOnlyWithHistory(t *testing.T) {
	st := testStore(t, "R")
	h := Handler(st, nil, Options{})
	_, body := serve(t, h, "GET", "/sites/res")
	if !strings.Contains(body, "no history yet") || strings.Contains(body, "data:image/png") {
		t.Error("heat map drawn without history")
	}
	if !strings.Contains(body, "no profile received yet") {
		t.Error("empty profile figure not labelled")
	}
	feed(t, st)
	_, body = serve(t, h, "GET", "/sites/res")
	if strings.Contains(body, "no history yet") || !strings.Contains(body, `id="heatmap"`) || !strings.Contains(body, "data:image/png;base64,") {
		t.Error("heat map missing with history")
	}
	// The event is marked on the time axis with its code and a tooltip.
	if !strings.Contains(body, "overturn (firing): fall overturn") {
		t.Error("event not marked on the heat map")
	}
}

func TestXSS_Escaped(t *testing.T) {
	evil := `<script>alert("x")</script>`
	st := testStore(t, evil)
	feed(t, st)
	st.ObserveEvent(detect.Event{Time: t0.Add(35 * time.Hour), Site: "res", Kind: detect.KindSensorFault, Status: detect.StatusFiring,
		Subject: `<img src=x onerror=alert(1)>`, Summary: `<b onmouseover="alert(2)">x</b>`})
	st.ObserveAlert(AlertLine{Time: t0, Site: "res", Kind: "overturn", Receiver: `<svg onload=alert(3)>`, Summary: evil, Error: "</td><script>"})
	h := Handler(st, func() Health { return Health{Extra: map[string]string{"<k>": evil}} }, Options{Title: evil})
	for _, p := range []string{"/", "/sites/res"} {
		_, body := serve(t, h, "GET", p)
		for _, bad := range []string{"<script>", "<img src=x", "<b onmouseover", "<svg onload", "<k>"} {
			if strings.Contains(body, bad) {
				t.Errorf("%s contains raw %q", p, bad)
			}
		}
		if !strings.Contains(body, "&lt;script&gt;") {
			t.Errorf("%s: escaped name not shown", p)
		}
	}
	_, body := serve(t, h, "GET", "/api/sites/res")
	if strings.Contains(body, "<script>") {
		t.Error("JSON contains raw <script>")
	}
}

func TestStaleAndRefreshOptions(t *testing.T) {
	st := testStore(t, "R")
	feed(t, st)
	st.SetClock(func() time.Time { return time.Now().Add(2 * time.Hour) })
	h := Handler(st, nil, Options{Refresh: -1, StaleAfter: time.Hour})
	_, body := serve(t, h, "GET", "/")
	if !strings.Contains(body, "STALE") {
		t.Error("stale site not flagged")
	}
	if strings.Contains(body, `http-equiv="refresh"`) {
		t.Error("refresh not turned off")
	}
	if !strings.Contains(body, "not reported") {
		t.Error("missing health not said")
	}
}

func TestCautionsFollowIce(t *testing.T) {
	st := testStore(t, "R")
	c, p := column(t, "pond", t0, []float64{0.5, 1.5, 2.5}, []float64{0.2, 2.5, 3.8}, detect.SeasonIce)
	c.IceInferred = true
	st.ObserveColumn(c, p)
	h := Handler(st, nil, Options{})
	_, body := serve(t, h, "GET", "/sites/pond")
	if !strings.Contains(body, "no ice is guaranteed safe") || !strings.Contains(body, "ice cover (inferred)") {
		t.Error("ice caution missing on an ice-covered site")
	}
	if !strings.Contains(body, "Tf") {
		t.Error("freezing point not marked near 0 °C")
	}
}

// The page can be read while data arrive (run with -race).
func TestConcurrentObserveAndServe(t *testing.T) {
	st := testStore(t, "R")
	h := Handler(st, health, Options{})
	cols := make([]detect.Column, 300)
	profs := make([]detect.Profile, 300)
	for i := range cols {
		cols[i], profs[i] = column(t, "res", t0.Add(time.Duration(i)*10*time.Minute), []float64{1, 5, 10}, []float64{12, 9, 6}, detect.SeasonStratified)
	}
	var wg sync.WaitGroup
	wg.Add(2)
	go func() {
		defer wg.Done()
		for i, c := range cols {
			st.ObserveColumn(c, profs[i])
			st.ObserveEvent(detect.Event{Time: c.Time, Site: "res", Kind: detect.KindSensorFault, Status: detect.StatusFiring, Subject: "5 m"})
			st.ObserveAlert(AlertLine{Time: c.Time, Site: "res"})
		}
	}()
	go func() {
		defer wg.Done()
		for i := 0; i < 30; i++ {
			for _, p := range []string{"/", "/sites/res", "/api/sites/res", "/api/sites/res/events"} {
				rec := httptest.NewRecorder()
				h.ServeHTTP(rec, httptest.NewRequest("GET", p, nil))
				if rec.Code != 200 {
					t.Errorf("%s: %d", p, rec.Code)
				}
			}
		}
	}()
	wg.Wait()
}
