package alert

import (
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"net"
	"net/url"
	"strings"
	"text/template"
	"time"

	"holomix/config"
	"holomix/detect"
)

// Receiver types.
const (
	TypeWebhook = "webhook"
	TypeLog     = "log"
)

// DefaultTimeout is the per-attempt timeout when Receiver.Timeout is 0.
const DefaultTimeout = 10 * time.Second

// severityRank orders severities: info < warning < critical.
func severityRank(s string) (int, bool) {
	switch s {
	case "info":
		return 0, true
	case "warning":
		return 1, true
	case "critical":
		return 2, true
	}
	return 0, false
}

// knownKinds lists the event kinds a receiver may filter on.
var knownKinds = map[detect.Kind]bool{
	detect.KindStratificationOnset: true, detect.KindOverturn: true, detect.KindMaxDensityReached: true,
	detect.KindInverseStratification: true, detect.KindIceOn: true, detect.KindIceOff: true,
	detect.KindIntakeChange: true, detect.KindIntakeOverturnRisk: true, detect.KindFrazilRisk: true,
	detect.KindSensorFault: true, detect.KindDegreeDays: true,
}

// receiver is a validated config.Receiver with its notifier.
type receiver struct {
	name     string
	typ      string
	sites    map[string]bool // empty: all
	kinds    map[detect.Kind]bool
	minSev   int
	resolved bool
	reminder time.Duration
	timeout  time.Duration
	notifier Notifier
}

// wants reports whether the receiver's filters accept an event.
func (r *receiver) wants(site string, kind detect.Kind, severity string) bool {
	if len(r.sites) > 0 && !r.sites[site] {
		return false
	}
	if len(r.kinds) > 0 && !r.kinds[kind] {
		return false
	}
	rank, _ := severityRank(severity)
	return rank >= r.minSev
}

// templateFuncs are the functions available to a receiver body template:
// json marshals any value to JSON text (a quoted, escaped string for strings).
func templateFuncs() template.FuncMap {
	return template.FuncMap{
		"json": func(v any) (string, error) {
			b, err := json.Marshal(v)
			return string(b), err
		},
	}
}

// signingKey turns a configured secret into the HMAC key. "whsec_<base64>" (the
// Standard Webhooks form) is base64-decoded; any other non-empty string is used
// as raw bytes (a verifier then uses the same bytes as the key). "" → unsigned.
func signingKey(secret string) ([]byte, error) {
	if secret == "" {
		return nil, nil
	}
	if rest, ok := strings.CutPrefix(secret, "whsec_"); ok {
		k, err := base64.StdEncoding.DecodeString(rest)
		if err != nil {
			return nil, fmt.Errorf("secret has the whsec_ prefix but is not valid base64: %w", err)
		}
		if len(k) == 0 {
			return nil, errors.New("secret whsec_ is empty")
		}
		return k, nil
	}
	return []byte(secret), nil
}

// buildReceivers validates the configured receivers and builds their notifiers.
// Every problem is reported at once.
func buildReceivers(d *Dispatcher, cfgs []config.Receiver, sites map[string]SiteInfo) ([]*receiver, error) {
	var errs []error
	seen := map[string]bool{}
	var out []*receiver
	for i, c := range cfgs {
		bad := func(format string, a ...any) {
			errs = append(errs, fmt.Errorf("alerts.receivers[%d] (%q): %s", i, c.Name, fmt.Sprintf(format, a...)))
		}
		if c.Name == "" {
			bad("name is required")
			continue
		}
		if seen[c.Name] {
			bad("duplicate receiver name")
			continue
		}
		seen[c.Name] = true
		r := &receiver{name: c.Name, typ: c.Type, resolved: c.Resolved, reminder: c.Reminder.D(), timeout: c.Timeout.D()}
		if r.typ == "" {
			r.typ = TypeWebhook
			if c.URL == "" {
				r.typ = TypeLog
			}
		}
		if r.timeout <= 0 {
			r.timeout = DefaultTimeout
		}
		if r.reminder < 0 {
			bad("reminder must not be negative")
		}
		sev := c.MinSeverity
		if sev == "" {
			sev = "info"
		}
		rank, ok := severityRank(sev)
		if !ok {
			bad("min_severity %q: want info, warning or critical", c.MinSeverity)
		}
		r.minSev = rank
		if len(c.Sites) > 0 {
			r.sites = map[string]bool{}
			for _, s := range c.Sites {
				if len(sites) > 0 {
					if _, ok := sites[s]; !ok {
						bad("site %q is not a configured site", s)
					}
				}
				r.sites[s] = true
			}
		}
		if len(c.Kinds) > 0 {
			r.kinds = map[detect.Kind]bool{}
			for _, k := range c.Kinds {
				if !knownKinds[detect.Kind(k)] {
					bad("unknown event kind %q", k)
				}
				r.kinds[detect.Kind(k)] = true
			}
		}
		switch r.typ {
		case TypeLog:
			r.notifier = &logNotifier{d: d, receiver: c.Name}
		case TypeWebhook:
			u, err := url.Parse(c.URL)
			if err != nil || c.URL == "" {
				bad("url %q is not a valid URL", c.URL)
				continue
			}
			switch u.Scheme {
			case "https":
			case "http":
				if !c.AllowHTTP && !isLoopback(u.Hostname()) {
					bad("url %q uses plain http to a non-loopback host: use https or set allow_insecure_http", c.URL)
				}
			default:
				bad("url %q: scheme must be http or https", c.URL)
				continue
			}
			key, err := signingKey(c.Secret.Get())
			if err != nil {
				bad("%v", err)
			}
			var tmpl *template.Template
			if c.Template != "" {
				tmpl, err = template.New(c.Name).Funcs(templateFuncs()).Option("missingkey=error").Parse(c.Template)
				if err != nil {
					bad("template: %v", err)
				}
			}
			if key == nil && d.log != nil {
				d.log.Warn("receiver has no secret: its webhooks are not signed", "receiver", c.Name)
			}
			r.notifier = &webhookNotifier{client: d.client, url: c.URL, key: key, tmpl: tmpl}
		default:
			bad("type %q: want webhook or log", c.Type)
			continue
		}
		out = append(out, r)
	}
	return out, errors.Join(errs...)
}

func isLoopback(host string) bool {
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}
