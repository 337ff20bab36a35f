package config

import "log/slog"

// GoString keeps the value out of %#v output too (fmt would otherwise print
// the unexported field).
func (s Secret) GoString() string { return "config.Secret{" + s.String() + "}" }

// LogValue makes slog print where the secret comes from, never its value,
// whichever handler is used.
func (s Secret) LogValue() slog.Value { return slog.StringValue(s.String()) }

// MarshalText writes the masked description (encoding/json, text encoders).
func (s Secret) MarshalText() ([]byte, error) { return []byte(s.String()), nil }
