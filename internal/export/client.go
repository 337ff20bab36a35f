package export

import (
	"fmt"
	"strings"
	"time"

	influxdb2 "github.com/influxdata/influxdb-client-go/v2"

	"holomix/config"
)

// NewQuerier opens a query client for the configuration's influx section (URL,
// org, token, TLS). Call close when done.
func NewQuerier(in config.Influx) (q Querier, closeFn func(), err error) {
	if in.URL == "" {
		return nil, nil, fmt.Errorf("influx.url is empty: nothing to export from")
	}
	opts := influxdb2.DefaultOptions()
	if strings.HasPrefix(strings.ToLower(in.URL), "https:") || in.TLS.IsSet() {
		tc, err := in.TLS.ClientConfig()
		if err != nil {
			return nil, nil, fmt.Errorf("influx TLS: %w", err)
		}
		opts.SetTLSConfig(tc)
	}
	// A long export is many short queries; each gets the configured timeout
	// at least, and a generous floor for chunks of a busy year.
	timeout := in.Timeout.D()
	if timeout < 5*time.Minute {
		timeout = 5 * time.Minute
	}
	opts.SetHTTPRequestTimeout(uint(timeout.Seconds()))
	token := in.Token.Get()
	if token == "" {
		token = ":" // InfluxDB 1.8 without authentication
	}
	c := influxdb2.NewClientWithOptions(in.URL, token, opts)
	return c.QueryAPI(in.Org), c.Close, nil
}

// ParseTime reads a --from/--to value: RFC 3339 with any offset, or a UTC date
// or date-time without a zone ("2026-03-01", "2026-03-01T06:00:00",
// "2026-03-01 06:00"). The result is UTC.
func ParseTime(s string) (time.Time, error) {
	s = strings.TrimSpace(s)
	for _, layout := range []string{time.RFC3339Nano, "2006-01-02T15:04:05", "2006-01-02 15:04:05", "2006-01-02T15:04", "2006-01-02 15:04", "2006-01-02"} {
		if t, err := time.Parse(layout, s); err == nil {
			return t.UTC(), nil
		}
	}
	return time.Time{}, fmt.Errorf("invalid time %q (use RFC 3339 such as 2026-03-01T00:00:00Z, or a date such as 2026-03-01, taken as UTC)", s)
}
