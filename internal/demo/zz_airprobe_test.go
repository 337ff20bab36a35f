//go:build !race

package demo

import (
	"fmt"
	"testing"
	"time"

	"holomix/ingest/sim"
)

func TestZZAirProbe(t *testing.T) {
	sc := sim.DefaultScenario(5)
	s, err := sim.NewChecked(sc)
	if err != nil {
		t.Fatal(err)
	}
	end := time.Date(sc.Start.Year(), time.November, 25, 0, 0, 0, 0, time.UTC)
	from := time.Date(sc.Start.Year(), time.November, 12, 0, 0, 0, 0, time.UTC)
	var line string
	for s.Now().Before(end) {
		now, _ := s.Step()
		if now.Before(from) || now.Minute() != 0 {
			continue
		}
		line += fmt.Sprintf(" %5.1f", s.AirTemp("saltwick"))
		if now.Hour() == 23 {
			t.Logf("%s air(0..23h): %s", now.Format("01-02"), line)
			line = ""
		}
	}
	for _, st := range s.Truth().Sites {
		if st.Site == "saltwick" {
			for _, e := range st.IceEpisodes {
				t.Logf("ice on %v off %v", e.On, e.Off)
			}
		}
	}
}
