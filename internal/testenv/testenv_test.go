package testenv

import (
	"context"
	"fmt"
	"strings"
	"testing"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"
	influxdb2 "github.com/influxdata/influxdb-client-go/v2"
)

// TestMosquittoRoundTrip publishes at QoS 1 through a real Mosquitto and receives it back with paho.
func TestMosquittoRoundTrip(t *testing.T) {
	m := StartMosquitto(t, MosquittoOptions{})
	got := make(chan string, 1)
	sub := mqtt.NewClient(mqtt.NewClientOptions().AddBroker(m.URL).SetClientID("testenv-sub"))
	if tok := sub.Connect(); !tok.WaitTimeout(15*time.Second) || tok.Error() != nil {
		t.Fatalf("connect subscriber: %v", tok.Error())
	}
	defer sub.Disconnect(100)
	if tok := sub.Subscribe("lakes/+/temp/#", 1, func(_ mqtt.Client, msg mqtt.Message) {
		got <- msg.Topic() + " " + string(msg.Payload())
	}); !tok.WaitTimeout(15*time.Second) || tok.Error() != nil {
		t.Fatalf("subscribe: %v", tok.Error())
	}
	pub := mqtt.NewClient(mqtt.NewClientOptions().AddBroker(m.URL).SetClientID("testenv-pub"))
	if tok := pub.Connect(); !tok.WaitTimeout(15*time.Second) || tok.Error() != nil {
		t.Fatalf("connect publisher: %v", tok.Error())
	}
	defer pub.Disconnect(100)
	if tok := pub.Publish("lakes/fenwater/temp/5", 1, false, "4.02"); !tok.WaitTimeout(15*time.Second) || tok.Error() != nil {
		t.Fatalf("publish: %v", tok.Error())
	}
	select {
	case s := <-got:
		if s != "lakes/fenwater/temp/5 4.02" {
			t.Fatalf("received %q", s)
		}
		t.Logf("mosquitto round trip on %s: %s", m.URL, s)
	case <-time.After(15 * time.Second):
		t.Fatal("message not received within 15 s")
	}
}

// TestInfluxRoundTrip writes a point through the v2 write API of InfluxDB 1.8 and reads it back with Flux.
func TestInfluxRoundTrip(t *testing.T) {
	in := StartInflux(t, InfluxOptions{})
	client := influxdb2.NewClient(in.URL, in.Token)
	defer client.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	ts := time.Date(2026, 11, 20, 6, 0, 0, 0, time.UTC)
	p := influxdb2.NewPoint("water_temperature",
		map[string]string{"site": "fenwater", "depth_m": "5"},
		map[string]any{"temp_c": 3.97, "qc": int64(0)}, ts)
	if err := client.WriteAPIBlocking("", in.Bucket).WritePoint(ctx, p); err != nil {
		t.Fatalf("write: %v\n%s", err, in.Log())
	}
	q := fmt.Sprintf(`from(bucket: %q) |> range(start: 2026-11-01T00:00:00Z, stop: 2026-12-01T00:00:00Z)
  |> filter(fn: (r) => r._measurement == "water_temperature" and r._field == "temp_c")`, in.Bucket)
	res, err := client.QueryAPI("").Query(ctx, q)
	if err != nil {
		t.Fatalf("flux query: %v", err)
	}
	n := 0
	for res.Next() {
		r := res.Record()
		n++
		if r.Value() != 3.97 || !r.Time().Equal(ts) || r.ValueByKey("site") != "fenwater" || r.ValueByKey("depth_m") != "5" {
			t.Fatalf("read back %v at %v tags %v", r.Value(), r.Time(), r.Values())
		}
	}
	if res.Err() != nil {
		t.Fatalf("flux result: %v", res.Err())
	}
	if n != 1 {
		t.Fatalf("read back %d records, want 1", n)
	}
	t.Logf("influxdb round trip on %s: wrote and read back 1 point via v2 write + Flux", in.URL)
}

// TestInfluxRestart keeps the data across a stop and a start on the same directory.
func TestInfluxRestart(t *testing.T) {
	in := StartInflux(t, InfluxOptions{Database: "restart"})
	ctx := context.Background()
	if _, err := in.InfluxQL(ctx, in.Token, `SHOW DATABASES`); err != nil {
		t.Fatal(err)
	}
	in.Stop()
	if _, err := in.InfluxQL(ctx, in.Token, `SHOW DATABASES`); err == nil {
		t.Fatal("query succeeded while the server was stopped")
	}
	in.Start(t)
	b, err := in.InfluxQL(ctx, in.Token, `SHOW DATABASES`)
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(string(b), `"restart"`) {
		t.Fatalf("database lost across restart: %s", b)
	}
}
