package config

import (
	"bytes"
	"encoding/json"
	"fmt"
	"log/slog"
	"strings"
	"testing"
)

// TestSecretNeverPrinted: a loaded secret inside the configuration does not
// come out through fmt (%v, %+v, %#v, %s), slog (text and JSON handlers) or
// encoding/json, whether printed alone or inside the structs that hold it.
func TestSecretNeverPrinted(t *testing.T) {
	const value = "s3cr3t-V4lue-never-shown"
	var c Config
	c.MQTT.Username = "buoyreader"
	c.MQTT.Password = Secret{File: "/etc/holomix/secrets/mqtt.password"}
	c.MQTT.Password.Set(value)
	c.Influx.Token = Secret{Env: "INFLUX_TOKEN"}
	c.Influx.Token.Set(value)
	c.Alerts.Receivers = []Receiver{{Name: "r", Secret: c.Influx.Token}}

	var out bytes.Buffer
	for _, f := range []string{"%v", "%+v", "%#v", "%s"} {
		fmt.Fprintf(&out, f+"\n", c.MQTT.Password)
		fmt.Fprintf(&out, f+"\n", c.MQTT)
		fmt.Fprintf(&out, f+"\n", c.Alerts.Receivers)
	}
	fmt.Fprintf(&out, "%+v\n", c)
	for _, h := range []slog.Handler{slog.NewTextHandler(&out, nil), slog.NewJSONHandler(&out, nil)} {
		l := slog.New(h)
		l.Info("connecting", "password", c.MQTT.Password, "mqtt", c.MQTT, "influx", c.Influx)
	}
	j, err := json.Marshal(c)
	if err != nil {
		t.Fatal(err)
	}
	out.Write(j)
	if strings.Contains(out.String(), value) {
		t.Fatalf("secret value printed:\n%s", out.String())
	}
	if !strings.Contains(out.String(), "file /etc/holomix/secrets/mqtt.password (set, ****)") || !strings.Contains(out.String(), "env INFLUX_TOKEN (set, ****)") {
		t.Fatalf("the masked description (where the secret comes from) is missing:\n%s", out.String())
	}
}
