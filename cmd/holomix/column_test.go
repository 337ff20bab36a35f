package main

import (
	"bytes"
	"context"
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

func runColumnArgs(t *testing.T, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	var out, errb bytes.Buffer
	e := &env{stdin: strings.NewReader(""), stdout: &out, stderr: &errb, getenv: func(string) string { return "" }}
	code = runColumn(context.Background(), e, args)
	return code, out.String(), errb.String()
}

type columnJSON struct {
	State        string     `json:"state"`
	StateReason  string     `json:"state_reason"`
	DepthsM      []float64  `json:"depths_m"`
	TempsC       []float64  `json:"temps_c"`
	Formula      string     `json:"formula"`
	MeanMethod   string     `json:"mean_method"`
	Thermocline  *float64   `json:"thermocline_m"`
	MetaTop      *float64   `json:"metalimnion_top_m"`
	MetaBottom   *float64   `json:"metalimnion_bottom_m"`
	Schmidt      float64    `json:"schmidt_j_m2"`
	N2           []float64  `json:"n2_s2"`
	TmdC         []float64  `json:"tmd_c"`
	Density      []*float64 `json:"density_kg_m3"`
	Cautions     []string   `json:"cautions"`
	SensorsUsed  int        `json:"sensors_used"`
	Pressure     string     `json:"pressure_method"`
	HeatToTmdJM2 float64    `json:"heat_to_tmd_j_m2"`
}

func columnJSONRun(t *testing.T, args ...string) columnJSON {
	t.Helper()
	code, out, errs := runColumnArgs(t, append(args, "--json")...)
	if code != 0 {
		t.Fatalf("exit %d, stderr: %s", code, errs)
	}
	var j columnJSON
	if err := json.Unmarshal([]byte(out), &j); err != nil {
		t.Fatalf("output is not JSON: %v\n%s", err, out)
	}
	return j
}

// Summer profile in an invented lake: warm epilimnion over a sharp thermocline
// between the 5 m and 8 m sensors (SCIENCE.md §5 stratified: Woolway et al. 2021
// [M threshold]; thermocline by the density-gradient method, Read et al. 2011 [M]).
func TestColumn_SummerStratified(t *testing.T) {
	args := []string{"--depths", "0.5,2,5,8,12,20", "--temps", "22.4,22.1,21.6,12.5,8.2,6.9"}
	j := columnJSONRun(t, args...)
	if j.State != "stratified" || !strings.Contains(j.StateReason, "denser than the surface") {
		t.Errorf("state %q (%s), want stratified", j.State, j.StateReason)
	}
	if j.Thermocline == nil || *j.Thermocline <= 5 || *j.Thermocline >= 8 {
		t.Errorf("thermocline %v, want between the 5 m and 8 m sensors", j.Thermocline)
	}
	if j.MetaTop == nil || j.MetaBottom == nil || *j.MetaTop > *j.Thermocline || *j.MetaBottom < *j.Thermocline {
		t.Errorf("metalimnion %v-%v around thermocline %v", j.MetaTop, j.MetaBottom, j.Thermocline)
	}
	if j.Schmidt <= 0 || len(j.N2) != 5 || j.SensorsUsed != 6 || j.Formula != "CIPM-2001" || j.MeanMethod != "depth-weighted" {
		t.Errorf("metrics: %+v", j)
	}
	if len(j.DepthsM) != 6 || j.TempsC[0] != 22.4 || len(j.Cautions) != 0 {
		t.Errorf("inputs echoed wrongly or unexpected cautions: %+v", j)
	}

	code, out, errs := runColumnArgs(t, args...)
	if code != 0 {
		t.Fatalf("text: exit %d, %s", code, errs)
	}
	for _, want := range []string{"depth (m)", "density (kg/m³)", "Tmd (°C)", "N² to next (s⁻²)", "Schmidt stability:", "J/m²",
		"thermocline:", "CIPM-2001", "box basin", "state:", "stratified", "because:", "1 dbar per metre"} {
		if !strings.Contains(out, want) {
			t.Errorf("text output lacks %q:\n%s", want, out)
		}
	}
}

// Autumn: isothermal 3.95 °C from 0.5 to 20 m is within ±0.3 °C of Tmd at every
// sensor's own pressure (Chen & Millero 1986; δ is a design choice, SCIENCE.md §5).
func TestColumn_AutumnMaxDensity(t *testing.T) {
	j := columnJSONRun(t, "--depths", "0.5,2,5,10,20", "--temps", "3.95,3.95,3.95,3.95,3.95")
	if j.State != "max_density" {
		t.Errorf("state %q (%s), want max_density", j.State, j.StateReason)
	}
	if j.Thermocline != nil || math.Abs(j.Schmidt) > 1e-9 {
		t.Errorf("isothermal column: thermocline %v, Schmidt %g; want none and 0", j.Thermocline, j.Schmidt)
	}
	if len(j.TmdC) != 5 || !(j.TmdC[4] < j.TmdC[0]) {
		t.Errorf("Tmd per sensor %v should fall with depth", j.TmdC)
	}
}

// Winter: 0.2 °C at 1 m over 3.9 °C at 20 m is inverse stratification
// (Pierson et al. 2011 method, SCIENCE.md §5) and carries the ice caution.
func TestColumn_WinterInverse(t *testing.T) {
	dir := t.TempDir()
	hyps := filepath.Join(dir, "basin.csv")
	if err := os.WriteFile(hyps, []byte("depth_m,area_m2\n0,400000\n5,300000\n10,180000\n15,80000\n22,0\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	args := []string{"--depths", "1,3,6,10,15,20", "--temps", "0.2,1.6,2.8,3.4,3.7,3.9", "--hypsography", hyps, "--max-depth", "22"}
	j := columnJSONRun(t, args...)
	if j.State != "inverse" {
		t.Errorf("state %q (%s), want inverse", j.State, j.StateReason)
	}
	if j.MeanMethod != "volume-weighted" || j.HeatToTmdJM2 >= 0 {
		t.Errorf("mean method %q, heat %g: want volume-weighted and negative heat", j.MeanMethod, j.HeatToTmdJM2)
	}
	if len(j.Cautions) != 1 || !strings.Contains(j.Cautions[0], "no ice is guaranteed safe") {
		t.Errorf("cautions %q, want the ice caution", j.Cautions)
	}
	code, out, _ := runColumnArgs(t, args...)
	if code != 0 || !strings.Contains(out, "inverse") || !strings.Contains(out, "caution: Ice is inferred") || !strings.Contains(out, "must gain heat") {
		t.Errorf("text output (exit %d):\n%s", code, out)
	}
}

func TestColumn_BadInputExit2(t *testing.T) {
	dir := t.TempDir()
	badHyps := filepath.Join(dir, "bad.csv")
	if err := os.WriteFile(badHyps, []byte("depth_m,area_m2\n0,100\n5,abc\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	noHeader := filepath.Join(dir, "noheader.csv")
	if err := os.WriteFile(noHeader, []byte("0,100\n5,50\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		args []string
		want string
	}{
		{[]string{"--depths", "0.5,2,x", "--temps", "1,2,3"}, `value 3 "x" is not a finite number`},
		{[]string{"--depths", "0.5,2,5", "--temps", "1,2"}, "3 depths but 2 temperatures"},
		{[]string{"--depths", "5,2,0.5", "--temps", "1,2,3"}, "strictly ascending"},
		{[]string{"--depths", "0.5,2,5", "--temps", "1,NaN,3"}, "not a finite number"},
		{[]string{"--depths", "0.5,2,5", "--temps", "1,2,3", "--salinity", "-3"}, "salinity"},
		{[]string{"--depths", "0.5,2,5", "--temps", "1,2,3", "--max-depth", "4"}, "deeper than the maximum depth"},
		{[]string{"--temps", "1,2,3"}, "--depths and --temps are both required"},
		{[]string{"--depths", "0.5,2,5", "--temps", "1,2,3", "--bogus"}, "flag provided but not defined"},
		{[]string{"--depths", "0.5,2,5", "--temps", "1,2,3", "extra"}, "unexpected argument"},
		{[]string{"--depths", "0.5,2,5", "--temps", "1,2,3", "--hypsography", badHyps}, "line 3"},
		{[]string{"--depths", "0.5,2,5", "--temps", "1,2,3", "--hypsography", noHeader}, "want depth_m,area_m2"},
		{[]string{"--depths", "0.5,2,5", "--temps", "1,2,3", "--hypsography", filepath.Join(dir, "missing.csv")}, "no such file"},
	} {
		code, out, errs := runColumnArgs(t, tc.args...)
		if code != 2 || !strings.Contains(errs, tc.want) || out != "" {
			t.Errorf("%q: exit %d, stderr %q, stdout %q; want exit 2 with %q", tc.args, code, errs, out, tc.want)
		}
	}
	if code, _, _ := runColumnArgs(t, "-h"); code != 0 {
		t.Errorf("-h: exit %d, want 0", code)
	}
}
