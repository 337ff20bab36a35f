package demo

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"image"
	"image/color"
	"image/draw"
	"image/png"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"sort"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
)

// chromiumPath is Debian's chromium, installed by deploy/test.sh.
const chromiumPath = "/usr/bin/chromium"

// apiSite is the part of /api/sites the test reads.
type apiSite struct {
	ID          string `json:"id"`
	Name        string `json:"name"`
	Seasonal    string `json:"seasonal_state"`
	IceInferred bool   `json:"ice_inferred"`
}

// pageFacts is what the test reads from the rendered DOM.
type pageFacts struct {
	Title      string   `json:"title"`
	SVGs       int      `json:"svgs"`
	Heatmap    bool     `json:"heatmap"`
	Texts      []string `json:"texts"`      // every <text> inside an <svg>
	Headings   []string `json:"headings"`   // h2
	EventRows  []string `json:"eventRows"`  // rows of the event timeline, cells joined by " | "
	AlertRows  []string `json:"alertRows"`  // rows of the alert log
	PageHeight int      `json:"pageHeight"` // px
}

const factsJS = `(() => {
  const rowsAfter = (title) => {
    const h = [...document.querySelectorAll('h2')].find(h => h.textContent.trim() === title);
    if (!h || !h.nextElementSibling) return [];
    return [...h.nextElementSibling.querySelectorAll('tbody tr')].map(tr =>
      [...tr.querySelectorAll('td')].map(td => td.textContent.trim()).join(' | '));
  };
  const svgs = [...document.querySelectorAll('svg')];
  return {
    title: document.title,
    svgs: svgs.length,
    heatmap: !!document.querySelector('svg#heatmap'),
    texts: svgs.flatMap(s => [...s.querySelectorAll('text')].map(t => t.textContent.trim())),
    headings: [...document.querySelectorAll('h2')].map(h => h.textContent.trim()),
    eventRows: rowsAfter('Event timeline'),
    alertRows: rowsAfter('Alert log'),
    pageHeight: document.documentElement.scrollHeight,
  };
})()`

// TestStatusPageInBrowser runs the demo at high speed, waits until the deep
// reservoir (the site with the most sensors and a hatchery intake) has
// entered inverse stratification or ice (polling /api/sites), then opens
// the status page in headless Chromium and checks what a person sees: the
// profile and depth-time figures as SVG with their axis labels and units,
// and the events. It saves a full-page screenshot under t.TempDir() and,
// when HOLOMIX_SCREENSHOT names a file, there too (docs/status-page.png is
// made that way).
func TestStatusPageInBrowser(t *testing.T) {
	if _, err := exec.LookPath(chromiumPath); err != nil {
		t.Fatalf("no headless browser at %s: install chromium: apt-get install -y chromium (%v)", chromiumPath, err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	ready := make(chan Ready, 1)
	done := make(chan error, 1)
	out := &syncBuffer{}
	season := SeasonEnd(time.Date(2025, 9, 15, 0, 0, 0, 0, time.UTC)).Sub(time.Date(2025, 9, 15, 0, 0, 0, 0, time.UTC))
	go func() {
		done <- Run(ctx, Options{
			Speed: season.Seconds() / 60, Seed: 1, Out: out, Logger: testLogger(t),
			OnReady: func(r Ready) { ready <- r },
		})
	}()
	var r Ready
	select {
	case r = <-ready:
	case err := <-done:
		t.Fatalf("demo ended before it was ready: %v\n%s", err, out.String())
	case <-time.After(60 * time.Second):
		t.Fatal("demo not ready within 60 s")
	}
	defer func() {
		cancel()
		if err := <-done; err != nil {
			t.Errorf("demo: %v", err)
		}
	}()

	site := waitForWinter(t, r.StatusURL, "larchmere", 120*time.Second)
	t.Logf("%s is %q (ice inferred %v); opening the status page", site.ID, site.Seasonal, site.IceInferred)

	bctx, stop := browser(t)
	defer stop()
	// Overview: one profile sketch per site and a link to each site page.
	if err := chromedp.Do(bctx, chromedp.Navigate(r.StatusURL), chromedp.WaitVisible(chromedp.CSS("table.sites"))); err != nil {
		t.Fatalf("open %s: %v", r.StatusURL, err)
	}
	ov, err := chromedp.Run(bctx, chromedp.Evaluate[pageFacts](factsJS))
	if err != nil {
		t.Fatalf("read the overview: %v", err)
	}
	if ov.SVGs < 3 || !slices.Contains(ov.Headings, "Recent events") {
		t.Errorf("overview: %d SVG figures (want one per site), headings %v", ov.SVGs, ov.Headings)
	}
	overview, err := chromedp.Run(bctx, chromedp.FullScreenshot(100))
	if err != nil {
		t.Fatalf("overview screenshot: %v", err)
	}
	savePNG(t, "status-overview.png", overview, "")

	// The site's page: figures with axis labels and units, and its events.
	pageURL := r.StatusURL + "sites/" + site.ID
	if err := chromedp.Do(bctx, chromedp.Navigate(pageURL), chromedp.WaitVisible(chromedp.CSS("svg#heatmap"))); err != nil {
		t.Fatalf("open %s: %v", pageURL, err)
	}
	f, err := chromedp.Run(bctx, chromedp.Evaluate[pageFacts](factsJS))
	if err != nil {
		t.Fatalf("read the site page: %v", err)
	}
	t.Logf("site page %q: %d SVGs, %d px high, %d event rows, %d alert rows", f.Title, f.SVGs, f.PageHeight, len(f.EventRows), len(f.AlertRows))
	if f.SVGs < 3 || !f.Heatmap {
		t.Errorf("site page: %d SVG figures, heat map %v; want the profile panels and the heat map", f.SVGs, f.Heatmap)
	}
	// Axis labels with their units (SI; temperatures °C, depths m).
	for _, label := range []string{"depth (m)", "temperature (°C)", "potential density (kg m⁻³)"} {
		if !slices.Contains(f.Texts, label) {
			t.Errorf("no SVG axis label %q among %d SVG texts: %q", label, len(f.Texts), f.Texts)
		}
	}
	// Tick labels are numbers: at least a few of them in every figure.
	numeric := 0
	for _, s := range f.Texts {
		var x float64
		if _, err := fmt.Sscan(strings.TrimSuffix(s, " °C"), &x); err == nil {
			numeric++
		}
	}
	if numeric < 10 {
		t.Errorf("only %d numeric tick labels in the figures", numeric)
	}
	if len(f.EventRows) == 0 || strings.Contains(f.EventRows[0], "no events yet") {
		t.Errorf("event timeline is empty: %q", f.EventRows)
	}
	var winter bool
	for _, row := range f.EventRows {
		l := strings.ToLower(row)
		if strings.Contains(l, "inverse") || strings.Contains(l, "ice") {
			winter = true
		}
	}
	if !winter {
		t.Errorf("the event timeline of %s lists no inverse stratification or ice event: %q", site.ID, f.EventRows)
	}
	if len(f.AlertRows) == 0 || strings.Contains(f.AlertRows[0], "no alerts sent yet") {
		t.Errorf("alert log is empty: %q", f.AlertRows)
	}
	shot, err := chromedp.Run(bctx, chromedp.FullScreenshot(100))
	if err != nil {
		t.Fatalf("site screenshot: %v", err)
	}
	savePNG(t, "status-site.png", shot, os.Getenv("HOLOMIX_SCREENSHOT"))
}

// waitForWinter polls /api/sites until the site's seasonal state is inverse
// or ice (or ice is inferred) and returns it.
func waitForWinter(t *testing.T, statusURL, id string, limit time.Duration) apiSite {
	t.Helper()
	cl := &http.Client{Timeout: 5 * time.Second}
	deadline := time.Now().Add(limit)
	var last []apiSite
	for time.Now().Before(deadline) {
		resp, err := cl.Get(statusURL + "api/sites")
		if err == nil {
			var sites []apiSite
			err = json.NewDecoder(resp.Body).Decode(&sites)
			resp.Body.Close()
			if err == nil {
				last = sites
				for _, s := range sites {
					if s.ID == id && (s.Seasonal == "inverse" || s.Seasonal == "ice" || s.IceInferred) {
						return s
					}
				}
			}
		}
		time.Sleep(200 * time.Millisecond)
	}
	t.Fatalf("%s did not reach inverse stratification or ice within %v; last /api/sites: %+v", id, limit, last)
	return apiSite{}
}

// browser starts headless Chromium with its own profile directory.
func browser(t *testing.T) (context.Context, func()) {
	t.Helper()
	actx, acancel := chromedp.NewExecAllocator(context.Background(),
		chromedp.ExecPath(chromiumPath),
		chromedp.Headless,
		chromedp.NoSandbox,
		chromedp.DisableGPU,
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.NoFirstRun,
		chromedp.UserDataDir(t.TempDir()),
		chromedp.WindowSize(1200, 900),
	)
	bctx, bcancel := chromedp.NewContext(actx)
	// The first Run starts the browser; a timeout on it would end the browser.
	if err := chromedp.Do(bctx); err != nil {
		bcancel()
		acancel()
		t.Fatalf("start chromium: %v", err)
	}
	tctx, tcancel := context.WithTimeout(bctx, 90*time.Second)
	return tctx, func() {
		tcancel()
		bcancel()
		acancel()
	}
}

// savePNG writes a screenshot under t.TempDir() and, when extra is set, to extra.
func savePNG(t *testing.T, name string, data []byte, extra string) {
	t.Helper()
	if len(data) < 8 || string(data[1:4]) != "PNG" {
		t.Fatalf("%s: not a PNG (%d bytes)", name, len(data))
	}
	p := filepath.Join(t.TempDir(), name)
	if err := os.WriteFile(p, data, 0o644); err != nil {
		t.Fatal(err)
	}
	t.Logf("screenshot %s (%d KB)", p, len(data)/1024)
	if extra != "" {
		if len(data) > maxDocPNG {
			small, err := compactPNG(data)
			if err != nil {
				t.Fatalf("compact the screenshot: %v", err)
			}
			t.Logf("screenshot for %s reduced to 256 colours: %d KB → %d KB", extra, len(data)/1024, len(small)/1024)
			data = small
		}
		if err := os.WriteFile(extra, data, 0o644); err != nil {
			t.Fatalf("HOLOMIX_SCREENSHOT: %v", err)
		}
		t.Logf("screenshot also written to %s", extra)
	}
}

// maxDocPNG is the size above which the documentation copy of a screenshot
// is reduced to a palette image.
const maxDocPNG = 300 << 10

// compactPNG re-encodes a screenshot as a 256-colour palette image: the 256
// most frequent colours at 5 bits per channel, each pixel mapped to the
// nearest of them. A status page has few distinct colours (text, greys and
// the heat map's colour scale), so nothing visible is lost.
func compactPNG(b []byte) ([]byte, error) {
	src, err := png.Decode(bytes.NewReader(b))
	if err != nil {
		return nil, err
	}
	r := src.Bounds()
	rgba := image.NewRGBA(r)
	draw.Draw(rgba, r, src, r.Min, draw.Src)
	key := func(i int) int {
		return int(rgba.Pix[i]>>3)<<10 | int(rgba.Pix[i+1]>>3)<<5 | int(rgba.Pix[i+2]>>3)
	}
	counts := make([]int, 1<<15)
	for i := 0; i < len(rgba.Pix); i += 4 {
		counts[key(i)]++
	}
	keys := make([]int, 0, 1<<15)
	for k, n := range counts {
		if n > 0 {
			keys = append(keys, k)
		}
	}
	sort.Slice(keys, func(i, j int) bool { return counts[keys[i]] > counts[keys[j]] })
	if len(keys) > 256 {
		keys = keys[:256]
	}
	pal := make(color.Palette, len(keys))
	for i, k := range keys {
		pal[i] = color.RGBA{uint8(k>>10)<<3 | 4, uint8(k>>5&31)<<3 | 4, uint8(k&31)<<3 | 4, 255}
	}
	index := make([]int16, 1<<15)
	for i := range index {
		index[i] = -1
	}
	dst := image.NewPaletted(r, pal)
	for i, j := 0, 0; i < len(rgba.Pix); i, j = i+4, j+1 {
		k := key(i)
		if index[k] < 0 {
			index[k] = int16(pal.Index(color.RGBA{rgba.Pix[i], rgba.Pix[i+1], rgba.Pix[i+2], 255}))
		}
		dst.Pix[j] = uint8(index[k])
	}
	var out bytes.Buffer
	enc := png.Encoder{CompressionLevel: png.BestCompression}
	if err := enc.Encode(&out, dst); err != nil {
		return nil, err
	}
	return out.Bytes(), nil
}
