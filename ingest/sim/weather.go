package sim

import (
	"math"
	"math/rand/v2"
	"time"
)

// weather is the regional forcing shared by all sites: air temperature,
// wind speed, cloud fraction and incoming shortwave radiation.
type weather struct {
	sc  Scenario
	rng *rand.Rand

	anomC float64 // AR(1) air-temperature anomaly, °C
	windZ float64 // AR(1) standard-normal driver of log wind speed
	cloud float64 // AR(1) standard-normal driver of cloud fraction

	// values at the current model time
	airC     float64 // regional air temperature, °C
	windMS   float64 // regional wind speed at 10 m, m/s
	cloudFr  float64 // cloud fraction 0..1
	swDownWm float64 // incoming shortwave at the surface, W/m²
}

// Memory of the wind and cloud drivers (design choices: synoptic systems pass
// in 1-3 days).
const (
	windMemory  = 36 * time.Hour
	cloudMemory = 30 * time.Hour
)

func newWeather(sc Scenario) *weather {
	w := &weather{sc: sc, rng: rand.New(rand.NewPCG(uint64(sc.Seed), 0x5eed_a1e))}
	// Start the AR(1) processes from their stationary distributions.
	w.anomC = sc.WeatherSigmaC * w.rng.NormFloat64()
	w.windZ = w.rng.NormFloat64()
	w.cloud = w.rng.NormFloat64()
	w.update(sc.Start)
	return w
}

// advance moves the stochastic drivers by dt and evaluates the weather at t.
func (w *weather) advance(t time.Time, dt time.Duration) {
	w.anomC = ar1(w.rng, w.anomC, dt, w.sc.WeatherMemory, w.sc.WeatherSigmaC)
	w.windZ = ar1(w.rng, w.windZ, dt, windMemory, 1)
	w.cloud = ar1(w.rng, w.cloud, dt, cloudMemory, 1)
	w.update(t)
}

// ar1 steps x_{n+1} = φ x_n + σ sqrt(1-φ²) ε with φ = exp(-dt/τ), which keeps
// the stationary standard deviation σ for any step.
func ar1(rng *rand.Rand, x float64, dt, tau time.Duration, sigma float64) float64 {
	phi := math.Exp(-dt.Seconds() / tau.Seconds())
	return phi*x + sigma*math.Sqrt(1-phi*phi)*rng.NormFloat64()
}

func (w *weather) update(t time.Time) {
	w.airC = seasonalAir(w.sc, t) + w.anomC
	hour := float64(t.Hour()) + float64(t.Minute())/60 + float64(t.Second())/3600
	// Wind: log-normal around the mean, a little stronger in the afternoon.
	diel := 1 + 0.2*math.Cos(2*math.Pi*(hour-15)/24)
	w.windMS = w.sc.WindMeanMS * math.Exp(0.45*w.windZ-0.1) * diel
	// Cloud fraction: a clipped normal around the mean.
	w.cloudFr = clamp(w.sc.CloudMean+0.3*w.cloud, 0, 1)
	w.swDownWm = clearSkyShortwave(w.sc.LatitudeDeg, t) * (1 - 0.65*w.cloudFr*w.cloudFr)
}

// seasonalAir is the deterministic part of the air temperature: an annual
// cosine with its minimum on AirColdestDay plus a diel cosine peaking at 15:00.
func seasonalAir(sc Scenario, t time.Time) float64 {
	doy := float64(t.YearDay()) + float64(t.Hour())/24
	hour := float64(t.Hour()) + float64(t.Minute())/60
	season := -sc.AirAmpC * math.Cos(2*math.Pi*(doy-float64(sc.AirColdestDay))/365.25)
	diel := sc.DielAmpC * math.Cos(2*math.Pi*(hour-15)/24)
	return sc.AirMeanC + season + diel
}

// clearSkyShortwave returns the clear-sky shortwave irradiance on a horizontal
// surface (W/m²) at latitude latDeg, time t (UTC taken as solar time).
// Solar constant 1361 W/m² (Kopp & Lean 2011) [M]; declination by Cooper
// (1969) δ = 23.45° sin(2π(284+n)/365) [M]; broadband atmospheric
// transmissivity 0.8 per air mass, air mass 1/sin(elevation) [M].
// Cloud reduction applied by the caller: (1 − 0.65 C²) (Laevastu 1960) [M].
func clearSkyShortwave(latDeg float64, t time.Time) float64 {
	n := float64(t.YearDay())
	decl := 23.45 * math.Pi / 180 * math.Sin(2*math.Pi*(284+n)/365)
	lat := latDeg * math.Pi / 180
	hour := float64(t.Hour()) + float64(t.Minute())/60 + float64(t.Second())/3600
	ha := (hour - 12) * 15 * math.Pi / 180
	sinH := math.Sin(lat)*math.Sin(decl) + math.Cos(lat)*math.Cos(decl)*math.Cos(ha)
	if sinH <= 0 {
		return 0
	}
	return 1361 * sinH * math.Pow(0.8, 1/math.Max(sinH, 0.05))
}

func clamp(x, lo, hi float64) float64 {
	if x < lo {
		return lo
	}
	if x > hi {
		return hi
	}
	return x
}
