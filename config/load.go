package config

import (
	"bytes"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"regexp"
	"sort"
	"strconv"
	"strings"
	"time"

	"gopkg.in/yaml.v3"
)

// Problem is one thing wrong with a configuration file.
type Problem struct {
	Line int    // 1-based YAML line, 0 when unknown
	Path string // e.g. sites[1].hypsography[2].area_m2
	Msg  string
	Hint string
}

func (p Problem) String() string {
	var b strings.Builder
	if p.Line > 0 {
		fmt.Fprintf(&b, "line %d: ", p.Line)
	}
	if p.Path != "" {
		fmt.Fprintf(&b, "%s: ", p.Path)
	}
	b.WriteString(p.Msg)
	if p.Hint != "" {
		fmt.Fprintf(&b, " (hint: %s)", p.Hint)
	}
	return b.String()
}

// Problems is every problem found in one file; it is the error Load returns.
type Problems []Problem

func (ps Problems) Error() string {
	lines := make([]string, len(ps))
	for i, p := range ps {
		lines[i] = p.String()
	}
	return fmt.Sprintf("%d problem(s) in configuration:\n  %s", len(ps), strings.Join(lines, "\n  "))
}

// Options change how Load reads secrets.
type Options struct {
	// Getenv looks up environment variables (default os.Getenv).
	Getenv func(string) string
	// SkipSecrets leaves secrets unresolved (used by tools that only inspect a file).
	SkipSecrets bool
	// BaseDir resolves relative secret and TLS file paths (Load sets it to the file's directory).
	BaseDir string
}

// Load reads, strictly decodes, defaults, validates and resolves the secrets of a
// configuration file. On failure the error is Problems listing everything found.
func Load(path string) (*Config, error) { return LoadWith(path, Options{}) }

// LoadWith is Load with options.
func LoadWith(path string, o Options) (*Config, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("read configuration: %w", err)
	}
	if o.BaseDir == "" {
		o.BaseDir = filepath.Dir(path)
	}
	return Parse(b, o)
}

// Parse is Load on bytes already read.
func Parse(b []byte, o Options) (*Config, error) {
	if o.Getenv == nil {
		o.Getenv = os.Getenv
	}
	var root yaml.Node
	if err := yaml.Unmarshal(b, &root); err != nil {
		return nil, Problems{yamlProblem(err.Error())}
	}
	cfg := &Config{}
	var probs Problems
	if len(root.Content) > 0 {
		dec := yaml.NewDecoder(bytes.NewReader(b))
		dec.KnownFields(true)
		if err := dec.Decode(cfg); err != nil {
			var te *yaml.TypeError
			if errors.As(err, &te) {
				for _, m := range te.Errors {
					probs = append(probs, yamlProblem(m))
				}
			} else {
				probs = append(probs, yamlProblem(err.Error()))
			}
		}
	}
	cfg.absPaths(o.BaseDir)
	cfg.explicitQoS0 = cfg.MQTT.QoS == 0 && nodeAt(&root, "mqtt", "qos") != nil
	cfg.explicitNoMemoryLimit = cfg.Storage.MemoryLimit == 0 && nodeAt(&root, "storage", "memory_limit") != nil
	Defaults(cfg)
	v := &validator{root: &root}
	if len(probs) == 0 {
		v.validate(cfg)
		if !o.SkipSecrets {
			v.resolveSecrets(cfg, o.Getenv)
		}
	}
	probs = append(probs, v.probs...)
	cfg.warnings = v.warnings
	if len(probs) > 0 {
		sort.SliceStable(probs, func(i, j int) bool { return probs[i].Line < probs[j].Line })
		return cfg, probs
	}
	return cfg, nil
}

var lineRe = regexp.MustCompile(`^(?:yaml: )?line (\d+): (.*)$`)

func yamlProblem(msg string) Problem {
	msg = strings.TrimSpace(msg)
	if m := lineRe.FindStringSubmatch(msg); m != nil {
		n, _ := strconv.Atoi(m[1])
		text := m[2]
		hint := ""
		if strings.Contains(text, "not found in type") {
			// "field foo not found in type config.MQTT"
			f := strings.Fields(text)
			if len(f) >= 2 {
				text = fmt.Sprintf("unknown key %q", f[1])
			}
			hint = "check the spelling against deploy/holomix.example.yaml"
		} else if strings.Contains(text, "cannot unmarshal") {
			hint = "wrong type for this key"
		}
		return Problem{Line: n, Msg: text, Hint: hint}
	}
	return Problem{Msg: msg}
}

// Warnings returns non-fatal findings (for example a secret file readable by others).
func (c *Config) Warnings() []string { return c.warnings }

// UnmarshalYAML reads "6h", "90s", "7d" (days) or a number of seconds.
func (d *Duration) UnmarshalYAML(n *yaml.Node) error {
	if n.Kind != yaml.ScalarNode {
		return fmt.Errorf("line %d: a duration must be a string such as \"6h\" or \"7d\"", n.Line)
	}
	v, err := ParseDuration(n.Value)
	if err != nil {
		return fmt.Errorf("line %d: %v", n.Line, err)
	}
	*d = Duration(v)
	return nil
}

// MarshalYAML writes the duration as text.
func (d Duration) MarshalYAML() (any, error) { return time.Duration(d).String(), nil }

// ParseDuration accepts Go durations plus a "d" (24 h) suffix and plain seconds.
func ParseDuration(s string) (time.Duration, error) {
	s = strings.TrimSpace(s)
	if s == "" {
		return 0, errors.New("empty duration")
	}
	if f, err := strconv.ParseFloat(s, 64); err == nil {
		return time.Duration(f * float64(time.Second)), nil
	}
	if strings.HasSuffix(s, "d") {
		f, err := strconv.ParseFloat(strings.TrimSuffix(s, "d"), 64)
		if err != nil {
			return 0, fmt.Errorf("invalid duration %q (use e.g. 6h, 30m, 7d)", s)
		}
		return time.Duration(f * 24 * float64(time.Hour)), nil
	}
	v, err := time.ParseDuration(s)
	if err != nil {
		return 0, fmt.Errorf("invalid duration %q (use e.g. 6h, 30m, 7d)", s)
	}
	return v, nil
}

// UnmarshalYAML reads "512MB", "2GiB", "100kB" or a plain number of bytes.
func (b *ByteSize) UnmarshalYAML(n *yaml.Node) error {
	v, err := ParseByteSize(n.Value)
	if err != nil {
		return fmt.Errorf("line %d: %v", n.Line, err)
	}
	*b = ByteSize(v)
	return nil
}

// ParseByteSize parses sizes with SI (kB, MB, GB) or binary (KiB, MiB, GiB) units.
func ParseByteSize(s string) (int64, error) {
	s = strings.TrimSpace(s)
	units := []struct {
		suf string
		mul float64
	}{{"KiB", 1 << 10}, {"MiB", 1 << 20}, {"GiB", 1 << 30}, {"TiB", 1 << 40},
		{"kB", 1e3}, {"KB", 1e3}, {"MB", 1e6}, {"GB", 1e9}, {"TB", 1e12}, {"B", 1}}
	for _, u := range units {
		if strings.HasSuffix(s, u.suf) {
			f, err := strconv.ParseFloat(strings.TrimSpace(strings.TrimSuffix(s, u.suf)), 64)
			if err != nil || f < 0 {
				return 0, fmt.Errorf("invalid size %q (use e.g. 512MB or 2GiB)", s)
			}
			return int64(f * u.mul), nil
		}
	}
	f, err := strconv.ParseFloat(s, 64)
	if err != nil || f < 0 {
		return 0, fmt.Errorf("invalid size %q (use e.g. 512MB or 2GiB)", s)
	}
	return int64(f), nil
}

// UnmarshalYAML refuses inline secrets with a hint.
func (s *Secret) UnmarshalYAML(n *yaml.Node) error {
	if n.Kind == yaml.ScalarNode {
		if n.Tag == "!!null" || n.Value == "" {
			return nil
		}
		return fmt.Errorf("line %d: inline secrets are not accepted: write {file: /path/to/secret} or {env: VARIABLE}", n.Line)
	}
	type plain Secret
	var p plain
	if err := n.Decode(&p); err != nil {
		return err
	}
	*s = Secret(p)
	return nil
}

// String never reveals the value.
func (s Secret) String() string {
	switch {
	case s.File != "":
		return "file " + s.File + " (" + s.state() + ")"
	case s.Env != "":
		return "env " + s.Env + " (" + s.state() + ")"
	}
	return "(none)"
}

func (s Secret) state() string {
	if s.resolved != "" {
		return "set, ****"
	}
	return "not loaded"
}

// absPaths makes relative secret and TLS file paths relative to base.
func (c *Config) absPaths(base string) {
	if base == "" {
		return
	}
	abs := func(p *string) {
		if *p != "" && !filepath.IsAbs(*p) {
			*p = filepath.Join(base, *p)
		}
	}
	for _, t := range []*TLS{&c.MQTT.TLS, &c.Influx.TLS} {
		abs(&t.CAFile)
		abs(&t.CertFile)
		abs(&t.KeyFile)
	}
	abs(&c.MQTT.Password.File)
	abs(&c.Influx.Token.File)
	abs(&c.HTTP.BasicPassword.File)
	abs(&c.HTTP.BearerToken.File)
	for i := range c.Alerts.Receivers {
		abs(&c.Alerts.Receivers[i].Secret.File)
	}
}
