package demo

import (
	"context"
	"encoding/json"
	"fmt"
	"log/slog"
	"net"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"
	mqtt "github.com/mochi-mqtt/server/v2"
	"github.com/mochi-mqtt/server/v2/hooks/auth"
	"github.com/mochi-mqtt/server/v2/listeners"
	"github.com/mochi-mqtt/server/v2/packets"
)

// Flow control between the simulator and the daemon. The embedded broker
// keeps at most MaximumInflight unacknowledged QoS 1 messages per subscriber
// and drops what comes beyond; the daemon acknowledges a message only once
// its readings are durably spooled. The publisher therefore waits while the
// broker holds more than brokerBacklog messages for the daemon, and keeps at
// most publishWindow of its own publications unacknowledged (the broker
// disconnects a client that exceeds its receive maximum, 1024).
const (
	brokerBacklog = 500
	publishWindow = 256
)

// broker is the embedded MQTT broker on a loopback TCP port.
type broker struct {
	srv  *mqtt.Server
	addr string
	subs *subscribeHook
}

// subscribeHook closes ready when the first subscription to a topic filter
// arrives (the daemon's), so that nothing is published into the void.
type subscribeHook struct {
	mqtt.HookBase
	once  sync.Once
	ready chan struct{}
}

func (h *subscribeHook) ID() string { return "holomix-demo-subscribed" }

func (h *subscribeHook) Provides(b byte) bool { return b == mqtt.OnSubscribed }

func (h *subscribeHook) OnSubscribed(_ *mqtt.Client, _ packets.Packet, _ []byte) {
	h.once.Do(func() { close(h.ready) })
}

// startBroker starts the broker on a free 127.0.0.1 port with allow-all
// authentication (it listens on loopback only).
func startBroker(log *slog.Logger) (*broker, error) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return nil, fmt.Errorf("demo broker: listen: %w", err)
	}
	srv := mqtt.New(&mqtt.Options{Logger: log.With("component", "broker")})
	if err := srv.AddHook(new(auth.AllowHook), nil); err != nil {
		ln.Close()
		return nil, fmt.Errorf("demo broker: auth hook: %w", err)
	}
	subs := &subscribeHook{ready: make(chan struct{})}
	if err := srv.AddHook(subs, nil); err != nil {
		ln.Close()
		return nil, fmt.Errorf("demo broker: hook: %w", err)
	}
	if err := srv.AddListener(listeners.NewNet("tcp", ln)); err != nil {
		ln.Close()
		return nil, fmt.Errorf("demo broker: listener: %w", err)
	}
	if err := srv.Serve(); err != nil {
		srv.Close()
		return nil, fmt.Errorf("demo broker: serve: %w", err)
	}
	return &broker{srv: srv, addr: ln.Addr().String(), subs: subs}, nil
}

// backlog is the number of QoS 1 messages the broker holds unacknowledged.
func (b *broker) backlog() int64 { return atomic.LoadInt64(&b.srv.Info.Inflight) }

// dropped counts messages the broker could not deliver (0 in a healthy run).
func (b *broker) dropped() int64 {
	return atomic.LoadInt64(&b.srv.Info.MessagesDropped) + atomic.LoadInt64(&b.srv.Info.InflightDropped)
}

func (b *broker) close() error { return b.srv.Close() }

// publisher is the simulated buoys' MQTT connection: a paho client that
// publishes at QoS 1 to the embedded broker, as a field gateway would.
type publisher struct {
	cl     paho.Client
	b      *broker
	window []paho.Token
	before func() // called before each message (air temperature, progress)

	messages atomic.Int64
	readings atomic.Int64
}

// readingsIn counts the readings of one simulator message: the temperatures
// of a profile, else one.
func readingsIn(topic string, payload []byte) int64 {
	if !strings.HasSuffix(topic, "/profile") {
		return 1
	}
	var p struct {
		Temps []float64 `json:"temps_c"`
	}
	if err := json.Unmarshal(payload, &p); err != nil {
		return 0
	}
	return int64(len(p.Temps))
}

func newPublisher(ctx context.Context, b *broker) (*publisher, error) {
	o := paho.NewClientOptions().
		AddBroker("tcp://" + b.addr).
		SetClientID("holomix-demo-buoys").
		SetCleanSession(true).
		SetAutoReconnect(false).
		SetConnectTimeout(5 * time.Second).
		SetWriteTimeout(10 * time.Second).
		SetOrderMatters(false)
	cl := paho.NewClient(o)
	tok := cl.Connect()
	if err := waitToken(ctx, tok); err != nil {
		return nil, fmt.Errorf("demo: simulator connecting to the broker: %w", err)
	}
	return &publisher{cl: cl, b: b}, nil
}

// Publish sends one message at QoS 1 (sim.Publisher).
func (p *publisher) Publish(ctx context.Context, topic string, payload []byte) error {
	if p.before != nil {
		p.before()
	}
	for p.b.backlog() > brokerBacklog {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(2 * time.Millisecond):
		}
	}
	if len(p.window) >= publishWindow {
		if err := waitToken(ctx, p.window[0]); err != nil {
			return err
		}
		p.window = p.window[1:]
	}
	p.messages.Add(1)
	p.readings.Add(readingsIn(topic, payload))
	p.window = append(p.window, p.cl.Publish(topic, 1, false, payload))
	return nil
}

// flush waits until the broker acknowledged every publication.
func (p *publisher) flush(ctx context.Context) error {
	for _, t := range p.window {
		if err := waitToken(ctx, t); err != nil {
			return err
		}
	}
	p.window = p.window[:0]
	return nil
}

func (p *publisher) close() { p.cl.Disconnect(250) }

func waitToken(ctx context.Context, t paho.Token) error {
	select {
	case <-ctx.Done():
		return ctx.Err()
	case <-t.Done():
		if err := t.Error(); err != nil {
			return err
		}
		return nil
	}
}
