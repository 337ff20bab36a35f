package water

import (
	"fmt"
	"math"
)

// Classify returns the instantaneous state of the column c whose metrics m were
// filled by Compute, with the reason as a short sentence. The criteria are those
// of SCIENCE.md §5 with the thresholds th, tested in this order:
//
//   - unknown: fewer than th.MinSensors depths, no sensor at or above
//     th.MinSurfaceDepth, or the sensors span (deepest − shallowest) less than
//     th.MinCoverage of the maximum depth (c.MaxDepth, else the integration
//     depth of m); the reason says which. Also when m does not match c.
//   - inverse: the top sensor at least th.InverseDeltaT colder than the bottom
//     one, the top lighter than the bottom and the bottom at or below its Tmd:
//     cold water resting on water near 4 °C, as under ice (Pierson et al. 2011).
//   - stratified: bottom − surface potential density above th.StratDensityDiff
//     with the surface warmer (Woolway et al. 2021 [M threshold]).
//   - max_density: neither of those, and every sensor within ±th.TmdDelta of
//     Tmd at its own pressure.
//   - mixed: otherwise.
func Classify(c Column, m *Metrics, th Thresholds) (State, string) {
	n := len(c.Depths)
	if m == nil || len(c.Temps) != n || len(m.DensityKgM3) != n || len(m.TmdC) != n {
		return StateUnknown, "metrics were not computed for this column"
	}
	if n < th.MinSensors || n == 0 {
		return StateUnknown, fmt.Sprintf("only %d sensor depth(s); at least %d are needed", n, th.MinSensors)
	}
	if top := c.Depths[0]; top > th.MinSurfaceDepth {
		return StateUnknown, fmt.Sprintf("shallowest sensor is at %.2f m; one within the top %.2f m is needed", top, th.MinSurfaceDepth)
	}
	maxDepth := c.MaxDepth
	if maxDepth <= 0 {
		maxDepth = m.IntegrationDepthM
	}
	if maxDepth <= 0 {
		maxDepth = c.Depths[n-1]
	}
	span := c.Depths[n-1] - c.Depths[0]
	if maxDepth > 0 && span < th.MinCoverage*maxDepth {
		return StateUnknown, fmt.Sprintf("sensors span %.2f m of the %.2f m column (%.0f %%); at least %.0f %% is needed",
			span, maxDepth, 100*span/maxDepth, 100*th.MinCoverage)
	}

	tTop, tBot := c.Temps[0], c.Temps[n-1]
	rTop, rBot := m.DensityKgM3[0], m.DensityKgM3[n-1]
	tmdBot := m.TmdC[n-1]
	if tBot-tTop >= th.InverseDeltaT && rTop < rBot && tBot <= tmdBot {
		return StateInverse, fmt.Sprintf("top %.2f °C is %.2f °C colder and %.3f kg/m³ lighter than the bottom %.2f °C, which is at or below its Tmd %.2f °C: cold water over water near 4 °C",
			tTop, tBot-tTop, rBot-rTop, tBot, tmdBot)
	}
	diff := rBot - rTop
	if diff > th.StratDensityDiff && tTop > tBot {
		return StateStratified, fmt.Sprintf("bottom water is %.3f kg/m³ denser than the surface (threshold %.3g) and the surface is warmer (%.2f °C over %.2f °C)",
			diff, th.StratDensityDiff, tTop, tBot)
	}

	worst, worstAt := 0.0, 0
	for i, t := range c.Temps {
		if d := math.Abs(t - m.TmdC[i]); d > worst {
			worst, worstAt = d, i
		}
	}
	if worst <= th.TmdDelta {
		return StateMaxDensity, fmt.Sprintf("not stratified, and every sensor is within ±%.2f °C of its Tmd (largest departure %.2f °C at %.2f m)",
			th.TmdDelta, worst, c.Depths[worstAt])
	}
	if diff < -th.StratDensityDiff {
		return StateMixed, fmt.Sprintf("the surface is %.3f kg/m³ denser than the bottom: statically unstable, the column is overturning", -diff)
	}
	return StateMixed, fmt.Sprintf("bottom − surface density %.3f kg/m³ is within the %.3g threshold and no inverse layering; largest departure from Tmd %.2f °C at %.2f m",
		diff, th.StratDensityDiff, worst, c.Depths[worstAt])
}
