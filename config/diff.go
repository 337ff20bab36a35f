package config

import (
	"fmt"
	"reflect"
	"sort"
	"strings"
)

// Change is one difference between two configurations.
type Change struct {
	Path string // e.g. "mqtt.broker", "sites[larchmere]", "alerts.receivers[hatchery-on-call]"
	What string // "changed", "added" or "removed"
	Live bool   // true when a running daemon can apply it on SIGHUP
}

func (c Change) String() string {
	how := "needs a restart"
	if c.Live {
		how = "applied live"
	}
	return fmt.Sprintf("%s %s (%s)", c.Path, c.What, how)
}

// liveFields are the settings a running daemon applies on reload: detector
// thresholds and hold times, the log level, and everything under alerts
// (receivers, their secrets and routes, status_url). Everything else is read
// once at start: the broker connection and subscriptions (the persistent session
// hangs on them), the database client, the storage directory, the HTTP listener,
// ingest QC tuning, the sites and their sensors, and the profile assembly timing
// (profile_interval, watermark) that shapes profiles already being assembled.
var liveFields = map[string]bool{
	"detect.strat_density_diff":       true,
	"detect.strat_hysteresis":         true,
	"detect.tmd_delta_c":              true,
	"detect.inverse_delta_c":          true,
	"detect.thermocline_min_gradient": true,
	"detect.hold_time":                true,
	"detect.ice_hold_time":            true,
	"detect.frazil_max_c":             true,
	"detect.frazil_air_c":             true,
	"detect.sensor_fault_after":       true,
	"detect.projection_window":        true,
	"detect.min_surface_depth_m":      true,
	"detect.max_gap":                  true,
	"detect.min_stratified":           true,
	"log.level":                       true,
	"alerts.status_url":               true,
}

// Changes lists every difference between old and new, section by section, each
// marked live or restart. Secrets compare by their loaded value, so a rotated
// webhook secret file is a change; the values themselves never appear.
func Changes(old, new *Config) []Change {
	var out []Change
	ov, nv := reflect.ValueOf(*old), reflect.ValueOf(*new)
	t := ov.Type()
	for i := 0; i < t.NumField(); i++ {
		f := t.Field(i)
		if !f.IsExported() {
			continue
		}
		section := yamlName(f)
		switch section {
		case "sites":
			out = append(out, siteChanges(old.Sites, new.Sites)...)
		case "alerts":
			out = append(out, receiverChanges(old.Alerts.Receivers, new.Alerts.Receivers)...)
			if old.Alerts.StatusURL != new.Alerts.StatusURL {
				out = append(out, Change{Path: "alerts.status_url", What: "changed", Live: true})
			}
		default:
			out = append(out, fieldChanges(section, ov.Field(i), nv.Field(i))...)
		}
	}
	return out
}

// Diff says whether new can replace old in a running daemon (SIGHUP) without a
// restart, and lists every change as a sentence such as
// "detect.hold_time changed (applied live)" or "mqtt.broker changed (needs a restart)".
// reloadable is true when every change is live (also when nothing changed).
func Diff(old, new *Config) (reloadable bool, reasons []string) {
	reloadable = true
	for _, c := range Changes(old, new) {
		if !c.Live {
			reloadable = false
		}
		reasons = append(reasons, c.String())
	}
	return reloadable, reasons
}

// fieldChanges compares one struct section field by field.
func fieldChanges(section string, a, b reflect.Value) []Change {
	if a.Kind() != reflect.Struct {
		if !reflect.DeepEqual(a.Interface(), b.Interface()) {
			return []Change{{Path: section, What: "changed", Live: liveFields[section]}}
		}
		return nil
	}
	var out []Change
	t := a.Type()
	for i := 0; i < t.NumField(); i++ {
		f := t.Field(i)
		if !f.IsExported() {
			continue
		}
		// DeepEqual also compares a Secret's loaded value.
		if !reflect.DeepEqual(a.Field(i).Interface(), b.Field(i).Interface()) {
			p := section + "." + yamlName(f)
			out = append(out, Change{Path: p, What: "changed", Live: liveFields[p]})
		}
	}
	return out
}

func siteChanges(old, new []Site) []Change {
	om, nm := map[string]Site{}, map[string]Site{}
	for _, s := range old {
		om[s.ID] = s
	}
	for _, s := range new {
		nm[s.ID] = s
	}
	var out []Change
	for _, id := range sortedKeys(om, nm) {
		o, inOld := om[id]
		n, inNew := nm[id]
		switch {
		case !inOld:
			out = append(out, Change{Path: "sites[" + id + "]", What: "added"})
		case !inNew:
			out = append(out, Change{Path: "sites[" + id + "]", What: "removed"})
		default:
			out = append(out, fieldChanges("sites["+id+"]", reflect.ValueOf(o), reflect.ValueOf(n))...)
		}
	}
	return out
}

func receiverChanges(old, new []Receiver) []Change {
	om, nm := map[string]Receiver{}, map[string]Receiver{}
	for _, r := range old {
		om[r.Name] = r
	}
	for _, r := range new {
		nm[r.Name] = r
	}
	var out []Change
	for _, name := range sortedKeys(om, nm) {
		o, inOld := om[name]
		n, inNew := nm[name]
		p := "alerts.receivers[" + name + "]"
		switch {
		case !inOld:
			out = append(out, Change{Path: p, What: "added", Live: true})
		case !inNew:
			out = append(out, Change{Path: p, What: "removed", Live: true})
		default:
			for _, c := range fieldChanges(p, reflect.ValueOf(o), reflect.ValueOf(n)) {
				c.Live = true
				out = append(out, c)
			}
		}
	}
	return out
}

func sortedKeys[V any](a, b map[string]V) []string {
	seen := map[string]bool{}
	var keys []string
	for _, m := range []map[string]V{a, b} {
		for k := range m {
			if !seen[k] {
				seen[k] = true
				keys = append(keys, k)
			}
		}
	}
	sort.Strings(keys)
	return keys
}

func yamlName(f reflect.StructField) string {
	name, _, _ := strings.Cut(f.Tag.Get("yaml"), ",")
	if name == "" {
		return strings.ToLower(f.Name)
	}
	return name
}
