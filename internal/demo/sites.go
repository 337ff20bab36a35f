package demo

import (
	"holomix/config"
	"holomix/ingest/sim"
	"holomix/internal/status"
)

// Sites returns the configured sites of a simulated scenario: id, name,
// depth, salinity, hypsography, sensor depths and the intake, as an operator
// would write them for the same lakes.
func Sites(sc sim.Scenario) []config.Site {
	out := make([]config.Site, 0, len(sc.Sites))
	for _, s := range sc.Sites {
		cs := config.Site{
			ID:          s.ID,
			Name:        s.Name,
			MaxDepth:    s.MaxDepth,
			Salinity:    s.Salinity,
			Hypsography: append([]config.HypsoPoint(nil), s.Hypsography...),
			Depths:      append([]float64(nil), s.SensorDepths...),
			Timezone:    "UTC",
		}
		if s.Intake != nil {
			in := *s.Intake
			in.DegreeDays = nil
			cs.Intakes = []config.Intake{in}
		}
		if cs.Name == "" {
			cs.Name = cs.ID
		}
		out = append(out, cs)
	}
	return out
}

// StatusSites returns what the status page knows of the sites before data arrive.
func StatusSites(sites []config.Site) []status.SiteMeta {
	out := make([]status.SiteMeta, 0, len(sites))
	for _, s := range sites {
		out = append(out, status.SiteMeta{
			ID: s.ID, Name: s.Name, MaxDepth: s.MaxDepth,
			Intakes: append([]config.Intake(nil), s.Intakes...),
			Depths:  append([]float64(nil), s.Depths...),
		})
	}
	return out
}
