package detect

import (
	"math"
	"math/rand/v2"
	"time"
)

// synthLake generates an invented lake's year of thermistor profiles from a
// simple piecewise model (no measured data): summer stratification with a
// deepening mixed layer, fall overturn, cooling of the mixed column to about
// Tmd, open-water cooling of the surface below Tmd, ice cover (sheltered,
// inversely stratified, the bottom near Tmd), ice-off with spring mixing, and
// spring stratification. Open water carries a diel cycle near the surface and
// wind stirring; under ice both vanish. Readings get seeded uniform noise
// (or normal noise, see Gauss).
type synthLake struct {
	H       float64   // m, depth
	Depths  []float64 // sensor depths
	Start   time.Time
	Th      float64 // °C, summer hypolimnion
	K       float64 // °C/day, fall cooling rate
	DOver   float64 // day the epilimnion reaches Th (mixed layer at the bottom)
	D4      float64 // day the mixed column reaches 4 °C
	DIce    float64 // day ice forms
	DOff    float64 // day the ice goes
	DStrat  float64 // day spring warming of the surface layer starts
	DEnd    float64
	Noise   float64 // °C, half-width of the uniform noise
	Gauss   float64 // °C, standard deviation of normal noise used instead when > 0
	phases  [3]float64
	TBotIce float64 // °C, bottom under ice
}

const synthPeakDay = 31 // Aug 1: warmest surface

func newSynthLake(h float64, seed uint64) *synthLake {
	l := &synthLake{H: h, Start: time.Date(2023, 7, 1, 0, 0, 0, 0, time.UTC), Noise: 0.02}
	for z := 0.5; z < h; z++ {
		l.Depths = append(l.Depths, z)
	}
	if h <= 10 {
		l.Th, l.K, l.TBotIce = 10, 0.17, 3.7
	} else {
		l.Th, l.K, l.TBotIce = 8, 0.15, 3.93
	}
	l.DOver = synthPeakDay + (23-l.Th)/l.K
	l.D4 = synthPeakDay + (23-4)/l.K
	if h <= 10 {
		l.DIce = l.D4 + 6 // a shallow body freezes first
	} else {
		l.DIce = l.D4 + 9
	}
	l.DOff = 283 // Apr 10
	l.DStrat = l.DOff + 15
	l.DEnd = l.DStrat + 20
	r := rand.New(rand.NewPCG(seed, 7))
	for i := range l.phases {
		l.phases[i] = r.Float64() * 2 * math.Pi
	}
	return l
}

func (l *synthLake) day(t time.Time) float64 { return t.Sub(l.Start).Hours() / 24 }
func (l *synthLake) at(d float64) time.Time {
	return l.Start.Add(time.Duration(d * 24 * float64(time.Hour)))
}

// surface is the forcing temperature of the surface layer, °C.
func (l *synthLake) surface(d float64) float64 {
	if d < synthPeakDay {
		return 22 + d/synthPeakDay
	}
	return 23 - l.K*(d-synthPeakDay)
}

// open reports whether the lake is free of ice on day d.
func (l *synthLake) open(d float64) bool { return d < l.DIce || d >= l.DOff }

// underIce is the profile under ice: cold water under the ice over a bottom near Tmd.
func (l *synthLake) underIce(d, z float64) float64 {
	top := 1.48 - 0.9*(d-l.DIce)/(l.DOff-l.DIce)
	return l.TBotIce - (l.TBotIce-top)*math.Exp(-(z-0.5)/1.5)
}

// clean is the noise-free temperature at depth z on day d.
func (l *synthLake) clean(d, z float64) float64 {
	hour := math.Mod(d*24, 24)
	diel := 0.4 * math.Exp(-z/1.0) * math.Sin(2*math.Pi*(hour-9)/24)
	wind := 0.05 * (math.Sin(2*math.Pi*d*24/5+l.phases[0]+0.1*z) + math.Sin(2*math.Pi*d*24/7.3+l.phases[1]+0.07*z) +
		math.Sin(2*math.Pi*d*24/11+l.phases[2]))
	switch {
	case d < l.DOver: // stratified, mixed layer deepening towards the bottom
		te := l.surface(d)
		frac := (23 - te) / (23 - l.Th)
		if d < synthPeakDay {
			frac = 0
		}
		zm := 4 + (l.H-4)*frac*frac + 0.3*math.Sin(2*math.Pi*d*24/12)
		base := l.Th + (te-l.Th)*0.5*(1-math.Tanh((z-zm)/1.5))
		if z < zm {
			return base + diel + wind
		}
		return base
	case d < l.D4: // mixed column cooling
		return l.surface(d) + diel + wind
	case d < l.DIce: // open water: the surface cools below Tmd, the bottom stays near it
		top := 3.98 - 2.5*(d-l.D4)/(l.DIce-l.D4)
		bot := 3.98 - (3.98-l.TBotIce)*(d-l.D4)/(l.DIce-l.D4)
		return bot - (bot-top)*math.Exp(-(z-0.5)/1.5) + diel + wind
	case d < l.DOff: // ice: sheltered, no diel cycle and no wind
		return l.underIce(d, z)
	case d < l.DOff+3: // ice-off: wind mixes the column towards a uniform 3.9 °C
		f := (d - l.DOff) / 3
		return (1-f)*l.underIce(l.DOff, z) + f*3.9 + diel + wind
	case d < l.DStrat: // mixed, warming through Tmd
		return 3.9 + 0.2*(d-l.DOff-3) + diel + wind
	default: // spring stratification: the top 3 m warm faster than below
		tc := 3.9 + 0.2*(l.DStrat-l.DOff-3)
		te := tc + 0.5*(d-l.DStrat)
		return tc + (te-tc)*0.5*(1-math.Tanh((z-3)/1.0)) + diel*boolF(z < 3) + wind*boolF(z < 3)
	}
}

func boolF(b bool) float64 {
	if b {
		return 1
	}
	return 0
}

// profiles generates profiles every step from day d0 to d1 with noise from seed.
func (l *synthLake) profiles(site string, step time.Duration, d0, d1 float64, seed uint64) []Profile {
	r := rand.New(rand.NewPCG(seed, 99))
	var out []Profile
	for t := l.at(d0); t.Before(l.at(d1)); t = t.Add(step) {
		d := l.day(t)
		p := Profile{Site: site, Time: t, Depths: l.Depths, Temps: make([]float64, len(l.Depths))}
		for i, z := range l.Depths {
			if l.Gauss > 0 {
				p.Temps[i] = l.clean(d, z) + l.Gauss*r.NormFloat64()
			} else {
				p.Temps[i] = l.clean(d, z) + l.Noise*(2*r.Float64()-1)
			}
		}
		out = append(out, p)
	}
	return out
}

// cleanProfile is the noise-free profile at t.
func (l *synthLake) cleanProfile(site string, t time.Time) Profile {
	d := l.day(t)
	p := Profile{Site: site, Time: t, Depths: l.Depths, Temps: make([]float64, len(l.Depths))}
	for i, z := range l.Depths {
		p.Temps[i] = l.clean(d, z)
	}
	return p
}
