package alert

import (
	"fmt"
	"time"

	"holomix/config"
)

// ConfigOptions builds Options from a loaded configuration: the outbox is
// cfg.Storage.Dir/outbox.db, receivers and the status URL come from
// cfg.Alerts, site names and time zones from cfg.Sites. The caller adds
// Logger, Registerer and, for tools, a short LockTimeout.
func ConfigOptions(cfg *config.Config) (Options, error) {
	o := Options{
		Dir:       cfg.Storage.Dir,
		Receivers: cfg.Alerts.Receivers,
		StatusURL: cfg.Alerts.StatusURL,
		Sites:     make(map[string]SiteInfo, len(cfg.Sites)),
	}
	for _, s := range cfg.Sites {
		si := SiteInfo{ID: s.ID, Name: s.Name}
		if s.Timezone != "" && s.Timezone != "UTC" {
			loc, err := time.LoadLocation(s.Timezone)
			if err != nil {
				return Options{}, fmt.Errorf("alert: site %q: timezone %q: %w", s.ID, s.Timezone, err)
			}
			si.Location = loc
		}
		o.Sites[s.ID] = si
	}
	return o, nil
}
