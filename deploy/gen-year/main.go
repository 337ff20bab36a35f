// Command gen-year writes a synthetic year of thermistor-chain data for the
// replay benchmark: one reading per minute at 24 depths (0.5 to 23.5 m) of an
// invented dimictic lake, "Lake Tessary" (25 m deep), as gzip-compressed CSV.
//
//	go run ./deploy/gen-year -o /tmp/year.csv.gz            # wide: time, site, temp_0.5 … temp_23.5
//	go run ./deploy/gen-year -o /tmp/year-long.csv.gz -long # long: time, site, depth_m, temp_c
//
// The year follows the textbook cycle, so the detectors have something to
// find: inverse stratification under ice until early April, spring overturn,
// summer stratification with a deepening thermocline, fall overturn late in
// October, cooling through 4 °C in November and ice again from mid-December.
// The numbers are invented (not a real lake), with a diel cycle near the
// surface and 0.005 °C of sensor noise, rounded to 0.001 °C. The output is
// deterministic for a given -seed.
package main

import (
	"bufio"
	"compress/gzip"
	"flag"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"strconv"
	"time"
)

func main() {
	out := flag.String("o", "", "output file (gzip CSV); required")
	long := flag.Bool("long", false, "long format (one reading per row) instead of wide")
	year := flag.Int("year", 2023, "calendar year to generate")
	step := flag.Duration("step", time.Minute, "sampling interval")
	seed := flag.Uint64("seed", 1, "noise seed")
	flag.Parse()
	if *out == "" || *step <= 0 {
		fmt.Fprintln(os.Stderr, "usage: gen-year -o FILE.csv.gz [-long] [-year 2023] [-step 1m] [-seed 1]")
		os.Exit(2)
	}
	n, err := writeFile(*out, *year, *step, *seed, *long)
	if err != nil {
		fmt.Fprintf(os.Stderr, "gen-year: %v\n", err)
		os.Exit(1)
	}
	fmt.Fprintf(os.Stderr, "gen-year: %d readings written to %s\n", n, *out)
}

// Depths of the chain, m.
func depths() []float64 {
	d := make([]float64, 24)
	for i := range d {
		d[i] = 0.5 + float64(i)
	}
	return d
}

const siteName = "Lake Tessary"

func writeFile(path string, year int, step time.Duration, seed uint64, long bool) (int64, error) {
	f, err := os.Create(path)
	if err != nil {
		return 0, err
	}
	n, werr := write(f, year, step, seed, long)
	if cerr := f.Close(); werr == nil {
		werr = cerr
	}
	return n, werr
}

func write(w io.Writer, year int, step time.Duration, seed uint64, long bool) (int64, error) {
	zw, err := gzip.NewWriterLevel(w, gzip.BestSpeed)
	if err != nil {
		return 0, err
	}
	bw := bufio.NewWriterSize(zw, 1<<20)
	ds := depths()
	rng := rand.New(rand.NewPCG(seed, 0x7e55a1))
	if long {
		bw.WriteString("datetime_utc,site,depth_m,temp_c\n")
	} else {
		bw.WriteString("datetime_utc,site")
		for _, d := range ds {
			bw.WriteString(",temp_" + strconv.FormatFloat(d, 'f', -1, 64))
		}
		bw.WriteByte('\n')
	}
	start := time.Date(year, 1, 1, 0, 0, 0, 0, time.UTC)
	end := start.AddDate(1, 0, 0)
	var n int64
	var line []byte
	temps := make([]float64, len(ds))
	for t := start; t.Before(end); t = t.Add(step) {
		doy := t.Sub(start).Hours() / 24
		hour := float64(t.Hour()) + float64(t.Minute())/60
		profile(doy, hour, ds, temps)
		ts := t.Format(time.RFC3339)
		if long {
			for i, d := range ds {
				line = append(line[:0], ts...)
				line = append(line, ","+siteName+","...)
				line = strconv.AppendFloat(line, d, 'f', -1, 64)
				line = append(line, ',')
				line = strconv.AppendFloat(line, round3(temps[i]+rng.NormFloat64()*0.005), 'f', -1, 64)
				line = append(line, '\n')
				bw.Write(line)
				n++
			}
			continue
		}
		line = append(line[:0], ts...)
		line = append(line, ","+siteName...)
		for i := range ds {
			line = append(line, ',')
			line = strconv.AppendFloat(line, round3(temps[i]+rng.NormFloat64()*0.005), 'f', -1, 64)
			n++
		}
		line = append(line, '\n')
		if _, err := bw.Write(line); err != nil {
			return n, err
		}
	}
	if err := bw.Flush(); err != nil {
		return n, err
	}
	return n, zw.Close()
}

func round3(x float64) float64 { return math.Round(x*1000) / 1000 }

// Season boundaries, day of year (0 = Jan 1).
const (
	iceOff      = 95.0  // early April
	stratOnset  = 130.0 // mid-May
	fallTurn    = 300.0 // late October
	iceOn       = 345.0 // mid-December
	blendDays   = 2.0
	bottomUnder = 3.4 // °C under ice in January
)

// profile fills temps (°C) at depths ds for day of year doy and hour of day.
func profile(doy, hour float64, ds, temps []float64) {
	// Each phase gives a profile; near a boundary the two are blended over
	// blendDays so that no sensor jumps.
	phase := func(d float64, z float64) float64 {
		switch {
		case d < iceOff:
			return underIce(bottomUnder+(3.8-bottomUnder)*d/iceOff, z)
		case d < stratOnset:
			// Spring mixing: the whole column warms from 3.6 to 6 °C.
			return 3.6 + (d-iceOff)*(6-3.6)/(stratOnset-iceOff) + 0.05*math.Exp(-z/2)
		case d < fallTurn:
			x := (d - stratOnset) / (fallTurn - stratOnset)
			tb := 6 + 1.7*x
			te := tb + 18*math.Pow(math.Sin(math.Pi*x), 0.8)
			zt := 3 + 9*math.Pow(x, 1.5)
			return tb + (te-tb)/(1+math.Exp((z-zt)/0.8))
		case d < iceOn:
			// Fall mixing: the column cools from 7.7 °C through 4 °C to 3.2 °C.
			return 7.7 - (d-fallTurn)*(7.7-3.2)/(iceOn-fallTurn) - 0.03*math.Exp(-z/2)
		default:
			return underIce(3.2+0.2*(d-iceOn)/(365-iceOn), z)
		}
	}
	var b0, b1 float64 = -1, -1
	for _, b := range []float64{iceOff, stratOnset, fallTurn, iceOn} {
		if math.Abs(doy-b) < blendDays/2 {
			b0, b1 = b-blendDays/2, b+blendDays/2
		}
	}
	open := doy >= iceOff && doy < iceOn
	for i, z := range ds {
		v := phase(doy, z)
		if b0 >= 0 {
			w := (doy - b0) / (b1 - b0)
			v = (1-w)*phase(b0-1e-9, z) + w*phase(b1, z)
		}
		if open {
			v += 0.3 * math.Sin(2*math.Pi*(hour-9)/24) * math.Exp(-z/1.5)
		}
		temps[i] = v
	}
}

// underIce is inverse stratification: near 0 °C under the ice, bottom at tb.
func underIce(tb, z float64) float64 {
	return tb - (tb-0.2)*math.Exp(-z/1.2)
}
