package rig

import (
	"fmt"
	"net"
	"strconv"
	"strings"
)

// Subscription is one mqtt.subscriptions entry.
type Subscription struct {
	Topic, Format, Template string
}

// SiteConfig is one configured site.
type SiteConfig struct {
	ID          string
	MaxDepth    float64
	Depths      []float64
	IntakeDepth float64 // 0: no intake
}

// DaemonConfig is what the benchmark and the fault suite vary in a holomix
// configuration; YAML renders the file.
type DaemonConfig struct {
	Broker, ClientID string
	Subscriptions    []Subscription
	InfluxURL        string
	Bucket           string
	InfluxBatchSize  int    // influx.batch_size; 0: default (5000)
	InfluxInFlight   int    // influx.writes_in_flight; 0: default (2)
	Dir              string // storage.dir
	SpoolMaxBytes    string // e.g. "1MiB"; "": default
	MaxPayloadBytes  int    // 0: default
	Sites            []SiteConfig
	HookURL          string // webhook receiver; "": none
	HookSecretEnv    string // environment variable holding its whsec_ secret
	HTTPListen       string
	LogLevel         string // default info
}

func floats(v []float64) string {
	s := make([]string, len(v))
	for i, f := range v {
		s[i] = strconv.FormatFloat(f, 'f', -1, 64)
	}
	return "[" + strings.Join(s, ", ") + "]"
}

// YAML renders the configuration.
func (c DaemonConfig) YAML() string {
	var b strings.Builder
	fmt.Fprintf(&b, "mqtt:\n  broker: %s\n  client_id: %s\n  qos: 1\n  clean_session: false\n  subscriptions:\n", c.Broker, c.ClientID)
	for _, s := range c.Subscriptions {
		fmt.Fprintf(&b, "    - topic: %q\n      format: %s\n", s.Topic, s.Format)
		if s.Template != "" {
			fmt.Fprintf(&b, "      template: %q\n", s.Template)
		}
	}
	if c.InfluxURL != "" {
		fmt.Fprintf(&b, "influx:\n  url: %s\n  bucket: %s\n", c.InfluxURL, c.Bucket)
		if c.InfluxBatchSize > 0 {
			fmt.Fprintf(&b, "  batch_size: %d\n", c.InfluxBatchSize)
		}
		if c.InfluxInFlight > 0 {
			fmt.Fprintf(&b, "  writes_in_flight: %d\n", c.InfluxInFlight)
		}
	}
	fmt.Fprintf(&b, "storage:\n  dir: %s\n", c.Dir)
	if c.SpoolMaxBytes != "" {
		fmt.Fprintf(&b, "  spool_max_bytes: %s\n", c.SpoolMaxBytes)
	}
	if c.MaxPayloadBytes > 0 {
		fmt.Fprintf(&b, "ingest:\n  max_payload_bytes: %d\n", c.MaxPayloadBytes)
	}
	if len(c.Sites) > 0 {
		b.WriteString("sites:\n")
		for _, s := range c.Sites {
			fmt.Fprintf(&b, "  - id: %s\n    max_depth_m: %s\n    sensor_depths_m: %s\n", s.ID,
				strconv.FormatFloat(s.MaxDepth, 'f', -1, 64), floats(s.Depths))
			if s.IntakeDepth > 0 {
				fmt.Fprintf(&b, "    intakes:\n      - name: hatchery\n        depth_m: %s\n        max_rate_c_per_h: 1\n",
					strconv.FormatFloat(s.IntakeDepth, 'f', -1, 64))
			}
		}
	}
	if c.HookURL != "" {
		fmt.Fprintf(&b, "alerts:\n  receivers:\n    - name: hook\n      type: webhook\n      url: %s\n      send_resolved: true\n      timeout: 5s\n", c.HookURL)
		if c.HookSecretEnv != "" {
			fmt.Fprintf(&b, "      secret: {env: %s}\n", c.HookSecretEnv)
		}
	}
	level := c.LogLevel
	if level == "" {
		level = "info"
	}
	fmt.Fprintf(&b, "http:\n  listen: %s\nlog:\n  level: %s\n  format: json\n", c.HTTPListen, level)
	return b.String()
}

// SitesOf returns the configured sites of a stream (intake at its
// IntakeDepth on every site; max depth one metre below the deepest sensor).
func SitesOf(s Stream) []SiteConfig {
	out := make([]SiteConfig, s.Sites)
	deepest := 0.0
	for _, z := range s.Depths {
		deepest = max(deepest, z)
	}
	for i := range out {
		out[i] = SiteConfig{ID: s.SiteID(i), MaxDepth: deepest + 1, Depths: s.Depths, IntakeDepth: s.IntakeDepth}
	}
	return out
}

// FreePort returns a TCP port on 127.0.0.1 that was free a moment ago.
func FreePort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, fmt.Errorf("find a free port: %w", err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}
