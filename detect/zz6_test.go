package detect

import (
	"fmt"
	"testing"
	"time"
)

func TestZZStats(t *testing.T) {
	winters := bogWinters(t)
	obs := map[string]string{"Crystal Bog2016": "2016-12-05", "Crystal Bog2017": "2017-11-07", "Crystal Bog2018": "2018-11-09", "Trout Bog2017": "2017-11-10", "Trout Bog2018": "2018-11-09"}
	for _, mode := range []string{"step", "interp"} {
		for _, lk := range []struct {
			lake string
			y    int
			md   float64
		}{{"Crystal Bog", 2016, 2.5}, {"Crystal Bog", 2017, 2.5}, {"Crystal Bog", 2018, 2.5}, {"Trout Bog", 2017, 7.9}, {"Trout Bog", 2018, 7.9}} {
			o, _ := time.Parse("2006-01-02", obs[fmt.Sprint(lk.lake, lk.y)])
			var clean time.Time
			nFalse, nLate, nOut := 0, 0, 0
			maxd := 0.0
			for seed := uint64(0); seed <= 20; seed++ {
				cfg := DefaultSiteConfig(siteID(lk.lake))
				cfg.MaxDepth = lk.md
				s := NewSite(cfg)
				sigma := 0.02
				if seed == 0 {
					sigma = 0
				}
				in := tenMinute(winters[lk.lake][lk.y], sigma, seed+100)
				if mode == "step" {
					in = stepTen(winters[lk.lake][lk.y], sigma, seed+100)
				}
				var ons []time.Time
				for _, p := range in {
					_, evs := s.Process(p)
					for _, e := range kinds(evs, KindIceOn) {
						ons = append(ons, onsetOf(t, e))
					}
				}
				if seed == 0 {
					clean = ons[0]
					continue
				}
				if len(ons) == 0 {
					nLate++
					continue
				}
				if len(ons) > 1 || ons[0].Before(o.Add(-7*24*time.Hour)) {
					nFalse++
				}
				d := ons[len(ons)-1].Sub(clean).Hours() / 24
				if d > maxd {
					maxd = d
				}
				if d > 2 {
					nLate++
				}
				if ons[len(ons)-1].After(o.Add(7 * 24 * time.Hour)) {
					nOut++
				}
			}
			fmt.Printf("%-6s %s %d: false %d late>2d %d outside7d %d maxdelay %.1f d\n", mode, lk.lake, lk.y, nFalse, nLate, nOut, maxd)
		}
	}
}
