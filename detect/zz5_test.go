package detect

import (
	"fmt"
	"testing"
	"time"
)

func TestZZCB16(t *testing.T) {
	winters := bogWinters(t)
	ps := winters["Crystal Bog"][2016]
	run := func(sigma float64, seed uint64) map[time.Time]IceSignals {
		cfg := DefaultSiteConfig("crystal-bog")
		cfg.MaxDepth = 2.5
		s := NewSite(cfg)
		out := map[time.Time]IceSignals{}
		for _, p := range tenMinute(ps, sigma, seed) {
			c, _ := s.Process(p)
			if p.Time.Minute() == 0 {
				out[p.Time] = c.Ice
			}
		}
		return out
	}
	a, b := run(0, 1), run(0.02, 2)
	for tm := time.Date(2016, 11, 20, 0, 0, 0, 0, time.UTC); tm.Before(time.Date(2016, 11, 25, 0, 0, 0, 0, time.UTC)); tm = tm.Add(3 * time.Hour) {
		x, y := a[tm], b[tm]
		fmt.Printf("%s clean top %.4f act %.4f grad %+.2f top %.2f | noisy top %.4f act %.4f noise %.4f\n", tm.Format("01-02 15"), x.TopChangeCPerH, x.ActivityCPerH, x.TopMinusBottomC, x.TopC, y.TopChangeCPerH, y.ActivityCPerH, y.NoiseCPerH)
	}
}
