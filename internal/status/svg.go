package status

import (
	"bytes"
	"encoding/base64"
	"fmt"
	"html"
	"html/template"
	"image"
	"image/color"
	"image/png"
	"math"
	"sort"
	"strconv"
	"strings"
	"time"

	"holomix/detect"
)

// svgBuf builds an SVG document. Every text that reaches it goes through
// esc; numbers are formatted here. The result is trusted HTML.
type svgBuf struct{ b strings.Builder }

func esc(s string) string { return html.EscapeString(s) }

// n formats a coordinate with two decimals at most.
func n(x float64) string {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return "0"
	}
	return strconv.FormatFloat(math.Round(x*100)/100, 'f', -1, 64)
}

func (s *svgBuf) raw(parts ...string) {
	for _, p := range parts {
		s.b.WriteString(p)
	}
}

func (s *svgBuf) line(x1, y1, x2, y2 float64, attrs string) {
	s.raw(`<line x1="`, n(x1), `" y1="`, n(y1), `" x2="`, n(x2), `" y2="`, n(y2), `" `, attrs, `/>`)
}

func (s *svgBuf) text(x, y float64, attrs, txt string) {
	s.raw(`<text x="`, n(x), `" y="`, n(y), `" `, attrs, `>`, esc(txt), `</text>`)
}

func (s *svgBuf) rect(x, y, w, h float64, attrs string) {
	s.raw(`<rect x="`, n(x), `" y="`, n(y), `" width="`, n(w), `" height="`, n(h), `" `, attrs, `/>`)
}

func (s *svgBuf) polyline(xs, ys []float64, attrs string) {
	if len(xs) < 2 {
		return
	}
	s.raw(`<polyline points="`)
	for i := range xs {
		if i > 0 {
			s.raw(" ")
		}
		s.raw(n(xs[i]), ",", n(ys[i]))
	}
	s.raw(`" fill="none" `, attrs, `/>`)
}

// boxLabel writes a 10-px label ending at xRight with its box bottom at
// yBottom, on a white box so that it stays legible over data.
func (s *svgBuf) boxLabel(xRight, yBottom float64, txt string) {
	w := 5.4*float64(len([]rune(txt))) + 6
	s.rect(xRight-w, yBottom-13, w, 13, `fill="#fff" fill-opacity="0.9" stroke="#000" stroke-width="0.4"`)
	s.text(xRight-3, yBottom-3, `text-anchor="end" font-size="10"`, txt)
}

func (s *svgBuf) html() template.HTML { return template.HTML(s.b.String()) } // #nosec: built from escaped parts

// niceStep returns a round step (1, 2 or 5 × 10^k) giving about n intervals over span.
func niceStep(span float64, n int) float64 {
	if !(span > 0) || n < 1 {
		return 1
	}
	raw := span / float64(n)
	mag := math.Pow(10, math.Floor(math.Log10(raw)))
	for _, m := range []float64{1, 2, 5, 10} {
		if m*mag >= raw {
			return m * mag
		}
	}
	return 10 * mag
}

// niceRange widens [lo, hi] to at least minSpan and to multiples of a nice
// step; it returns the range and the step.
func niceRange(lo, hi, minSpan float64, ticks int) (float64, float64, float64) {
	if math.IsNaN(lo) || math.IsNaN(hi) || math.IsInf(lo, 0) || math.IsInf(hi, 0) {
		lo, hi = 0, 1
	}
	if hi-lo < minSpan {
		mid := (lo + hi) / 2
		lo, hi = mid-minSpan/2, mid+minSpan/2
	}
	step := niceStep(hi-lo, ticks)
	lo = math.Floor(lo/step+1e-9) * step
	hi = math.Ceil(hi/step-1e-9) * step
	return lo, hi, step
}

// decimals is the number of decimals needed to print multiples of step.
func decimals(step float64) int {
	d := 0
	for d < 6 && math.Abs(step*math.Pow(10, float64(d))-math.Round(step*math.Pow(10, float64(d)))) > 1e-6 {
		d++
	}
	return d
}

func tickLabel(v, step float64) string {
	s := strconv.FormatFloat(v, 'f', decimals(step), 64)
	if x, err := strconv.ParseFloat(s, 64); err == nil && x == 0 {
		s = strings.TrimPrefix(s, "-")
	}
	return strings.Replace(s, "-", "\u2212", 1)
}

// fmtDepth prints a depth in its shortest form: "15", "0.75".
func fmtDepth(z float64) string { return strconv.FormatFloat(z, 'f', -1, 64) }

func ticksOf(lo, hi, step float64) []float64 {
	var t []float64
	for v := lo; v <= hi+step*1e-6; v += step {
		t = append(t, math.Round(v/step)*step)
	}
	return t
}

const (
	fontAttr   = `font-size="11"`
	labelAttr  = `font-size="12"`
	axisStroke = `stroke="#000" stroke-width="0.8"`
)

// profileFigure draws the latest profile as two panels sharing a downward
// depth axis: (a) temperature with Tmd at each sensor's pressure and the
// freezing point, (b) potential density. Intakes, the thermocline and
// missing sensors are marked. The panels are separate SVGs so that they sit
// side by side on a wide screen and stack on a phone; the key is HTML.
func profileFigure(v siteView) template.HTML {
	var out strings.Builder
	out.WriteString(`<div class="panels">`)
	p, m := v.Prof, v.Col.Metrics
	if !v.Has || len(p.Depths) == 0 {
		var s svgBuf
		s.raw(`<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 340 120" class="panel" role="img"><title>no profile</title>`)
		s.text(170, 60, `text-anchor="middle" `+labelAttr, "no profile received yet")
		s.raw(`</svg></div>`)
		out.WriteString(s.b.String())
		return template.HTML(out.String()) // #nosec: built from escaped parts
	}
	maxD := v.MaxDepth
	for _, z := range p.Depths {
		maxD = math.Max(maxD, z)
	}
	_, dHi, dStep := niceRange(0, maxD, 1, 6)
	const W, H = 352.0, 452.0
	const l, r, top, bottom = 56.0, 326.0, 72.0, 438.0
	y := func(z float64) float64 { return top + z/dHi*(bottom-top) }

	// Temperature range: data, Tmd and, near freezing, the freezing point.
	tLo, tHi := math.Inf(1), math.Inf(-1)
	for _, t := range p.Temps {
		tLo, tHi = math.Min(tLo, t), math.Max(tHi, t)
	}
	for _, t := range m.TmdC {
		if !math.IsNaN(t) {
			tLo, tHi = math.Min(tLo, t), math.Max(tHi, t)
		}
	}
	showTf := !math.IsNaN(m.FreezingPointC) && tLo < 2
	if showTf {
		tLo = math.Min(tLo, m.FreezingPointC)
	}
	tLo, tHi, tStep := niceRange(tLo-0.2, tHi+0.2, 4, 6)
	xa := func(t float64) float64 { return l + (t-tLo)/(tHi-tLo)*(r-l) }

	dens := m.DensityKgM3
	hasDens := len(dens) == len(p.Depths)
	rLo, rHi, rStep := 999.0, 1000.0, 0.2
	if hasDens {
		lo, hi := math.Inf(1), math.Inf(-1)
		for _, x := range dens {
			lo, hi = math.Min(lo, x), math.Max(hi, x)
		}
		rLo, rHi, rStep = niceRange(lo, hi, 0.1, 4)
	}
	xb := func(x float64) float64 { return l + (x-rLo)/(rHi-rLo)*(r-l) }

	frame := func(s *svgBuf, letter, xlabel string, lo, hi, step float64, x func(float64) float64, ticks bool) {
		s.raw(`<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 `, n(W), ` `, n(H), `" class="panel" role="img"><title>`,
			esc(letter+" "+xlabel+" against depth, "+v.Meta.Name), `</title>`)
		s.rect(l, top, r-l, bottom-top, `fill="none" `+axisStroke)
		for _, z := range ticksOf(0, dHi, dStep) {
			s.line(l-4, y(z), l, y(z), axisStroke)
			s.line(r, y(z), r+4, y(z), axisStroke)
			s.text(l-7, y(z)+4, `text-anchor="end" `+fontAttr, tickLabel(z, dStep))
		}
		s.raw(`<text transform="translate(16,`, n((top+bottom)/2), `) rotate(-90)" text-anchor="middle" `, labelAttr, `>depth (m)</text>`)
		if ticks {
			for _, t := range ticksOf(lo, hi, step) {
				s.line(x(t), top-4, x(t), top, axisStroke)
				s.line(x(t), bottom, x(t), bottom+4, axisStroke)
				s.text(x(t), top-8, `text-anchor="middle" `+fontAttr, tickLabel(t, step))
			}
		}
		s.text((l+r)/2, top-30, `text-anchor="middle" `+labelAttr, xlabel)
		s.text(4, 16, `font-size="13" font-weight="bold"`, letter)
	}
	intakes := func(s *svgBuf, label bool) {
		for _, in := range v.Meta.Intakes {
			if in.Depth < 0 || in.Depth > dHi {
				continue
			}
			s.line(l, y(in.Depth), r, y(in.Depth), `stroke="#000" stroke-width="0.9" stroke-dasharray="8 3 1.5 3"`)
			if label {
				name := in.Name
				if name == "" {
					name = "intake"
				}
				s.boxLabel(r-3, y(in.Depth)-3, name+", "+fmtDepth(in.Depth)+" m")
			}
		}
	}
	points := func(s *svgBuf, xs []float64, fill string, tips []string) {
		ys := make([]float64, len(p.Depths))
		for i, z := range p.Depths {
			ys[i] = y(z)
		}
		s.polyline(xs, ys, `stroke="#000" stroke-width="1.4"`)
		for i := range xs {
			s.raw(`<circle cx="`, n(xs[i]), `" cy="`, n(ys[i]), `" r="2.6" fill="`, fill, `" stroke="#000" stroke-width="1"><title>`, esc(tips[i]), `</title></circle>`)
		}
	}

	// Panel (a): temperature.
	var sa svgBuf
	frame(&sa, "(a)", "temperature (°C)", tLo, tHi, tStep, xa, true)
	if showTf {
		sa.line(xa(m.FreezingPointC), top, xa(m.FreezingPointC), bottom, `stroke="#555" stroke-width="0.8" stroke-dasharray="1 3"`)
		sa.text(xa(m.FreezingPointC)+3, bottom-6, `font-size="10" fill="#333"`, "Tf")
	}
	if len(m.TmdC) == len(p.Depths) {
		xs, ys := make([]float64, len(p.Depths)), make([]float64, len(p.Depths))
		for i, z := range p.Depths {
			xs[i], ys[i] = xa(m.TmdC[i]), y(z)
		}
		sa.polyline(xs, ys, `stroke="#000" stroke-width="1" stroke-dasharray="5 3"`)
		sa.text(xs[len(xs)-1]+4, ys[len(ys)-1]-4, `font-size="10"`, "Tmd")
	}
	intakes(&sa, true)
	xs := make([]float64, len(p.Depths))
	tips := make([]string, len(p.Depths))
	for i := range p.Depths {
		xs[i] = xa(p.Temps[i])
		tips[i] = fmt.Sprintf("%.2f m: %.3f °C", p.Depths[i], p.Temps[i])
	}
	points(&sa, xs, "#fff", tips)
	for _, z := range v.Col.Missing {
		if z >= 0 && z <= dHi {
			sa.text(l+7, y(z)+4, `text-anchor="middle" font-size="12"`, "×")
		}
	}
	sa.raw(`</svg>`)

	// Panel (b): potential density.
	var sb svgBuf
	frame(&sb, "(b)", "potential density (kg m⁻³)", rLo, rHi, rStep, xb, hasDens)
	intakes(&sb, false)
	if !math.IsNaN(m.ThermoclineM) && m.ThermoclineM > 0 {
		sb.line(l, y(m.ThermoclineM), r, y(m.ThermoclineM), `stroke="#000" stroke-width="0.8" stroke-dasharray="1.5 2.5"`)
		sb.text(r-3, y(m.ThermoclineM)-4, `text-anchor="end" font-size="10"`, fmt.Sprintf("thermocline %.1f m", m.ThermoclineM))
	}
	if hasDens {
		xs = make([]float64, len(p.Depths))
		for i := range p.Depths {
			xs[i] = xb(dens[i])
			tips[i] = fmt.Sprintf("%.2f m: %.4f kg/m³", p.Depths[i], dens[i])
		}
		points(&sb, xs, "#000", tips)
	} else {
		sb.text((l+r)/2, (top+bottom)/2, `text-anchor="middle" font-size="11"`, "no density for this profile")
	}
	sb.raw(`</svg>`)

	out.WriteString(sa.b.String())
	out.WriteString(sb.b.String())
	out.WriteString(`</div><p class="key">`)
	key := func(dash, label string) {
		out.WriteString(`<span><svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 28 8" width="28" height="8"><line x1="0" y1="4" x2="28" y2="4" stroke="#000" stroke-width="1.3"` +
			dash + `/></svg> ` + esc(label) + `</span>`)
	}
	key("", "measured")
	key(` stroke-dasharray="5 3"`, "Tmd at depth")
	if showTf {
		key(` stroke-dasharray="1 3"`, "Tf freezing point")
	}
	key(` stroke-dasharray="8 3 1.5 3"`, "intake")
	key(` stroke-dasharray="1.5 2.5"`, "thermocline")
	out.WriteString(`<span>× missing sensor</span></p>`)
	return template.HTML(out.String()) // #nosec: built from escaped parts
}

// thumbFigure is a small profile (temperature against depth) for the overview.
func thumbFigure(v siteView) template.HTML {
	var s svgBuf
	const W, H = 96.0, 120.0
	const l, r, t, b = 6.0, 90.0, 14.0, 106.0
	s.raw(`<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 96 120" class="thumb" role="img"><title>`,
		esc("Temperature profile of "+v.Meta.Name), `</title>`)
	s.rect(l, t, r-l, b-t, `fill="none" stroke="#000" stroke-width="0.6"`)
	p := v.Prof
	if !v.Has || len(p.Depths) == 0 {
		s.text(W/2, H/2, `text-anchor="middle" font-size="9"`, "no data")
		s.raw(`</svg>`)
		return s.html()
	}
	maxD := v.MaxDepth
	lo, hi := 0.0, 5.0
	for i, z := range p.Depths {
		maxD = math.Max(maxD, z)
		if i == 0 {
			lo, hi = p.Temps[i], p.Temps[i]
		}
		lo, hi = math.Min(lo, p.Temps[i]), math.Max(hi, p.Temps[i])
	}
	lo, hi = math.Min(lo, 3.5), math.Max(hi, 4.5)
	lo, hi, _ = niceRange(lo, hi, 4, 2)
	x := func(v float64) float64 { return l + (v-lo)/(hi-lo)*(r-l) }
	y := func(z float64) float64 { return t + z/math.Max(maxD, 0.1)*(b-t) }
	if tm := v.Col.Metrics.TmdC; len(tm) == len(p.Depths) {
		xs, ys := make([]float64, len(tm)), make([]float64, len(tm))
		for i := range tm {
			xs[i], ys[i] = x(tm[i]), y(p.Depths[i])
		}
		s.polyline(xs, ys, `stroke="#000" stroke-width="0.7" stroke-dasharray="3 2"`)
	}
	xs, ys := make([]float64, len(p.Depths)), make([]float64, len(p.Depths))
	for i := range p.Depths {
		xs[i], ys[i] = x(p.Temps[i]), y(p.Depths[i])
	}
	s.polyline(xs, ys, `stroke="#000" stroke-width="1.3"`)
	s.text(l, 10, `font-size="9"`, tickLabel(lo, 1))
	s.text(r, 10, `font-size="9" text-anchor="end"`, tickLabel(hi, 1)+" °C")
	s.text(l+2, H-4, `font-size="9"`, "0–"+tickLabel(maxD, 0.1)+" m")
	s.raw(`</svg>`)
	return s.html()
}

// kindCode is the short label of an event kind on the heat map's time axis.
func kindCode(k detect.Kind) string {
	switch k {
	case detect.KindStratificationOnset:
		return "S"
	case detect.KindOverturn:
		return "O"
	case detect.KindMaxDensityReached:
		return "M"
	case detect.KindInverseStratification:
		return "V"
	case detect.KindIceOn:
		return "I+"
	case detect.KindIceOff:
		return "I−"
	case detect.KindIntakeChange:
		return "R"
	case detect.KindIntakeOverturnRisk:
		return "Q"
	case detect.KindFrazilRisk:
		return "F"
	case detect.KindSensorFault:
		return "X"
	case detect.KindDegreeDays:
		return "D"
	}
	return "?"
}

// heatGrid is the depth-time field behind the heat map.
type heatGrid struct {
	from, to   time.Time
	cols, rows int
	maxDepth   float64
	vals       []float64 // rows×cols, NaN where there is no data
	lo, hi     float64   // data range
}

// buildHeatGrid bins the history into cols time columns (the last profile
// in each column; a column without one repeats the previous profile while
// the gap is under twice the usual profile interval) and interpolates each
// profile linearly in depth onto rows between its top and bottom sensors.
func buildHeatGrid(hist []histPoint, from, to time.Time, maxDepth float64, cols, rows int) heatGrid {
	g := heatGrid{from: from, to: to, cols: cols, rows: rows, maxDepth: maxDepth, lo: math.Inf(1), hi: math.Inf(-1)}
	g.vals = make([]float64, rows*cols)
	for i := range g.vals {
		g.vals[i] = math.NaN()
	}
	if len(hist) == 0 || !to.After(from) {
		return g
	}
	// Usual interval: median of the gaps.
	var gaps []float64
	for i := 1; i < len(hist); i++ {
		gaps = append(gaps, hist[i].t.Sub(hist[i-1].t).Seconds())
	}
	usual := 3600.0
	if len(gaps) > 0 {
		sort.Float64s(gaps)
		usual = gaps[(len(gaps)-1)/2]
	}
	span := to.Sub(from).Seconds()
	colW := span / float64(cols)
	j := 0
	var cur *histPoint
	for c := 0; c < cols; c++ {
		end := from.Add(time.Duration((float64(c) + 1) * colW * float64(time.Second)))
		for j < len(hist) && !hist[j].t.After(end) {
			cur = &hist[j]
			j++
		}
		if cur == nil || end.Sub(cur.t).Seconds() > math.Max(2*usual, colW) || len(cur.depths) == 0 {
			continue
		}
		k := 0
		for r := 0; r < rows; r++ {
			z := (float64(r) + 0.5) * maxDepth / float64(rows)
			d := cur.depths
			if z < d[0] || z > d[len(d)-1] {
				continue
			}
			for k+1 < len(d) && d[k+1] < z {
				k++
			}
			var val float64
			if k+1 >= len(d) || d[k+1] == d[k] {
				val = cur.temps[k]
			} else {
				f := (z - d[k]) / (d[k+1] - d[k])
				val = cur.temps[k] + f*(cur.temps[k+1]-cur.temps[k])
			}
			g.vals[r*cols+c] = val
			g.lo, g.hi = math.Min(g.lo, val), math.Max(g.hi, val)
		}
	}
	return g
}

// png encodes the grid as an image (transparent where there is no data).
func (g heatGrid) png(lo, hi float64) (string, error) {
	img := image.NewNRGBA(image.Rect(0, 0, g.cols, g.rows))
	for r := 0; r < g.rows; r++ {
		for c := 0; c < g.cols; c++ {
			v := g.vals[r*g.cols+c]
			if math.IsNaN(v) {
				continue
			}
			R, G, B := colourAt((v - lo) / (hi - lo))
			img.SetNRGBA(c, r, color.NRGBA{R, G, B, 255})
		}
	}
	var buf bytes.Buffer
	if err := (&png.Encoder{CompressionLevel: png.BestSpeed}).Encode(&buf, img); err != nil {
		return "", fmt.Errorf("status: encode heat map: %w", err)
	}
	return "data:image/png;base64," + base64.StdEncoding.EncodeToString(buf.Bytes()), nil
}

// timeStep picks a tick interval giving 4-10 ticks over span.
func timeStep(span time.Duration) time.Duration {
	for _, st := range []time.Duration{time.Hour, 2 * time.Hour, 3 * time.Hour, 6 * time.Hour, 12 * time.Hour,
		24 * time.Hour, 48 * time.Hour, 4 * 24 * time.Hour, 7 * 24 * time.Hour, 14 * 24 * time.Hour} {
		if span/st <= 10 {
			return st
		}
	}
	return 30 * 24 * time.Hour
}

// heatFigure draws the depth-time temperature map of the history with a
// colour bar, intake depths, and events marked on the time axis.
func heatFigure(v siteView, window time.Duration) (template.HTML, error) {
	var s svgBuf
	const W, H = 900.0, 420.0
	const l, r, t, b = 62.0, 790.0, 86.0, 346.0
	s.raw(`<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 `, n(W), ` `, n(H), `" class="fig" id="heatmap" role="img" aria-labelledby="fig-heat-title">`)
	s.raw(`<title id="fig-heat-title">`, esc("Temperature against depth and time, "+v.Meta.Name), `</title>`)
	s.raw(`<defs><pattern id="nodata" width="6" height="6" patternUnits="userSpaceOnUse" patternTransform="rotate(45)">`,
		`<rect width="6" height="6" fill="#fff"/><line x1="0" y1="0" x2="0" y2="6" stroke="#999" stroke-width="1.2"/></pattern></defs>`)
	if len(v.Hist) == 0 {
		s.text(W/2, H/2, `text-anchor="middle" `+labelAttr, "no history yet")
		s.raw(`</svg>`)
		return s.html(), nil
	}
	to := v.Hist[len(v.Hist)-1].t
	from := to.Add(-window)
	if first := v.Hist[0].t; first.After(from) {
		from = first
	}
	if to.Sub(from) < 6*time.Hour {
		from = to.Add(-6 * time.Hour)
	}
	maxD := v.MaxDepth
	for _, h := range v.Hist {
		if len(h.depths) > 0 {
			maxD = math.Max(maxD, h.depths[len(h.depths)-1])
		}
	}
	if !(maxD > 0) {
		maxD = 1
	}
	cols := int(math.Min(360, math.Max(24, to.Sub(from).Minutes()/10)))
	g := buildHeatGrid(v.Hist, from, to, maxD, cols, 120)
	lo, hi, cStep := niceRange(g.lo, g.hi, 2, 6)
	if math.IsInf(g.lo, 0) {
		lo, hi, cStep = 0, 10, 2
	}
	uri, err := g.png(lo, hi)
	if err != nil {
		return "", err
	}
	x := func(tt time.Time) float64 { return l + tt.Sub(from).Seconds()/to.Sub(from).Seconds()*(r-l) }
	dLo, dHi, dStep := niceRange(0, maxD, 1, 6)
	dLo = 0
	y := func(z float64) float64 { return t + z/dHi*(b-t) }
	// The image covers 0..maxD; the axis may extend to a rounder dHi.
	s.rect(l, t, r-l, b-t, `fill="url(#nodata)"`)
	s.raw(`<image x="`, n(l), `" y="`, n(t), `" width="`, n(r-l), `" height="`, n(y(maxD)-t),
		`" preserveAspectRatio="none" style="image-rendering:pixelated" href="`, uri, `"/>`)
	s.rect(l, t, r-l, b-t, `fill="none" `+axisStroke)

	// Depth axis.
	for _, z := range ticksOf(dLo, dHi, dStep) {
		s.line(l-4, y(z), l, y(z), axisStroke)
		s.text(l-7, y(z)+4, `text-anchor="end" `+fontAttr, tickLabel(z, dStep))
	}
	s.raw(`<text transform="translate(`, n(l-42), ",", n((t+b)/2), `) rotate(-90)" text-anchor="middle" `, labelAttr, `>depth (m)</text>`)
	// Time axis (UTC).
	step := timeStep(to.Sub(from))
	first := from.Truncate(step)
	if first.Before(from) {
		first = first.Add(step)
	}
	for tt := first; !tt.After(to); tt = tt.Add(step) {
		s.line(x(tt), b, x(tt), b+4, axisStroke)
		label := tt.Format("Jan 02")
		if step < 24*time.Hour {
			label = tt.Format("Jan 02 15:04")
		}
		s.text(x(tt), b+17, `text-anchor="middle" `+fontAttr, label)
	}
	s.text((l+r)/2, b+36, `text-anchor="middle" `+labelAttr, "time (UTC)")

	// Intakes.
	for _, in := range v.Meta.Intakes {
		if in.Depth <= 0 || in.Depth > dHi {
			continue
		}
		s.line(l, y(in.Depth), r, y(in.Depth), `stroke="#fff" stroke-width="1" stroke-dasharray="8 3 1.5 3"`)
		name := in.Name
		if name == "" {
			name = "intake"
		}
		s.boxLabel(r-4, y(in.Depth)-3, name+", "+fmtDepth(in.Depth)+" m")
	}

	// Events on the time axis: a tick through the map and a code above it,
	// staggered on three rows; the full text is the tooltip.
	row := 0
	lastX := math.Inf(-1)
	for _, e := range v.Events {
		if e.Time.Before(from) || e.Time.After(to) {
			continue
		}
		ex := x(e.Time)
		if ex-lastX < 18 {
			row = (row + 1) % 3
		} else {
			row = 0
		}
		lastX = ex
		ey := t - 8 - float64(row)*13
		s.raw(`<g><title>`, esc(e.Time.Format("2006-01-02 15:04 UTC")+" · "+string(e.Kind)+" ("+string(e.Status)+"): "+e.Summary), `</title>`)
		s.line(ex, ey+2, ex, b, `stroke="#fff" stroke-width="0.8" stroke-opacity="0.9"`)
		s.line(ex, ey+2, ex, t, `stroke="#000" stroke-width="0.8"`)
		s.text(ex, ey, `text-anchor="middle" font-size="10"`, kindCode(e.Kind))
		s.raw(`</g>`)
	}
	s.text(l, 16, `font-size="11"`, "Events: S stratification onset · O overturn · M maximum density · V inverse stratification · I+ ice on · I− ice off")
	s.text(l, 31, `font-size="11"`, "R rapid change at intake · Q overturn risk at intake · F frazil risk · X sensor fault · D degree-days")

	// Colour bar.
	const cx, cw = 836.0, 14.0
	nb := 64
	for i := 0; i < nb; i++ {
		f0 := float64(i) / float64(nb)
		yy := b - (f0+1/float64(nb))*(b-t)
		s.rect(cx, yy, cw, (b-t)/float64(nb)+0.4, `fill="`+colourHex(f0+0.5/float64(nb))+`"`)
	}
	s.rect(cx, t, cw, b-t, `fill="none" `+axisStroke)
	for _, c := range ticksOf(lo, hi, cStep) {
		yy := b - (c-lo)/(hi-lo)*(b-t)
		s.line(cx+cw, yy, cx+cw+4, yy, axisStroke)
		s.text(cx+cw+6, yy+4, fontAttr, tickLabel(c, cStep))
	}
	s.raw(`<text transform="translate(`, n(cx-6), ",", n((t+b)/2), `) rotate(-90)" text-anchor="middle" `, labelAttr, `>temperature (°C)</text>`)
	s.rect(l, b+46, 16, 10, `fill="url(#nodata)" stroke="#000" stroke-width="0.5"`)
	s.text(l+21, b+55, fontAttr, "no data (gap, or outside the sensor range)")
	s.raw(`</svg>`)
	return s.html(), nil
}
