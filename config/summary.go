package config

import (
	"fmt"
	"io"
	"strings"
)

// WriteSummary prints a short normalised view of the configuration with every
// secret masked: sites, subscriptions, receivers, storage and listeners.
func (c *Config) WriteSummary(w io.Writer) {
	fmt.Fprintf(w, "mqtt      %s  client_id=%s  qos=%d  clean_session=%t", c.MQTT.Broker, c.MQTT.ClientID, c.MQTT.QoS, c.MQTT.CleanSession)
	if c.MQTT.Username != "" {
		fmt.Fprintf(w, "  user=%s  password=%s", c.MQTT.Username, c.MQTT.Password)
	}
	if c.MQTT.TLS.CAFile != "" {
		fmt.Fprintf(w, "  tls ca=%s", c.MQTT.TLS.CAFile)
	}
	fmt.Fprintln(w)
	for _, s := range c.MQTT.Subscriptions {
		fmt.Fprintf(w, "  subscribe %-28s format=%s", s.Topic, s.Format)
		if s.Template != "" {
			fmt.Fprintf(w, " template=%s", s.Template)
		}
		if s.Site != "" {
			fmt.Fprintf(w, " site=%s", s.Site)
		}
		fmt.Fprintln(w)
	}
	if c.Influx.URL != "" {
		fmt.Fprintf(w, "influx    %s  bucket=%s  token=%s  batch=%d  in_flight=%d\n", c.Influx.URL, c.Influx.Bucket, c.Influx.Token, c.Influx.BatchSize, c.Influx.WritesInFlight)
	} else {
		fmt.Fprintln(w, "influx    (none: readings stay in the spool)")
	}
	fmt.Fprintf(w, "storage   %s  spool limit %d MiB\n", c.Storage.Dir, int64(c.Storage.SpoolMaxBytes)>>20)
	fmt.Fprintf(w, "http      %s\n", c.HTTP.Listen)
	fmt.Fprintf(w, "sites     %d\n", len(c.Sites))
	for _, s := range c.Sites {
		basin := "box (no hypsography)"
		if len(s.Hypsography) > 0 {
			basin = fmt.Sprintf("hypsography %d points", len(s.Hypsography))
		}
		fmt.Fprintf(w, "  %-16s %-28q max %g m, salinity %g, %d sensors, %s\n", s.ID, s.Name, s.MaxDepth, s.Salinity, len(s.Depths), basin)
		for _, in := range s.Intakes {
			fmt.Fprintf(w, "    intake %-12s at %g m (change alert > %g °C/h)", in.Name, in.Depth, in.MaxRateCPerH)
			if in.DegreeDays != nil {
				fmt.Fprintf(w, ", degree-days from %s base %g °C", in.DegreeDays.Start, in.DegreeDays.BaseC)
			}
			fmt.Fprintln(w)
		}
	}
	d := c.Detect
	fmt.Fprintf(w, "detect    stratified Δρ>%g kg/m³, Tmd ±%g °C, inverse ΔT≥%g °C, hold %s, ice hold %s, profile every %s\n",
		d.StratDensityDiff, d.TmdDelta, d.InverseDeltaT, d.HoldTime.D(), d.IceHoldTime.D(), d.ProfileInterval.D())
	fmt.Fprintf(w, "receivers %d\n", len(c.Alerts.Receivers))
	for _, r := range c.Alerts.Receivers {
		target := r.URL
		if r.Type == "log" {
			target = "(log)"
		}
		fmt.Fprintf(w, "  %-16s %s  secret=%s  sites=%s kinds=%s min=%s", r.Name, target, r.Secret, list(r.Sites), list(r.Kinds), r.MinSeverity)
		if r.Reminder > 0 {
			fmt.Fprintf(w, " reminder=%s", r.Reminder.D())
		}
		fmt.Fprintln(w)
	}
}

func list(s []string) string {
	if len(s) == 0 {
		return "all"
	}
	return strings.Join(s, ",")
}
