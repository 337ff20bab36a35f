package water

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"math"
	"os"
	"os/exec"
	"testing"
	"time"
)

// pythonGSW is the system interpreter that has Debian's python3-gsw (TEOS-10).
const pythonGSW = "/usr/bin/python3"

const gswMissing = "install python3-gsw: apt-get install -y python3-gsw"

// gswScript reads a grid as JSON on stdin and writes TEOS-10 results as JSON:
// in-situ density gsw.rho(SA, CT, p) with SA = SA_from_SP(SP, p, 0, 0) and
// CT = CT_from_t(SA, t, p); the in-situ temperature of maximum density, the
// argmax over t of gsw.rho_t_exact found by bisection on the sign of the
// centred slope (not CT_maxdensity, which is a Conservative Temperature); and
// the isobaric heat capacity cp_t_exact of pure water at the surface.
const gswScript = `
import sys, json
try:
    import gsw
    import numpy as np
except ImportError as e:
    sys.stderr.write("import failed: %s\n" % e)
    sys.exit(3)
q = json.load(sys.stdin)
lon, lat = 0.0, 0.0
d = np.array(q["density"], dtype=float)
SA = gsw.SA_from_SP(d[:, 0], d[:, 2], lon, lat)
CT = gsw.CT_from_t(SA, d[:, 1], d[:, 2])
rho = gsw.rho(SA, CT, d[:, 2])
m = np.array(q["tmd"], dtype=float)
SAm = gsw.SA_from_SP(m[:, 0], m[:, 1], lon, lat)
lo = np.full(len(m), -2.0)
hi = np.full(len(m), 15.0)
h = 1e-3
for _ in range(60):
    mid = 0.5 * (lo + hi)
    up = gsw.rho_t_exact(SAm, mid + h, m[:, 1]) - gsw.rho_t_exact(SAm, mid - h, m[:, 1]) > 0
    lo = np.where(up, mid, lo)
    hi = np.where(up, hi, mid)
tmd = 0.5 * (lo + hi)
cp_t = np.array(q["cp_t"], dtype=float)
cp = gsw.cp_t_exact(np.zeros(len(cp_t)), cp_t, np.zeros(len(cp_t)))
json.dump({"rho": rho.tolist(), "tmd": tmd.tolist(), "cp": cp.tolist(), "version": gsw.__version__}, sys.stdout)
`

type gswQuery struct {
	Density [][3]float64 `json:"density"` // SP, t (ITS-90 °C), p (dbar)
	Tmd     [][2]float64 `json:"tmd"`     // SP, p (dbar)
	CpT     []float64    `json:"cp_t"`    // t (°C)
}

type gswAnswer struct {
	Rho     []float64 `json:"rho"`
	Tmd     []float64 `json:"tmd"`
	Cp      []float64 `json:"cp"`
	Version string    `json:"version"`
}

func runGSW(t *testing.T, q gswQuery) gswAnswer {
	t.Helper()
	if _, err := os.Stat(pythonGSW); err != nil {
		t.Fatalf("%s not found (%v): %s", pythonGSW, err, gswMissing)
	}
	in, err := json.Marshal(q)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	cmd := exec.CommandContext(ctx, pythonGSW, "-c", gswScript)
	cmd.Stdin = bytes.NewReader(in)
	var stdout, stderr bytes.Buffer
	cmd.Stdout, cmd.Stderr = &stdout, &stderr
	if err := cmd.Run(); err != nil {
		var ee *exec.ExitError
		if errors.As(err, &ee) && ee.ExitCode() == 3 {
			t.Fatalf("%s (%s)", gswMissing, bytes.TrimSpace(stderr.Bytes()))
		}
		t.Fatalf("TEOS-10 script failed: %v\n%s", err, stderr.Bytes())
	}
	var a gswAnswer
	if err := json.Unmarshal(stdout.Bytes(), &a); err != nil {
		t.Fatalf("TEOS-10 output: %v\n%s", err, stdout.Bytes())
	}
	if len(a.Rho) != len(q.Density) || len(a.Tmd) != len(q.Tmd) || len(a.Cp) != len(q.CpT) {
		t.Fatalf("TEOS-10 output sizes %d/%d/%d, want %d/%d/%d", len(a.Rho), len(a.Tmd), len(a.Cp), len(q.Density), len(q.Tmd), len(q.CpT))
	}
	return a
}

// Cross-check against TEOS-10 (IOC/SCOR/IAPSO 2010, Debian python3-gsw):
//   - Density (CIPM 2001 / EOS-80) over S 0-1, t 0-30 °C, p 0-100 dbar within 0.01 kg/m³;
//   - TmdEOS80 within 0.02 °C of the in-situ argmax of TEOS-10 density;
//   - Tmd (Chen & Millero 1986) against the same argmax, within 0.02 °C as well;
//   - the constant HeatCapacity within 1 % of TEOS-10 cp of pure water 0-30 °C.
func TestCrossCheck_TEOS10(t *testing.T) {
	var q gswQuery
	for _, s := range []float64{0, 0.1, 0.25, 0.5, 1} {
		for _, tc := range []float64{0, 0.5, 1, 2, 3, 4, 5, 6, 8, 10, 12, 15, 18, 20, 25, 30} {
			for _, p := range []float64{0, 5, 10, 25, 50, 75, 100} {
				q.Density = append(q.Density, [3]float64{s, tc, p})
			}
		}
		for _, p := range []float64{0, 10, 25, 50, 75, 100} {
			q.Tmd = append(q.Tmd, [2]float64{s, p})
		}
	}
	q.CpT = []float64{0, 4, 10, 20, 30}
	a := runGSW(t, q)
	t.Logf("TEOS-10 via gsw %s: %d densities, %d Tmd points", a.Version, len(a.Rho), len(a.Tmd))

	worst := 0.0
	for i, g := range q.Density {
		rho, f := Density(g[0], g[1], g[2])
		d := rho - a.Rho[i]
		if math.Abs(d) > math.Abs(worst) {
			worst = d
		}
		if math.Abs(d) > 0.01 {
			t.Errorf("Density(S=%g, t=%g °C, p=%g dbar) = %.5f (%s), TEOS-10 %.5f: off by %.4f kg/m³", g[0], g[1], g[2], rho, f, a.Rho[i], d)
		}
	}
	t.Logf("density: largest difference from TEOS-10 %.4f kg/m³", worst)

	worstEOS, worstCM := 0.0, 0.0
	for i, g := range q.Tmd {
		ref := a.Tmd[i]
		dEOS := TmdEOS80(g[0], g[1]) - ref
		dCM := Tmd(g[0], g[1]) - ref
		if math.Abs(dEOS) > math.Abs(worstEOS) {
			worstEOS = dEOS
		}
		if math.Abs(dCM) > math.Abs(worstCM) {
			worstCM = dCM
		}
		if math.Abs(dEOS) > 0.02 {
			t.Errorf("TmdEOS80(S=%g, p=%g dbar) = %.4f °C, TEOS-10 in-situ argmax %.4f °C: off by %.4f", g[0], g[1], TmdEOS80(g[0], g[1]), ref, dEOS)
		}
		if math.Abs(dCM) > 0.02 {
			t.Errorf("Tmd Chen & Millero (S=%g, p=%g dbar) = %.4f °C, TEOS-10 in-situ argmax %.4f °C: off by %.4f", g[0], g[1], Tmd(g[0], g[1]), ref, dCM)
		}
	}
	t.Logf("Tmd: largest difference from the TEOS-10 in-situ argmax: EOS-80 argmax %.4f °C, Chen & Millero %.4f °C", worstEOS, worstCM)
	// SCIENCE.md §3 [C]: TEOS-10 gives 3.9789 / 3.7779 °C as the in-situ argmax at S = 0, 0 and 100 dbar.
	near(t, "TEOS-10 in-situ argmax at S=0, 0 dbar", a.Tmd[0], 3.9789, 1e-4)
	near(t, "TEOS-10 in-situ argmax at S=0, 100 dbar", a.Tmd[5], 3.7779, 1e-4)

	for i, tc := range q.CpT {
		if r := HeatCapacity/a.Cp[i] - 1; math.Abs(r) > 0.01 {
			t.Errorf("HeatCapacity %g vs TEOS-10 cp %.1f J/kg/K at %g °C: %.2f %%", HeatCapacity, a.Cp[i], tc, 100*r)
		}
	}
	t.Logf("TEOS-10 cp of pure water at 0/4/10/20/30 °C: %.1f", a.Cp)
}
