package detect

import (
	"fmt"
	"math/rand/v2"
	"path/filepath"
	"testing"
	"time"
)

func stepTen(ps []Profile, sigma float64, seed uint64) []Profile {
	r := rand.New(rand.NewPCG(seed, 5))
	var out []Profile
	for i, a := range ps {
		n := 1
		if i+1 < len(ps) && ps[i+1].Time.Sub(a.Time) == time.Hour {
			n = 6
		}
		for j := 0; j < n; j++ {
			p := Profile{Site: a.Site, Time: a.Time.Add(time.Duration(j) * 10 * time.Minute), Depths: a.Depths, Temps: make([]float64, len(a.Temps))}
			for k := range p.Temps {
				p.Temps[k] = a.Temps[k] + sigma*r.NormFloat64()
			}
			out = append(out, p)
		}
	}
	return out
}

func TestZZSeeds(t *testing.T) {
	winters := bogWinters(t)
	for _, mode := range []string{"step", "interp"} {
		for _, lk := range []struct {
			lake string
			y    int
			md   float64
		}{{"Crystal Bog", 2016, 2.5}, {"Crystal Bog", 2017, 2.5}, {"Crystal Bog", 2018, 2.5}, {"Trout Bog", 2017, 7.9}, {"Trout Bog", 2018, 7.9}} {
			line := fmt.Sprintf("%-6s %s %d:", mode, lk.lake, lk.y)
			for seed := uint64(0); seed <= 6; seed++ {
				cfg := DefaultSiteConfig(siteID(lk.lake))
				cfg.MaxDepth = lk.md
				s := NewSite(cfg)
				res := ""
				sigma := 0.02
				if seed == 0 {
					sigma = 0
				}
				in := tenMinute(winters[lk.lake][lk.y], sigma, seed)
				if mode == "step" {
					in = stepTen(winters[lk.lake][lk.y], sigma, seed)
				}
				for _, p := range in {
					_, evs := s.Process(p)
					for _, e := range kinds(evs, KindIceOn) {
						res += e.Details["onset"][5:13] + ","
					}
				}
				line += " " + res
			}
			fmt.Println(line)
		}
	}
	col, rows := readGzipCSV(t, filepath.Join(ntlDir(t), "mendota_2018-08_2019-06_hourly.csv.gz"))
	pi := col["platform"]
	ps := profilesFromRows(t, "mendota", rows, col["datetime_utc"], col["depth_m"], col["temp_c"], func(rec []string, tm time.Time) bool {
		return rec[pi] == "buoy" && tm.Before(time.Date(2018, 11, 1, 0, 0, 0, 0, time.UTC))
	})
	for seed := uint64(1); seed <= 3; seed++ {
		cfg := DefaultSiteConfig("mendota")
		cfg.MaxDepth = 25
		s := NewSite(cfg)
		n := 0
		for _, p := range tenMinute(ps, 0.02, seed) {
			_, evs := s.Process(p)
			n += len(kinds(evs, KindIceOn))
		}
		fmt.Println("mendota ice", seed, n)
	}
}
