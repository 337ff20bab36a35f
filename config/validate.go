package config

import (
	"fmt"
	"math"
	"net"
	"net/url"
	"os"
	"regexp"
	"strconv"
	"strings"
	"text/template"
	"time"

	"gopkg.in/yaml.v3"
)

// Formats are the payload formats a subscription may name.
var formats = map[string]bool{"json": true, "json-profile": true, "value": true, "senml": true}

// Kinds are the event kinds a receiver may filter on (detect.Kind values).
var kinds = map[string]bool{
	"stratification_onset": true, "overturn": true, "max_density_reached": true, "inverse_stratification": true,
	"ice_on": true, "ice_off": true, "intake_change": true, "intake_overturn_risk": true, "frazil_risk": true,
	"sensor_fault": true, "degree_days": true, "test": true,
}

var severities = map[string]bool{"info": true, "warning": true, "critical": true}

var siteIDRe = regexp.MustCompile(`^[a-z0-9][a-z0-9_-]{0,62}$`)

type validator struct {
	root     *yaml.Node
	probs    Problems
	warnings []string
}

// nodeAt finds the YAML node at a path of map keys (string) and sequence indexes (int).
func nodeAt(root *yaml.Node, path ...any) *yaml.Node {
	n := root
	if n != nil && n.Kind == yaml.DocumentNode && len(n.Content) > 0 {
		n = n.Content[0]
	}
	for _, p := range path {
		if n == nil {
			return nil
		}
		switch k := p.(type) {
		case string:
			if n.Kind != yaml.MappingNode {
				return nil
			}
			var next *yaml.Node
			for i := 0; i+1 < len(n.Content); i += 2 {
				if n.Content[i].Value == k {
					next = n.Content[i+1]
					break
				}
			}
			n = next
		case int:
			if n.Kind != yaml.SequenceNode || k >= len(n.Content) {
				return nil
			}
			n = n.Content[k]
		}
	}
	return n
}

func pathString(path []any) string {
	var b strings.Builder
	for _, p := range path {
		switch k := p.(type) {
		case string:
			if b.Len() > 0 {
				b.WriteByte('.')
			}
			b.WriteString(k)
		case int:
			fmt.Fprintf(&b, "[%d]", k)
		}
	}
	return b.String()
}

// fail records a problem at the line of the deepest existing node along path.
func (v *validator) fail(hint, msg string, path ...any) {
	line := 0
	for i := len(path); i >= 0; i-- {
		if n := nodeAt(v.root, path[:i]...); n != nil {
			line = n.Line
			break
		}
	}
	v.probs = append(v.probs, Problem{Line: line, Path: pathString(path), Msg: msg, Hint: hint})
}

func (v *validator) warn(format string, a ...any) {
	v.warnings = append(v.warnings, fmt.Sprintf(format, a...))
}

func finite(f float64) bool { return !math.IsNaN(f) && !math.IsInf(f, 0) }

func (v *validator) validate(c *Config) {
	v.mqtt(c)
	v.influx(c)
	if strings.TrimSpace(c.Storage.Dir) == "" {
		v.fail("a directory the daemon can write, e.g. /var/lib/holomix", "storage.dir is empty", "storage", "dir")
	}
	if c.Storage.SpoolMaxBytes < 1<<20 {
		v.fail("at least 1MiB; the default is 1GiB", "spool_max_bytes is too small", "storage", "spool_max_bytes")
	}
	if c.Storage.DeadLetterMax < 0 {
		v.fail("", "dead_letter_max must not be negative", "storage", "dead_letter_max")
	}
	if c.Storage.MemoryLimit != 0 && c.Storage.MemoryLimit < 32<<20 {
		v.fail("at least 32MiB (the default is 112MiB), or 0 for no limit", "memory_limit is too small: the garbage collector would run continuously", "storage", "memory_limit")
	}
	ids := map[string]int{}
	for i := range c.Sites {
		v.site(c, i, ids)
	}
	v.detect(c)
	v.alerts(c, ids)
	v.http(c)
	v.ingest(c)
	switch c.Log.Level {
	case "debug", "info", "warn", "error":
	default:
		v.fail("debug, info, warn or error", fmt.Sprintf("unknown log level %q", c.Log.Level), "log", "level")
	}
	switch c.Log.Format {
	case "text", "json":
	default:
		v.fail("text or json", fmt.Sprintf("unknown log format %q", c.Log.Format), "log", "format")
	}
}

func (v *validator) mqtt(c *Config) {
	m := c.MQTT
	u, err := url.Parse(m.Broker)
	if err != nil || u.Host == "" {
		v.fail("e.g. tcp://127.0.0.1:1883 or ssl://broker.example:8883", fmt.Sprintf("invalid broker URL %q", m.Broker), "mqtt", "broker")
	} else {
		switch u.Scheme {
		case "tcp", "mqtt", "ssl", "tls", "mqtts", "ws", "wss":
		default:
			v.fail("tcp, ssl, ws or wss", fmt.Sprintf("unsupported broker scheme %q", u.Scheme), "mqtt", "broker")
		}
	}
	if m.QoS > 2 {
		v.fail("0, 1 or 2; 1 is the default and is what makes delivery reliable", fmt.Sprintf("qos %d is not an MQTT QoS level", m.QoS), "mqtt", "qos")
	} else if m.QoS == 0 {
		v.warn("mqtt.qos is 0: the broker will not redeliver readings lost while the daemon is down")
	}
	if m.CleanSession {
		v.warn("mqtt.clean_session is true: readings published while the daemon is down are discarded by the broker")
	}
	if m.Password.IsSet() && m.Username == "" {
		v.fail("set mqtt.username too", "a password without a username", "mqtt", "password")
	}
	v.tlsFiles(m.TLS, "mqtt", "tls")
	if len(m.Subscriptions) == 0 {
		v.fail("add at least one {topic, format}", "no subscriptions: the daemon would receive nothing", "mqtt", "subscriptions")
	}
	for i, s := range m.Subscriptions {
		p := []any{"mqtt", "subscriptions", i}
		if strings.TrimSpace(s.Topic) == "" {
			v.fail("e.g. buoys/+/temp/+", "topic is empty", append(p, "topic")...)
		} else if err := checkFilter(s.Topic); err != nil {
			v.fail("'+' and '#' must fill a whole level; '#' only last", err.Error(), append(p, "topic")...)
		}
		if !formats[s.Format] {
			v.fail("json, json-profile, value or senml", fmt.Sprintf("unknown payload format %q", s.Format), append(p, "format")...)
		}
		if s.Format == "value" && s.Template == "" {
			v.fail("e.g. buoys/{site}/temp/{depth}", "format value needs a topic template naming {depth}", append(p, "template")...)
		}
		if s.Template != "" {
			if err := checkTemplate(s.Template, s.Format == "value"); err != nil {
				v.fail("placeholders are {site}, {depth} and {sensor}, each a whole level", err.Error(), append(p, "template")...)
			}
		}
		switch strings.ToUpper(s.Unit) {
		case "", "C", "CEL", "F", "K":
		default:
			v.fail("C, F or K", fmt.Sprintf("unknown unit %q", s.Unit), append(p, "unit")...)
		}
		if s.QoS != nil && *s.QoS > 2 {
			v.fail("0, 1 or 2", "invalid qos", append(p, "qos")...)
		}
		if s.Format == "senml" && len(s.SenMLDepths) == 0 {
			v.fail("map each SenML record name to its depth, e.g. senml_depths: {t05: 0.5}", "senml needs senml_depths", append(p, "senml_depths")...)
		}
		for name, d := range s.SenMLDepths {
			if d < 0 || !finite(d) {
				v.fail("depths are metres below the surface, positive down", fmt.Sprintf("negative depth %g for %q", d, name), append(p, "senml_depths", name)...)
			}
		}
	}
}

func checkFilter(f string) error {
	levels := strings.Split(f, "/")
	for i, l := range levels {
		if strings.Contains(l, "#") && (l != "#" || i != len(levels)-1) {
			return fmt.Errorf("invalid topic filter %q", f)
		}
		if strings.Contains(l, "+") && l != "+" {
			return fmt.Errorf("invalid topic filter %q", f)
		}
	}
	return nil
}

func checkTemplate(t string, needDepth bool) error {
	hasDepth := false
	for _, l := range strings.Split(t, "/") {
		if strings.ContainsAny(l, "{}") {
			switch l {
			case "{site}", "{sensor}", "{any}":
			case "{depth}":
				hasDepth = true
			default:
				return fmt.Errorf("invalid placeholder level %q in template %q", l, t)
			}
		}
	}
	if needDepth && !hasDepth {
		return fmt.Errorf("template %q has no {depth}", t)
	}
	return nil
}

func (v *validator) tlsFiles(t TLS, path ...any) {
	for _, f := range []struct {
		key, val string
	}{{"ca_file", t.CAFile}, {"cert_file", t.CertFile}, {"key_file", t.KeyFile}} {
		if f.val == "" {
			continue
		}
		if _, err := os.Stat(f.val); err != nil {
			v.fail("check the path and the daemon's permissions", fmt.Sprintf("cannot read %s: %v", f.key, err), append(path, f.key)...)
		}
	}
	if (t.CertFile == "") != (t.KeyFile == "") {
		v.fail("a client certificate needs both cert_file and key_file", "cert_file and key_file must be given together", path...)
	}
	if t.InsecureSkipVerify {
		v.warn("%s.insecure_skip_verify is true: the server's certificate is not checked", pathString(path[:1]))
	}
}

func (v *validator) influx(c *Config) {
	in := c.Influx
	if in.URL == "" {
		v.warn("influx.url is empty: readings stay in the spool and nothing is written to a database")
		return
	}
	u, err := url.Parse(in.URL)
	if err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
		v.fail("e.g. http://127.0.0.1:8086 or https://influx.example", fmt.Sprintf("invalid InfluxDB URL %q", in.URL), "influx", "url")
	} else if u.Scheme == "http" && !isLoopbackHost(u.Hostname()) {
		v.warn("influx.url uses plain http to a non-loopback host: the token travels unencrypted")
	}
	if in.BatchSize < 1 || in.BatchSize > 100000 {
		v.fail("1..100000; 5000 is a good batch", fmt.Sprintf("batch_size %d out of range", in.BatchSize), "influx", "batch_size")
	}
	if in.WritesInFlight < 1 || in.WritesInFlight > 16 {
		v.fail("1..16; 2 keeps a database on the same machine busy", fmt.Sprintf("writes_in_flight %d out of range", in.WritesInFlight), "influx", "writes_in_flight")
	}
	v.tlsFiles(in.TLS, "influx", "tls")
}

func isLoopbackHost(h string) bool {
	if h == "localhost" {
		return true
	}
	ip := net.ParseIP(h)
	return ip != nil && ip.IsLoopback()
}

func (v *validator) site(c *Config, i int, ids map[string]int) {
	s := c.Sites[i]
	p := []any{"sites", i}
	if !siteIDRe.MatchString(s.ID) {
		v.fail("lower-case letters, digits, '-' and '_', e.g. larchmere", fmt.Sprintf("invalid site id %q", s.ID), append(p, "id")...)
	} else if j, dup := ids[s.ID]; dup {
		v.fail(fmt.Sprintf("already used by sites[%d]", j), fmt.Sprintf("duplicate site id %q", s.ID), append(p, "id")...)
	} else {
		ids[s.ID] = i
	}
	if !(s.MaxDepth > 0) || !finite(s.MaxDepth) {
		v.fail("the deepest point of the lake in metres", "max_depth_m must be greater than 0", append(p, "max_depth_m")...)
	}
	if s.Salinity < 0 || s.Salinity > 42 || !finite(s.Salinity) {
		v.fail("g/kg; 0 for fresh water", fmt.Sprintf("salinity %g out of range 0..42", s.Salinity), append(p, "salinity")...)
	}
	prevD, prevA := -1.0, math.Inf(1)
	for j, h := range s.Hypsography {
		hp := append(append([]any{}, p...), "hypsography", j)
		switch {
		case h.Depth < 0 || !finite(h.Depth):
			v.fail("depths are metres below the surface, positive down", fmt.Sprintf("negative depth %g", h.Depth), append(hp, "depth_m")...)
		case h.Depth <= prevD:
			v.fail("list depths from the surface down", fmt.Sprintf("hypsography depth %g is not greater than the one before (%g)", h.Depth, prevD), append(hp, "depth_m")...)
		}
		switch {
		case h.Area < 0 || !finite(h.Area):
			v.fail("areas are m², zero or positive", fmt.Sprintf("negative area %g", h.Area), append(hp, "area_m2")...)
		case h.Area > prevA:
			v.fail("a lake narrows with depth: each area must be at most the one above", fmt.Sprintf("hypsography not decreasing: area %g m² at %g m exceeds %g m² above", h.Area, h.Depth, prevA), append(hp, "area_m2")...)
		}
		prevD, prevA = h.Depth, h.Area
	}
	if len(s.Hypsography) > 0 && s.Hypsography[0].Depth != 0 {
		v.fail("start the depth-area curve at the surface (depth_m: 0)", "hypsography does not start at 0 m", append(p, "hypsography", 0, "depth_m")...)
	}
	prev := -1.0
	for j, d := range s.Depths {
		switch {
		case d < 0 || !finite(d):
			v.fail("depths are metres below the surface, positive down", fmt.Sprintf("negative depth %g", d), append(p, "sensor_depths_m", j)...)
		case d <= prev:
			v.fail("list sensor depths from the top down, each once", fmt.Sprintf("sensor depth %g is not greater than %g", d, prev), append(p, "sensor_depths_m", j)...)
		case s.MaxDepth > 0 && d > s.MaxDepth:
			v.fail("a sensor cannot be deeper than the lake", fmt.Sprintf("sensor depth %g below max_depth_m %g", d, s.MaxDepth), append(p, "sensor_depths_m", j)...)
		}
		prev = d
	}
	names := map[string]bool{}
	for j, in := range s.Intakes {
		ip := append(append([]any{}, p...), "intakes", j)
		if in.Name == "" {
			v.fail("e.g. hatchery", "intake name is empty", append(ip, "name")...)
		} else if names[in.Name] {
			v.fail("", fmt.Sprintf("duplicate intake name %q", in.Name), append(ip, "name")...)
		}
		names[in.Name] = true
		if in.Depth < 0 || !finite(in.Depth) {
			v.fail("depths are metres below the surface, positive down", fmt.Sprintf("negative depth %g", in.Depth), append(ip, "depth_m")...)
		} else if s.MaxDepth > 0 && in.Depth > s.MaxDepth {
			v.fail("an intake cannot be deeper than the lake", fmt.Sprintf("intake depth %g below max_depth_m %g", in.Depth, s.MaxDepth), append(ip, "depth_m")...)
		}
		if !(in.MaxRateCPerH > 0) {
			v.fail("°C per hour, default 1", "max_rate_c_per_h must be greater than 0", append(ip, "max_rate_c_per_h")...)
		}
		if dd := in.DegreeDays; dd != nil {
			if _, err := time.Parse("2006-01-02", dd.Start); err != nil {
				v.fail("YYYY-MM-DD, e.g. the fertilisation date", fmt.Sprintf("invalid start date %q", dd.Start), append(ip, "degree_days", "start")...)
			}
			for k, th := range dd.Thresholds {
				if !(th > 0) {
					v.fail("°C·day values such as 300", fmt.Sprintf("threshold %g must be positive", th), append(ip, "degree_days", "thresholds", k)...)
				}
			}
		}
	}
	if _, err := time.LoadLocation(s.Timezone); err != nil {
		v.fail("an IANA name such as Europe/Oslo or America/Winnipeg", fmt.Sprintf("unknown timezone %q", s.Timezone), append(p, "timezone")...)
	}
}

func (v *validator) detect(c *Config) {
	d := c.Detect
	pos := []struct {
		key string
		val float64
	}{
		{"strat_density_diff", d.StratDensityDiff}, {"tmd_delta_c", d.TmdDelta}, {"inverse_delta_c", d.InverseDeltaT},
		{"thermocline_min_gradient", d.ThermoclineMinGrad}, {"min_surface_depth_m", d.MinSurfaceDepth},
	}
	for _, x := range pos {
		if !(x.val > 0) || !finite(x.val) {
			v.fail("must be a positive number", fmt.Sprintf("%s must be greater than 0", x.key), "detect", x.key)
		}
	}
	if d.StratHysteresis < 0 || d.StratHysteresis >= 1 {
		v.fail("a fraction of the threshold, 0 to <1 (default 0.5)", "strat_hysteresis out of range", "detect", "strat_hysteresis")
	}
	durs := []struct {
		key string
		val Duration
	}{
		{"hold_time", d.HoldTime}, {"ice_hold_time", d.IceHoldTime}, {"profile_interval", d.ProfileInterval},
		{"watermark", d.Watermark}, {"sensor_fault_after", d.SensorFaultAfter}, {"projection_window", d.ProjectionWindow},
	}
	for _, x := range durs {
		if x.val <= 0 {
			v.fail("e.g. 6h", fmt.Sprintf("%s must be positive", x.key), "detect", x.key)
		}
	}
	if d.ProjectionWindow > 0 && (d.ProjectionWindow.D() < 24*time.Hour || d.ProjectionWindow.D() > 14*24*time.Hour) {
		v.fail("between 1d and 14d; 3d-7d is the usual window", "projection_window out of range", "detect", "projection_window")
	}
	if d.MaxGap.D() < 2*time.Hour {
		v.fail("at least 2h (default 7d)", "max_gap must be at least 2h", "detect", "max_gap")
	}
	if d.MinStratified < 0 {
		v.fail("e.g. 7d (default)", "min_stratified must not be negative", "detect", "min_stratified")
	}
}

func (v *validator) alerts(c *Config, ids map[string]int) {
	names := map[string]bool{}
	for i, r := range c.Alerts.Receivers {
		p := []any{"alerts", "receivers", i}
		if r.Name == "" {
			v.fail("e.g. hatchery-on-call", "receiver name is empty", append(p, "name")...)
		} else if names[r.Name] {
			v.fail("", fmt.Sprintf("duplicate receiver name %q", r.Name), append(p, "name")...)
		}
		names[r.Name] = true
		switch r.Type {
		case "log":
		case "webhook":
			u, err := url.Parse(r.URL)
			if err != nil || u.Host == "" || (u.Scheme != "https" && u.Scheme != "http") {
				v.fail("e.g. https://alerts.example/hooks/holomix", fmt.Sprintf("invalid webhook URL %q", r.URL), append(p, "url")...)
			} else if u.Scheme == "http" && !isLoopbackHost(u.Hostname()) && !r.AllowHTTP {
				v.fail("use https, or set allow_insecure_http: true if you accept unencrypted alerts", "plain http webhook to a non-loopback host", append(p, "url")...)
			}
			if !r.Secret.IsSet() {
				v.fail("alerts are signed (Standard Webhooks): give {file: PATH} or {env: VAR}", "webhook receiver has no secret", append(p, "secret")...)
			}
		default:
			v.fail("webhook or log", fmt.Sprintf("unknown receiver type %q", r.Type), append(p, "type")...)
		}
		for j, s := range r.Sites {
			if _, ok := ids[s]; !ok {
				v.fail("use a site id from sites[]", fmt.Sprintf("unknown site %q", s), append(p, "sites", j)...)
			}
		}
		for j, k := range r.Kinds {
			if !kinds[k] {
				v.fail("e.g. overturn, ice_on, intake_overturn_risk", fmt.Sprintf("unknown event kind %q", k), append(p, "kinds", j)...)
			}
		}
		if !severities[r.MinSeverity] {
			v.fail("info, warning or critical", fmt.Sprintf("unknown severity %q", r.MinSeverity), append(p, "min_severity")...)
		}
		if r.Reminder < 0 || (r.Reminder > 0 && r.Reminder.D() < time.Hour) {
			v.fail("at least 1h, e.g. 7d for a weekly ice reminder", "reminder too short", append(p, "reminder")...)
		}
		if r.Template != "" {
			if _, err := template.New("t").Funcs(template.FuncMap{"json": func(any) string { return "" }}).Parse(r.Template); err != nil {
				v.fail("a Go text/template, e.g. {\"text\": {{json .Summary}}}", fmt.Sprintf("template does not parse: %v", err), append(p, "template")...)
			}
		}
	}
	if c.Alerts.StatusURL != "" {
		if u, err := url.Parse(c.Alerts.StatusURL); err != nil || u.Host == "" {
			v.fail("the address people open the status page at", "invalid status_url", "alerts", "status_url")
		}
	}
}

func (v *validator) http(c *Config) {
	h := c.HTTP
	host, port, err := net.SplitHostPort(h.Listen)
	if err != nil {
		v.fail("host:port, e.g. 127.0.0.1:8750", fmt.Sprintf("invalid listen address %q", h.Listen), "http", "listen")
		return
	}
	if n, err := strconv.Atoi(port); err != nil || n < 0 || n > 65535 {
		v.fail("a port number", fmt.Sprintf("invalid port %q", port), "http", "listen")
	}
	if !isLoopbackHost(host) {
		if !h.AllowPublic {
			v.fail("the status page binds to loopback by default; set allow_public: true and an authentication method to expose it",
				fmt.Sprintf("listen address %q is not loopback", h.Listen), "http", "listen")
		} else if !h.BearerToken.IsSet() && !(h.BasicUser != "" && h.BasicPassword.IsSet()) {
			v.fail("set bearer_token {file: …} or basic_user with basic_password {file: …}", "a public status page needs authentication", "http", "allow_public")
		}
	}
}

func (v *validator) ingest(c *Config) {
	g := c.Ingest
	if !(g.RangeMinC < g.RangeMaxC) {
		v.fail("e.g. -3 and 45 °C", "range_min_c must be below range_max_c", "ingest", "range_min_c")
	}
	if g.SpikeC <= 0 {
		v.fail("°C, default 5", "spike_c must be positive", "ingest", "spike_c")
	}
	if g.CommitMax < 1 {
		v.fail("readings per group commit, default 5000", "commit_max must be positive", "ingest", "commit_max")
	}
	if g.MaxPayloadBytes < 64 || g.MaxPayloadBytes > 16<<20 {
		v.fail("between 64 bytes and 16 MiB; default 256 KiB", "max_payload_bytes out of range", "ingest", "max_payload_bytes")
	}
}

// resolveSecrets loads every configured secret and warns about loose file permissions.
func (v *validator) resolveSecrets(c *Config, getenv func(string) string) {
	type ref struct {
		s    *Secret
		path []any
	}
	refs := []ref{
		{&c.MQTT.Password, []any{"mqtt", "password"}},
		{&c.Influx.Token, []any{"influx", "token"}},
		{&c.HTTP.BasicPassword, []any{"http", "basic_password"}},
		{&c.HTTP.BearerToken, []any{"http", "bearer_token"}},
	}
	for i := range c.Alerts.Receivers {
		refs = append(refs, ref{&c.Alerts.Receivers[i].Secret, []any{"alerts", "receivers", i, "secret"}})
	}
	for _, r := range refs {
		s := r.s
		switch {
		case s.File != "" && s.Env != "":
			v.fail("give either file or env", "secret has both file and env", r.path...)
		case s.File != "":
			st, err := os.Stat(s.File)
			if err != nil {
				v.fail("create the file (mode 0600) or fix the path", fmt.Sprintf("missing secret file %s", s.File), append(r.path, "file")...)
				continue
			}
			if st.Mode().Perm()&0o077 != 0 {
				v.warn("secret file %s is readable by others (mode %04o): chmod 600 it", s.File, st.Mode().Perm())
			}
			b, err := os.ReadFile(s.File)
			if err != nil {
				v.fail("check the daemon's permissions", fmt.Sprintf("cannot read secret file %s: %v", s.File, err), append(r.path, "file")...)
				continue
			}
			s.resolved = strings.TrimRight(string(b), "\r\n")
			if s.resolved == "" {
				v.fail("put the secret in the file", fmt.Sprintf("secret file %s is empty", s.File), append(r.path, "file")...)
			}
		case s.Env != "":
			s.resolved = getenv(s.Env)
			if s.resolved == "" {
				v.fail("export the variable before starting the daemon", fmt.Sprintf("environment variable %s is not set", s.Env), append(r.path, "env")...)
			}
		}
	}
}
