package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"strconv"
	"strings"
	"sync/atomic"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"
	influxdb2 "github.com/influxdata/influxdb-client-go/v2"
	"github.com/influxdata/influxdb-client-go/v2/api/write"
)

// bareReading and bareProfile are the payloads as the bare pipeline
// decodes them with encoding/json.
type bareReading struct {
	Time  time.Time `json:"time"`
	Depth float64   `json:"depth_m"`
	Temp  float64   `json:"temp_c"`
}

type bareProfile struct {
	Time   time.Time `json:"time"`
	Depths []float64 `json:"depths_m"`
	Temps  []float64 `json:"temps_c"`
}

// siteOf returns the middle level of PREFIX/SITE/KIND.
func siteOf(topic string) string {
	_, rest, _ := strings.Cut(topic, "/")
	site, _, _ := strings.Cut(rest, "/")
	return site
}

// bare is pipeline A: a paho subscriber at QoS 1 (persistent session,
// acknowledgement when the handler returns) → encoding/json →
// influxdb-client-go's asynchronous write API (batches of 5,000 points,
// flushed at least every 100 ms). Nothing else: no quality control, no
// spool, no detection.
type bare struct {
	broker, clientID, filter string
	profile                  bool
	influxURL, bucket        string
	batch                    int // points per write request (0: 5000)

	handled atomic.Int64 // readings handed to the write API
	bad     atomic.Int64 // payloads that did not decode
	werrs   atomic.Int64 // write errors reported by the client
	c       mqtt.Client
	ic      influxdb2.Client
}

func (b *bare) opts() *mqtt.ClientOptions {
	return mqtt.NewClientOptions().AddBroker(b.broker).SetClientID(b.clientID).SetCleanSession(false).
		SetConnectTimeout(10 * time.Second)
}

// createSession connects once to create the persistent session with its
// subscription, then disconnects: the broker queues what is published next.
func (b *bare) createSession() error {
	c := mqtt.NewClient(b.opts())
	if tok := c.Connect(); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		return fmt.Errorf("bare: connect: %v", tok.Error())
	}
	defer c.Disconnect(100)
	if tok := c.Subscribe(b.filter, 1, nil); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		return fmt.Errorf("bare: subscribe: %v", tok.Error())
	}
	return nil
}

// start connects the pipeline; the broker starts delivering the queue.
func (b *bare) start() error {
	batch := uint(5000)
	if b.batch > 0 {
		batch = uint(b.batch)
	}
	b.ic = influxdb2.NewClientWithOptions(b.influxURL, ":", influxdb2.DefaultOptions().SetBatchSize(batch).SetFlushInterval(100))
	wapi := b.ic.WriteAPI("", b.bucket)
	go func() {
		for range wapi.Errors() {
			b.werrs.Add(1)
		}
	}()
	handler := func(_ mqtt.Client, m mqtt.Message) {
		site := siteOf(m.Topic())
		if b.profile {
			var p bareProfile
			if err := json.Unmarshal(m.Payload(), &p); err != nil || len(p.Depths) != len(p.Temps) {
				b.bad.Add(1)
				return
			}
			for i, z := range p.Depths {
				wapi.WritePoint(write.NewPoint("water_temperature",
					map[string]string{"site": site, "depth_m": strconv.FormatFloat(z, 'f', -1, 64)},
					map[string]any{"temp_c": p.Temps[i]}, p.Time))
			}
			b.handled.Add(int64(len(p.Depths)))
			return
		}
		var r bareReading
		if err := json.Unmarshal(m.Payload(), &r); err != nil {
			b.bad.Add(1)
			return
		}
		wapi.WritePoint(write.NewPoint("water_temperature",
			map[string]string{"site": site, "depth_m": strconv.FormatFloat(r.Depth, 'f', -1, 64)},
			map[string]any{"temp_c": r.Temp}, r.Time))
		b.handled.Add(1)
	}
	b.c = mqtt.NewClient(b.opts().SetDefaultPublishHandler(handler))
	if tok := b.c.Connect(); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		return fmt.Errorf("bare: connect: %v", tok.Error())
	}
	return nil
}

func (b *bare) stop() {
	if b.c != nil {
		b.c.Disconnect(100)
	}
	if b.ic != nil {
		b.ic.Close() // flushes
	}
}

// counter is the count-only subscriber: QoS 1, persistent session, counts
// messages and does nothing else (the ceiling of broker + paho here).
func countOnly(ctx context.Context, broker, clientID, filter string, msgs int, publish func() error) (float64, error) {
	var got atomic.Int64
	opts := mqtt.NewClientOptions().AddBroker(broker).SetClientID(clientID).SetCleanSession(false).
		SetDefaultPublishHandler(func(mqtt.Client, mqtt.Message) { got.Add(1) })
	c := mqtt.NewClient(opts)
	if tok := c.Connect(); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		return 0, fmt.Errorf("count-only: connect: %v", tok.Error())
	}
	if tok := c.Subscribe(filter, 1, nil); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		c.Disconnect(100)
		return 0, fmt.Errorf("count-only: subscribe: %v", tok.Error())
	}
	c.Disconnect(100)
	if err := publish(); err != nil {
		return 0, err
	}
	got.Store(0)
	c = mqtt.NewClient(opts)
	start := time.Now()
	if tok := c.Connect(); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		return 0, fmt.Errorf("count-only: connect: %v", tok.Error())
	}
	defer c.Disconnect(100)
	for got.Load() < int64(msgs) {
		if ctx.Err() != nil {
			return 0, fmt.Errorf("count-only: %d of %d messages: %w", got.Load(), msgs, ctx.Err())
		}
		time.Sleep(2 * time.Millisecond)
	}
	return float64(msgs) / time.Since(start).Seconds(), nil
}

// lineProtocol renders a workload's readings as the daemon would store them
// (measurement, tags depth_m and site, fields qc and temp_c, time in s).
func lineProtocol(w workload) [][]byte {
	s := w.stream
	steps := w.readings / (s.Sites * len(s.Depths))
	out := make([][]byte, 0, w.readings)
	for k := 0; k < steps; k++ {
		ts := strconv.FormatInt(s.Time(k).Unix(), 10)
		for i := 0; i < s.Sites; i++ {
			for d, z := range s.Depths {
				out = append(out, fmt.Appendf(nil, "water_temperature,depth_m=%s,site=%s qc=0i,temp_c=%s %s",
					strconv.FormatFloat(z, 'f', -1, 64), s.SiteID(i), strconv.FormatFloat(s.Temp(i, d, k), 'f', -1, 64), ts))
			}
		}
	}
	return out
}

// directWrite is the database's own ceiling: pre-rendered line protocol
// POSTed to the v2 write endpoint in sequential requests of batch points,
// no broker, no decoding.
func directWrite(ctx context.Context, influxURL, bucket string, lines [][]byte, batch int) error {
	u := influxURL + "/api/v2/write?precision=s&bucket=" + url.QueryEscape(bucket)
	var body bytes.Buffer
	for i := 0; i < len(lines); i += batch {
		body.Reset()
		for _, l := range lines[i:min(i+batch, len(lines))] {
			body.Write(l)
			body.WriteByte('\n')
		}
		req, err := http.NewRequestWithContext(ctx, http.MethodPost, u, bytes.NewReader(body.Bytes()))
		if err != nil {
			return err
		}
		req.Header.Set("Content-Type", "text/plain; charset=utf-8")
		resp, err := http.DefaultClient.Do(req)
		if err != nil {
			return err
		}
		_, _ = io.Copy(io.Discard, resp.Body)
		resp.Body.Close()
		if resp.StatusCode/100 != 2 {
			return fmt.Errorf("write: HTTP %d", resp.StatusCode)
		}
	}
	return nil
}
