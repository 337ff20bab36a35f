// Package config owns the YAML schema of holomix, its defaults (applied in one
// place, Defaults), strict decoding (unknown keys are errors) and validation that
// reports every problem at once with its YAML line. Secrets are read from a
// *_file path or an environment variable, never only inline.
package config

import "time"

// Config is the whole configuration file.
type Config struct {
	MQTT    MQTT    `yaml:"mqtt"`
	Influx  Influx  `yaml:"influx"`
	Storage Storage `yaml:"storage"`
	Sites   []Site  `yaml:"sites"`
	Detect  Detect  `yaml:"detect"`
	Alerts  Alerts  `yaml:"alerts"`
	HTTP    HTTP    `yaml:"http"`
	Ingest  Ingest  `yaml:"ingest"`
	Log     Log     `yaml:"log"`

	warnings     []string
	explicitQoS0 bool
	// explicitNoMemoryLimit: storage.memory_limit is written as 0.
	explicitNoMemoryLimit bool
}

// Secret is a credential. It is read from File or from the environment variable
// Env; inline values are refused. The loaded value is kept unexported and is
// never printed, logged or marshalled.
type Secret struct {
	File string `yaml:"file"`
	Env  string `yaml:"env"`

	resolved string
}

// Get returns the resolved secret value ("" when none is configured).
func (s Secret) Get() string { return s.resolved }

// Set stores a resolved value (used by tests and by Load).
func (s *Secret) Set(v string) { s.resolved = v }

// IsSet reports whether any source is configured.
func (s Secret) IsSet() bool { return s.File != "" || s.Env != "" }

// MQTT is the broker connection and the subscriptions.
type MQTT struct {
	Broker        string         `yaml:"broker"`    // tcp://host:1883, ssl://host:8883, ws://…
	ClientID      string         `yaml:"client_id"` // stable id: the persistent session hangs on it
	Username      string         `yaml:"username"`
	Password      Secret         `yaml:"password"`
	TLS           TLS            `yaml:"tls"`
	QoS           byte           `yaml:"qos"`
	CleanSession  bool           `yaml:"clean_session"`
	KeepAlive     Duration       `yaml:"keep_alive"`
	Subscriptions []Subscription `yaml:"subscriptions"`
}

// TLS settings for a client connection.
type TLS struct {
	CAFile             string `yaml:"ca_file"`
	CertFile           string `yaml:"cert_file"`
	KeyFile            string `yaml:"key_file"`
	InsecureSkipVerify bool   `yaml:"insecure_skip_verify"`
	ServerName         string `yaml:"server_name"`
}

// Subscription is one topic filter and how to decode what arrives on it.
type Subscription struct {
	Topic    string `yaml:"topic"`    // MQTT topic filter, e.g. buoys/+/temp/+
	Format   string `yaml:"format"`   // json | json-profile | value | senml
	Template string `yaml:"template"` // topic template, e.g. buoys/{site}/temp/{depth}
	Site     string `yaml:"site"`     // fixed site id when neither payload nor topic names one
	Unit     string `yaml:"unit"`     // C | F | K: unit of temperatures when the payload does not say
	QoS      *byte  `yaml:"qos"`      // overrides mqtt.qos
	// Fields overrides JSON field names for format json / json-profile.
	Fields Fields `yaml:"fields"`
	// SenMLDepths maps a SenML record name (after base name) to a sensor depth in metres.
	SenMLDepths map[string]float64 `yaml:"senml_depths"`
}

// Fields names the JSON keys of the json and json-profile formats.
type Fields struct {
	Time     string `yaml:"time"`     // default "time"
	Depth    string `yaml:"depth"`    // default "depth_m"
	Temp     string `yaml:"temp"`     // default "temp_c"
	Site     string `yaml:"site"`     // default "site"
	Sensor   string `yaml:"sensor"`   // default "sensor"
	Depths   string `yaml:"depths"`   // json-profile arrays, default "depths_m"
	Temps    string `yaml:"temps"`    // default "temps_c"
	Readings string `yaml:"readings"` // json-profile list, default "readings"
}

// Influx is the database connection.
type Influx struct {
	URL       string `yaml:"url"`    // http://127.0.0.1:8086; empty disables the writer (readings stay spooled)
	Org       string `yaml:"org"`    // ignored by InfluxDB 1.8
	Bucket    string `yaml:"bucket"` // "database/retention" on 1.8, bucket name on 2.x
	Token     Secret `yaml:"token"`  // "user:password" on 1.8 with auth, API token on 2.x
	TLS       TLS    `yaml:"tls"`
	BatchSize int    `yaml:"batch_size"`
	// WritesInFlight is the number of write requests the writer keeps open
	// at once (default DefaultWritesInFlight): the next batch is read from
	// the spool and sent while the database still works on the previous
	// one. 1 writes strictly one batch after the other.
	WritesInFlight int      `yaml:"writes_in_flight"`
	Timeout        Duration `yaml:"timeout"`
}

// Storage is the local data directory (spool, outbox, detector state).
type Storage struct {
	Dir           string   `yaml:"dir"`
	SpoolMaxBytes ByteSize `yaml:"spool_max_bytes"` // back-pressure above this
	DeadLetterMax int      `yaml:"dead_letter_max"` // entries kept; oldest dropped first
	// MemoryLimit is the daemon's soft memory limit (Go runtime, see
	// runtime/debug.SetMemoryLimit): the garbage collector works harder as
	// the process nears it. Default DefaultMemoryLimit; 0 written in the
	// file means no limit. The GOMEMLIMIT environment variable, when set,
	// takes precedence.
	MemoryLimit ByteSize `yaml:"memory_limit"`
}

// Site is one lake or reservoir with one buoy.
type Site struct {
	ID          string       `yaml:"id"`
	Name        string       `yaml:"name"`
	MaxDepth    float64      `yaml:"max_depth_m"`
	Salinity    float64      `yaml:"salinity"` // g/kg (practical salinity for EOS-80), default 0
	Hypsography []HypsoPoint `yaml:"hypsography"`
	Depths      []float64    `yaml:"sensor_depths_m"` // expected sensor depths
	Intakes     []Intake     `yaml:"intakes"`
	Timezone    string       `yaml:"timezone"`  // for daily degree-day sums; default UTC
	AirTopic    string       `yaml:"air_topic"` // optional MQTT topic carrying air temperature (°C) for frazil risk
}

// HypsoPoint is one point of the depth-area curve.
type HypsoPoint struct {
	Depth float64 `yaml:"depth_m"`
	Area  float64 `yaml:"area_m2"`
}

// Intake is a water intake at a fixed depth (e.g. a hatchery supply).
type Intake struct {
	Name         string      `yaml:"name"`
	Depth        float64     `yaml:"depth_m"`
	MaxRateCPerH float64     `yaml:"max_rate_c_per_h"` // intake_change threshold, default 1 °C/h
	DegreeDays   *DegreeDays `yaml:"degree_days"`
}

// DegreeDays configures accumulated thermal units at an intake.
type DegreeDays struct {
	Start      string    `yaml:"start"`      // YYYY-MM-DD (site timezone)
	BaseC      float64   `yaml:"base_c"`     // base temperature °C, default 0
	Thresholds []float64 `yaml:"thresholds"` // °C·day values that raise an event
}

// Detect holds detector thresholds and hold times (defaults: SCIENCE.md §5).
type Detect struct {
	StratDensityDiff   float64  `yaml:"strat_density_diff"`       // kg/m³, 0.1
	StratHysteresis    float64  `yaml:"strat_hysteresis"`         // fraction of the threshold, 0.5
	TmdDelta           float64  `yaml:"tmd_delta_c"`              // °C, 0.3
	InverseDeltaT      float64  `yaml:"inverse_delta_c"`          // °C, 0.1
	ThermoclineMinGrad float64  `yaml:"thermocline_min_gradient"` // kg/m³/m, 0.1
	HoldTime           Duration `yaml:"hold_time"`                // 6h
	IceHoldTime        Duration `yaml:"ice_hold_time"`            // 24h
	ProfileInterval    Duration `yaml:"profile_interval"`         // 10m
	Watermark          Duration `yaml:"watermark"`                // 30m
	FrazilMaxC         float64  `yaml:"frazil_max_c"`             // 0.1
	FrazilAirC         float64  `yaml:"frazil_air_c"`             // -6
	SensorFaultAfter   Duration `yaml:"sensor_fault_after"`       // 6h
	ProjectionWindow   Duration `yaml:"projection_window"`        // 5 days (3-7)
	MinSurfaceDepth    float64  `yaml:"min_surface_depth_m"`      // 2 m: a sensor must be above this
	MaxGap             Duration `yaml:"max_gap"`                  // 7 days: longer silences restart the detectors (≥ 2h)
	MinStratified      Duration `yaml:"min_stratified"`           // 7 days: shorter stratified stretches are transient
}

// Alerts configures receivers.
type Alerts struct {
	StatusURL string     `yaml:"status_url"` // base URL used for links in alerts
	Receivers []Receiver `yaml:"receivers"`
}

// Receiver is one webhook (or the log).
type Receiver struct {
	Name        string   `yaml:"name"`
	Type        string   `yaml:"type"` // webhook | log
	URL         string   `yaml:"url"`
	Secret      Secret   `yaml:"secret"`       // Standard Webhooks secret (whsec_… base64)
	Sites       []string `yaml:"sites"`        // empty: all
	Kinds       []string `yaml:"kinds"`        // empty: all
	MinSeverity string   `yaml:"min_severity"` // info | warning | critical
	Resolved    bool     `yaml:"send_resolved"`
	Reminder    Duration `yaml:"reminder"` // 0: none
	Template    string   `yaml:"template"` // optional text/template body, e.g. {"text": "{{.Summary}}"}
	Timeout     Duration `yaml:"timeout"`
	AllowHTTP   bool     `yaml:"allow_insecure_http"` // plain http to a non-loopback host
}

// HTTP is the status page and API listener.
type HTTP struct {
	Listen        string `yaml:"listen"` // 127.0.0.1:8750
	AllowPublic   bool   `yaml:"allow_public"`
	BasicUser     string `yaml:"basic_user"`
	BasicPassword Secret `yaml:"basic_password"`
	BearerToken   Secret `yaml:"bearer_token"`
}

// Ingest holds quality-control and spool tuning.
type Ingest struct {
	RangeMinC       float64  `yaml:"range_min_c"`       // -3
	RangeMaxC       float64  `yaml:"range_max_c"`       // 45
	SpikeC          float64  `yaml:"spike_c"`           // 5 °C away from the recent median
	StuckAfter      Duration `yaml:"stuck_after"`       // 24h
	FutureTolerance Duration `yaml:"future_tolerance"`  // 5m
	CommitInterval  Duration `yaml:"commit_interval"`   // group-commit window, 5ms
	CommitMax       int      `yaml:"commit_max"`        // readings per commit, 5000
	MaxPayloadBytes int      `yaml:"max_payload_bytes"` // 256 KiB
}

// Log configures structured logging.
type Log struct {
	Level  string `yaml:"level"`  // debug | info | warn | error
	Format string `yaml:"format"` // text | json
}

// Duration is a time.Duration that reads "6h", "10m", "90s".
type Duration time.Duration

// D returns the value as a time.Duration.
func (d Duration) D() time.Duration { return time.Duration(d) }

// ByteSize reads "512MB", "2GiB" or a plain number of bytes.
type ByteSize int64
