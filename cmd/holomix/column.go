package main

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"strconv"
	"strings"
	"text/tabwriter"

	"holomix/detect/water"
)

// iceCaution is shown whenever a profile suggests ice may be present (SCIENCE.md §7).
const iceCaution = "Ice is inferred from water temperatures only: its thickness is unknown and no ice is guaranteed safe. Follow local authority guidance."

// columnOutput is the stable JSON document of `holomix column --json`: the
// inputs and the state first, then every key of water.Metrics.
type columnOutput struct {
	DepthsM           []float64 `json:"depths_m"`
	TempsC            []float64 `json:"temps_c"`
	Salinity          float64   `json:"salinity"`
	MaxDepthM         float64   `json:"max_depth_m"` // as given; 0 = not given
	HypsographyPoints int       `json:"hypsography_points"`
	State             string    `json:"state"`
	StateReason       string    `json:"state_reason"`
	Cautions          []string  `json:"cautions"`
}

func runColumn(_ context.Context, e *env, args []string) int {
	fs := flag.NewFlagSet("column", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	depthsArg := fs.String("depths", "", "sensor depths in m, ascending, comma-separated (required), e.g. 0.5,2,5,10,20")
	tempsArg := fs.String("temps", "", "temperatures in °C at those depths, comma-separated (required)")
	salinity := fs.Float64("salinity", 0, "salinity in g/kg (0 = fresh water: CIPM 2001; otherwise UNESCO EOS-80)")
	maxDepth := fs.Float64("max-depth", 0, "the site's maximum depth in m (default: deepest hypsography depth, else deepest sensor)")
	hypsoPath := fs.String("hypsography", "", "CSV file with header depth_m,area_m2 (default: a constant-area box basin)")
	asJSON := fs.Bool("json", false, "print one JSON object instead of the table")
	fs.Usage = func() {
		fmt.Fprintln(e.stderr, "usage: holomix column --depths D1,D2,... --temps T1,T2,... [--salinity S] [--max-depth M] [--hypsography FILE] [--json]\n\n"+
			"Compute the water-column metrics (density, Tmd, N², Schmidt stability, thermocline, heat to Tmd)\n"+
			"and the instantaneous state of one temperature profile. Exit 2 on bad input.\n\noptions:")
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return 0
		}
		return 2
	}
	fail := func(format string, a ...any) int {
		fmt.Fprintf(e.stderr, "holomix column: "+format+"\n", a...)
		return 2
	}
	if fs.NArg() > 0 {
		return fail("unexpected argument %q (options only; see -h)", fs.Arg(0))
	}
	if *depthsArg == "" || *tempsArg == "" {
		fs.Usage()
		return fail("--depths and --temps are both required")
	}
	depths, err := parseFloatList(*depthsArg)
	if err != nil {
		return fail("--depths: %v", err)
	}
	temps, err := parseFloatList(*tempsArg)
	if err != nil {
		return fail("--temps: %v", err)
	}
	col := water.Column{Depths: depths, Temps: temps, Salinity: *salinity, MaxDepth: *maxDepth}
	if *hypsoPath != "" {
		h, err := readHypsography(*hypsoPath)
		if err != nil {
			return fail("--hypsography: %v", err)
		}
		col.Hypsography = h
	}
	th := water.DefaultThresholds()
	var m water.Metrics
	if err := water.ComputeWith(col, th.ThermoclineMinGrad, &m); err != nil {
		return fail("%v", err)
	}
	state, reason := water.Classify(col, &m, th)
	cautions := []string{}
	if state == water.StateInverse || temps[0] <= 0.5 {
		cautions = append(cautions, iceCaution)
	}

	if *asJSON {
		err = writeColumnJSON(e.stdout, columnOutput{
			DepthsM: depths, TempsC: temps, Salinity: *salinity, MaxDepthM: *maxDepth,
			HypsographyPoints: len(col.Hypsography.Depths),
			State:             string(state), StateReason: reason, Cautions: cautions,
		}, &m)
	} else {
		err = writeColumnText(e.stdout, col, &m, th, state, reason, cautions)
	}
	if err != nil {
		fmt.Fprintf(e.stderr, "holomix column: writing output: %v\n", err)
		return 1
	}
	return 0
}

// parseFloatList parses "1, 2.5,3" into finite numbers.
func parseFloatList(s string) ([]float64, error) {
	parts := strings.Split(s, ",")
	out := make([]float64, 0, len(parts))
	for i, p := range parts {
		p = strings.TrimSpace(p)
		if p == "" {
			return nil, fmt.Errorf("value %d is empty", i+1)
		}
		x, err := strconv.ParseFloat(p, 64)
		if err != nil || math.IsNaN(x) || math.IsInf(x, 0) {
			return nil, fmt.Errorf("value %d %q is not a finite number", i+1, p)
		}
		out = append(out, x)
	}
	return out, nil
}

// readHypsography reads a CSV file with the header depth_m,area_m2 and one
// depth (m) and area (m²) per line.
func readHypsography(path string) (water.Hypsography, error) {
	var h water.Hypsography
	f, err := os.Open(path)
	if err != nil {
		return h, err
	}
	defer f.Close()
	r := csv.NewReader(f)
	r.FieldsPerRecord = 2
	r.TrimLeadingSpace = true
	header, err := r.Read()
	if err == io.EOF {
		return h, fmt.Errorf("%s: empty file, want a header depth_m,area_m2", path)
	}
	if err != nil {
		return h, fmt.Errorf("%s: %w", path, err)
	}
	if strings.TrimSpace(header[0]) != "depth_m" || strings.TrimSpace(header[1]) != "area_m2" {
		return h, fmt.Errorf("%s: line 1: header %q, want depth_m,area_m2", path, strings.Join(header, ","))
	}
	for {
		rec, err := r.Read()
		if err == io.EOF {
			break
		}
		if err != nil {
			return h, fmt.Errorf("%s: %w", path, err)
		}
		line, _ := r.FieldPos(0)
		z, err1 := strconv.ParseFloat(strings.TrimSpace(rec[0]), 64)
		a, err2 := strconv.ParseFloat(strings.TrimSpace(rec[1]), 64)
		if err1 != nil || err2 != nil {
			return h, fmt.Errorf("%s: line %d: %q is not two numbers depth_m,area_m2", path, line, strings.Join(rec, ","))
		}
		h.Depths = append(h.Depths, z)
		h.Areas = append(h.Areas, a)
	}
	if len(h.Depths) == 0 {
		return h, fmt.Errorf("%s: no data lines after the header", path)
	}
	return h, nil
}

// writeColumnJSON writes one object: the fields of out, then those of m.
func writeColumnJSON(w io.Writer, out columnOutput, m *water.Metrics) error {
	head, err := json.Marshal(out)
	if err != nil {
		return fmt.Errorf("encoding output: %w", err)
	}
	body, err := json.Marshal(m)
	if err != nil {
		return fmt.Errorf("encoding metrics: %w", err)
	}
	var buf bytes.Buffer
	buf.Write(head[:len(head)-1])
	buf.WriteByte(',')
	buf.Write(body[1:])
	var pretty bytes.Buffer
	if err := json.Indent(&pretty, buf.Bytes(), "", "  "); err != nil {
		return fmt.Errorf("encoding output: %w", err)
	}
	pretty.WriteByte('\n')
	_, err = w.Write(pretty.Bytes())
	return err
}

func fmtNum(x float64, format, unit string) string {
	if math.IsNaN(x) {
		return "none"
	}
	return fmt.Sprintf(format, x) + unit
}

func writeColumnText(w io.Writer, c water.Column, m *water.Metrics, th water.Thresholds, state water.State, reason string, cautions []string) error {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "depth (m)\ttemp (°C)\tdensity (kg/m³)\tTmd (°C)\tN² to next (s⁻²)\t")
	for i, z := range c.Depths {
		n2 := "-"
		if i < len(m.N2) {
			n2 = fmt.Sprintf("%.3e", m.N2[i])
		}
		fmt.Fprintf(tw, "%.2f\t%.3f\t%.4f\t%.3f\t%s\t\n", z, c.Temps[i], m.DensityKgM3[i], m.TmdC[i], n2)
	}
	if err := tw.Flush(); err != nil {
		return err
	}

	basin := "box basin (constant area; no hypsography given)"
	if len(c.Hypsography.Depths) > 0 {
		basin = fmt.Sprintf("hypsography, %d points", len(c.Hypsography.Depths))
	}
	thermo := "none (largest density gradient below " + strconv.FormatFloat(th.ThermoclineMinGrad, 'g', -1, 64) + " kg/m³/m)"
	if !math.IsNaN(m.ThermoclineM) {
		thermo = fmt.Sprintf("%.2f m (metalimnion %.2f-%.2f m)", m.ThermoclineM, m.MetaTopM, m.MetaBottomM)
	}
	heat := fmt.Sprintf("%.1f MJ/m² (cp %g J/kg/K)", m.HeatToTmdJM2/1e6, water.HeatCapacity)
	if m.HeatToTmdJM2 < 0 {
		heat += "; negative: the column is colder than Tmd and must gain heat"
	}
	lines := [][2]string{
		{"density formula", fmt.Sprintf("%s, potential density at surface pressure, salinity %g g/kg", m.Formula, c.Salinity)},
		{"Tmd", "Chen & Millero 1986 at each sensor's own pressure"},
		{"pressure", m.PressureMethod},
		{"column", fmt.Sprintf("0-%.2f m, %s, %d sensors", m.IntegrationDepthM, basin, m.SensorsUsed)},
		{"surface / bottom temperature", fmt.Sprintf("%.3f / %.3f °C", m.SurfaceTempC, m.BottomTempC)},
		{"surface / bottom density", fmt.Sprintf("%.4f / %.4f kg/m³", m.SurfaceDensity, m.BottomDensity)},
		{"bottom − surface density", fmt.Sprintf("%.4f kg/m³", m.DensityDiff)},
		{"mean temperature", fmt.Sprintf("%.3f °C (%s)", m.MeanTempC, m.MeanMethod)},
		{"Schmidt stability", fmt.Sprintf("%.2f J/m² (Idso 1973)", m.SchmidtJM2)},
		{"max N²", fmtNum(m.MaxN2, "%.3e", " s⁻²")},
		{"thermocline", thermo + ", " + m.ThermoclineMethod + " method"},
		{"heat to lose to reach Tmd", heat},
		{"freezing point at surface", fmt.Sprintf("%.3f °C", m.FreezingPointC)},
		{"state", string(state)},
		{"because", reason},
	}
	var b strings.Builder
	b.WriteByte('\n')
	for _, l := range lines {
		fmt.Fprintf(&b, "%-29s %s\n", l[0]+":", l[1])
	}
	for _, c := range cautions {
		fmt.Fprintf(&b, "\ncaution: %s\n", c)
	}
	_, err := io.WriteString(w, b.String())
	return err
}
