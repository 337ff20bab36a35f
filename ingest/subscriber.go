package ingest

import (
	"bufio"
	"context"
	"crypto/tls"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/url"
	"os"
	"strconv"
	"sync"
	"sync/atomic"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"

	"holomix/config"
)

// Enqueuer takes decoded messages (implemented by Committer).
type Enqueuer interface {
	Enqueue(ctx context.Context, m *Message) error
}

// SubscriberOptions configure NewSubscriber.
type SubscriberOptions struct {
	MQTT config.MQTT
	// MaxPayload is the decoders' payload size limit (<= 0: DefaultMaxPayload).
	MaxPayload int
	Sink       Enqueuer
	Logger     *slog.Logger
	Metrics    *Metrics
	// AirTopics maps topic filters carrying air temperatures to a site id
	// (config sites[].air_topic). A payload is a number in °C, or a JSON
	// object with "temp_c" (or "air_c") and an optional "time" (as in format
	// json; absent: receive time). Each value goes to OnAir and the message is
	// acknowledged at once: air temperatures only feed a risk heuristic and are
	// not spooled. A payload that does not parse is dead-lettered (bad_number).
	AirTopics map[string]string
	OnAir     func(site string, t time.Time, c float64)
	// ConnectRetry is the delay between attempts while the broker is
	// unreachable at start (<= 0: 2 s); MaxReconnect bounds the delay between
	// attempts after a lost connection (<= 0: 10 s).
	ConnectRetry, MaxReconnect time.Duration
}

// Subscriber is the MQTT side of ingestion (paho.mqtt.golang): a persistent
// session (clean session off, stable client id), QoS 1 subscriptions,
// automatic reconnection with resubscription in the OnConnect handler, and
// manual acknowledgement: a message is acknowledged by the committer once
// all its readings are durably spooled, never on receipt.
type Subscriber struct {
	o      SubscriberOptions
	client mqtt.Client
	log    *slog.Logger
	m      *Metrics
	subs   []subscription

	ctx       context.Context
	connected atomic.Bool
	stopping  atomic.Bool
	connects  atomic.Int64
	mu        sync.Mutex
	lastErr   error
	subDone   chan struct{} // closed after the first successful subscription
	subOnce   sync.Once
}

type subscription struct {
	filter string
	qos    byte
	dec    Decoder
}

// DefaultClientID returns the client id used when none is configured:
// "holomix-" and the host name (stable across restarts, so the broker keeps
// the session).
func DefaultClientID() string {
	h, err := os.Hostname()
	if err != nil || h == "" {
		h = "local"
	}
	return "holomix-" + h
}

// NewSubscriber validates the subscriptions, builds their decoders and the
// MQTT client. It does not connect (see Start).
func NewSubscriber(o SubscriberOptions) (*Subscriber, error) {
	if o.Sink == nil {
		return nil, errors.New("subscriber: no sink")
	}
	if o.MQTT.Broker == "" {
		return nil, errors.New("subscriber: no broker URL")
	}
	if len(o.MQTT.Subscriptions) == 0 {
		return nil, errors.New("subscriber: no subscriptions")
	}
	if o.Logger == nil {
		o.Logger = slog.New(slog.DiscardHandler)
	}
	if o.Metrics == nil {
		o.Metrics = NewMetrics(nil)
	}
	if o.ConnectRetry <= 0 {
		o.ConnectRetry = 2 * time.Second
	}
	if o.MaxReconnect <= 0 {
		o.MaxReconnect = 10 * time.Second
	}
	s := &Subscriber{o: o, log: o.Logger, m: o.Metrics, ctx: context.Background(), subDone: make(chan struct{})}
	seen := map[string]bool{}
	for _, sc := range o.MQTT.Subscriptions {
		if sc.Topic == "" {
			return nil, errors.New("subscriber: a subscription has no topic")
		}
		if seen[sc.Topic] {
			return nil, fmt.Errorf("subscriber: topic filter %q is listed twice", sc.Topic)
		}
		seen[sc.Topic] = true
		dec, err := NewDecoder(sc, o.MaxPayload)
		if err != nil {
			return nil, fmt.Errorf("subscriber: %w", err)
		}
		qos := o.MQTT.QoS
		if sc.QoS != nil {
			qos = *sc.QoS
		}
		if qos > 2 {
			return nil, fmt.Errorf("subscriber: topic %q: qos %d (want 0, 1 or 2)", sc.Topic, qos)
		}
		s.subs = append(s.subs, subscription{filter: sc.Topic, qos: qos, dec: dec})
	}
	opts, err := s.clientOptions()
	if err != nil {
		return nil, err
	}
	s.client = mqtt.NewClient(opts)
	for _, sub := range s.subs {
		s.client.AddRoute(sub.filter, s.handler(sub.dec))
	}
	for filter, site := range o.AirTopics {
		if filter == "" || seen[filter] {
			return nil, fmt.Errorf("subscriber: air topic %q is empty or also a water-temperature subscription", filter)
		}
		seen[filter] = true
		s.subs = append(s.subs, subscription{filter: filter, qos: o.MQTT.QoS})
		s.client.AddRoute(filter, s.airHandler(site))
	}
	return s, nil
}

func (s *Subscriber) clientOptions() (*mqtt.ClientOptions, error) {
	c := s.o.MQTT
	id := c.ClientID
	if id == "" {
		id = DefaultClientID()
	}
	keep := c.KeepAlive.D()
	if keep <= 0 {
		keep = 30 * time.Second
	}
	opts := mqtt.NewClientOptions().
		AddBroker(c.Broker).
		SetClientID(id).
		SetCleanSession(c.CleanSession).
		SetAutoReconnect(true).
		SetConnectRetry(true).
		SetConnectRetryInterval(s.o.ConnectRetry).
		SetMaxReconnectInterval(s.o.MaxReconnect).
		SetConnectTimeout(10 * time.Second).
		SetWriteTimeout(10 * time.Second).
		SetKeepAlive(keep).
		SetOrderMatters(true). // one handler goroutine: arrival order is preserved
		SetAutoAckDisabled(true).
		SetResumeSubs(false). // we resubscribe in OnConnect
		SetOnConnectHandler(s.onConnect).
		SetConnectionLostHandler(s.onLost).
		SetReconnectingHandler(func(_ mqtt.Client, _ *mqtt.ClientOptions) {
			s.log.Debug("reconnecting to broker", "broker", c.Broker)
		}).
		SetDefaultPublishHandler(s.unknownTopic)
	if c.Username != "" {
		opts.SetUsername(c.Username)
	}
	if p := c.Password.Get(); p != "" {
		opts.SetPassword(p)
	}
	tc, err := TLSConfig(c.TLS, c.Broker)
	if err != nil {
		return nil, fmt.Errorf("subscriber: %w", err)
	}
	if tc != nil {
		opts.SetTLSConfig(tc)
	}
	if os.Getenv("all_proxy") == "" && os.Getenv("ALL_PROXY") == "" {
		// paho reads each packet with several small reads on the socket; a
		// buffered reader turns them into about one system call per 16 KiB.
		// (With a proxy configured, paho's own dialing handles it.)
		opts.SetCustomOpenConnectionFn(openBuffered)
	}
	return opts, nil
}

// openBuffered dials like paho does (tcp, mqtt, ssl, tls, mqtts, ws, wss)
// and wraps the connection's reads in a bufio.Reader.
func openBuffered(uri *url.URL, o mqtt.ClientOptions) (net.Conn, error) {
	d := o.Dialer
	if d == nil {
		d = &net.Dialer{Timeout: o.ConnectTimeout}
	}
	var conn net.Conn
	var err error
	switch uri.Scheme {
	case "tcp", "mqtt":
		conn, err = d.Dial("tcp", uri.Host)
	case "ssl", "tls", "mqtts", "mqtt+ssl", "tcps":
		conn, err = tls.DialWithDialer(d, "tcp", uri.Host, o.TLSConfig)
	case "ws", "wss":
		u := *uri
		u.User = nil
		var tc *tls.Config
		if uri.Scheme == "wss" {
			tc = o.TLSConfig
		}
		conn, err = mqtt.NewWebsocket(u.String(), tc, o.ConnectTimeout, o.HTTPHeaders, o.WebsocketOptions)
	default:
		return nil, fmt.Errorf("unsupported broker scheme %q", uri.Scheme)
	}
	if err != nil {
		return nil, err
	}
	return newBufConn(conn), nil
}

// bufConn buffers a connection's reads, and coalesces its writes: Write
// queues the bytes and one flusher goroutine writes whatever has queued in
// one system call. After a commit the committer acknowledges hundreds of
// messages at once; paho writes each PUBACK separately, and without this each
// would cost a system call. A write error is returned by the next Write and
// closes the connection (paho then reconnects; an acknowledgement lost that
// way only means a redelivery).
type bufConn struct {
	net.Conn
	r *bufio.Reader

	mu      sync.Mutex
	pending []byte
	spare   []byte
	err     error
	closed  bool
	wake    chan struct{} // buffered(1)
	stop    chan struct{}
	flushed chan struct{} // closed when the flusher has exited
}

func newBufConn(conn net.Conn) *bufConn {
	c := &bufConn{Conn: conn, r: bufio.NewReaderSize(conn, 16<<10),
		wake: make(chan struct{}, 1), stop: make(chan struct{}), flushed: make(chan struct{})}
	go c.flusher()
	return c
}

func (c *bufConn) Read(p []byte) (int, error) { return c.r.Read(p) }

func (c *bufConn) Write(p []byte) (int, error) {
	c.mu.Lock()
	if c.err != nil || c.closed {
		err := c.err
		c.mu.Unlock()
		if err == nil {
			err = net.ErrClosed
		}
		return 0, err
	}
	c.pending = append(c.pending, p...)
	c.mu.Unlock()
	select {
	case c.wake <- struct{}{}:
	default:
	}
	return len(p), nil
}

func (c *bufConn) flusher() {
	defer close(c.flushed)
	for {
		stopping := false
		select {
		case <-c.wake:
		case <-c.stop:
			stopping = true
		}
		c.mu.Lock()
		b := c.pending
		c.pending = c.spare[:0]
		c.mu.Unlock()
		if len(b) > 0 {
			if _, err := c.Conn.Write(b); err != nil {
				c.mu.Lock()
				c.err = err
				c.mu.Unlock()
				c.Conn.Close()
				return
			}
		}
		c.mu.Lock()
		c.spare = b[:0]
		c.mu.Unlock()
		if stopping {
			return
		}
	}
}

// Close writes what is queued (waiting at most a second) and closes.
func (c *bufConn) Close() error {
	c.mu.Lock()
	if c.closed {
		c.mu.Unlock()
		return nil
	}
	c.closed = true
	c.mu.Unlock()
	close(c.stop)
	select {
	case <-c.flushed:
	case <-time.After(time.Second):
	}
	return c.Conn.Close()
}

// TLSConfig builds the client TLS configuration for a broker URL: nil unless
// the URL uses a TLS scheme (ssl, tls, mqtts, wss: config.MQTT.BrokerUsesTLS),
// else t.ClientConfig() (CA file or the system roots, optional client
// certificate, server name, TLS 1.2 at least).
func TLSConfig(t config.TLS, rawURL string) (*tls.Config, error) {
	if !(config.MQTT{Broker: rawURL}).BrokerUsesTLS() {
		return nil, nil
	}
	return t.ClientConfig()
}

// Start connects in the background (retrying until the broker answers) and
// returns at once. ctx bounds the handlers' waits for the spool queue.
func (s *Subscriber) Start(ctx context.Context) {
	s.ctx = ctx
	s.log.Info("connecting to broker", "broker", s.o.MQTT.Broker, "client_id", s.clientID(),
		"clean_session", s.o.MQTT.CleanSession)
	s.client.Connect() // with ConnectRetry the token completes only once connected
}

func (s *Subscriber) clientID() string {
	r := s.client.OptionsReader()
	return r.ClientID()
}

// Subscribed returns a channel closed after the first successful subscription.
func (s *Subscriber) Subscribed() <-chan struct{} { return s.subDone }

// Connected reports whether the broker connection is up.
func (s *Subscriber) Connected() bool { return s.connected.Load() }

// LastError returns the last connection or subscription error.
func (s *Subscriber) LastError() error {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.lastErr
}

// Filters returns the subscribed topic filters.
func (s *Subscriber) Filters() []string {
	out := make([]string, len(s.subs))
	for i, sub := range s.subs {
		out[i] = sub.filter
	}
	return out
}

// StopIntake makes the handlers drop (not acknowledge) every message from now
// on: the broker keeps them for the next session. First step of a drain.
func (s *Subscriber) StopIntake() { s.stopping.Store(true) }

// Disconnect closes the connection after quiesce, which lets acknowledgements
// already handed to the client reach the broker.
func (s *Subscriber) Disconnect(quiesce time.Duration) {
	s.stopping.Store(true)
	s.client.Disconnect(uint(quiesce.Milliseconds()))
	s.connected.Store(false)
	s.m.BrokerConnected.Set(0)
}

func (s *Subscriber) onConnect(c mqtt.Client) {
	n := s.connects.Add(1)
	if n > 1 {
		s.m.Reconnects.Inc()
	}
	s.connected.Store(true)
	s.m.BrokerConnected.Set(1)
	s.log.Info("connected", "broker", s.o.MQTT.Broker, "client_id", s.clientID(), "connection", n)
	filters := make(map[string]byte, len(s.subs))
	for _, sub := range s.subs {
		filters[sub.filter] = sub.qos
	}
	tok := c.SubscribeMultiple(filters, nil) // the routes added in NewSubscriber handle the messages
	if !tok.WaitTimeout(15 * time.Second) {
		s.setErr(errors.New("subscribe: no answer from the broker within 15 s"))
		s.log.Error("subscribe timed out (a persistent session keeps earlier subscriptions)", "topics", s.Filters())
		return
	}
	if err := tok.Error(); err != nil {
		s.setErr(fmt.Errorf("subscribe: %w", err))
		s.log.Error("subscribe failed", "topics", s.Filters(), "err", err)
		return
	}
	if st, ok := tok.(*mqtt.SubscribeToken); ok {
		for topic, code := range st.Result() {
			if code == 0x80 {
				s.setErr(fmt.Errorf("subscribe %q: refused by the broker", topic))
				s.log.Error("broker refused subscription (check its ACL)", "topic", topic)
			}
		}
	}
	for _, sub := range s.subs {
		s.log.Info("subscribed", "topic", sub.filter, "qos", sub.qos)
	}
	s.setErr(nil)
	s.subOnce.Do(func() { close(s.subDone) })
}

func (s *Subscriber) onLost(_ mqtt.Client, err error) {
	s.connected.Store(false)
	s.m.BrokerConnected.Set(0)
	s.setErr(err)
	s.log.Warn("connection to broker lost; reconnecting (unacknowledged messages will be redelivered)",
		"broker", s.o.MQTT.Broker, "err", err)
}

func (s *Subscriber) setErr(err error) {
	s.mu.Lock()
	s.lastErr = err
	s.mu.Unlock()
}

func (s *Subscriber) handler(dec Decoder) mqtt.MessageHandler {
	return func(_ mqtt.Client, m mqtt.Message) {
		if s.stopping.Load() {
			return
		}
		recv := time.Now().UTC()
		s.m.MessagesReceived.Inc()
		payload := m.Payload()
		rs, err := dec.Decode(m.Topic(), payload, recv, nil)
		s.m.ReadingsReceived.Add(float64(len(rs)))
		msg := &Message{Topic: m.Topic(), Recv: recv, Readings: rs, Ack: m.Ack, Redelivered: m.Duplicate()}
		if err != nil {
			msg.Err, msg.Payload = err, payload
		}
		s.enqueue(msg)
	}
}

func (s *Subscriber) airHandler(site string) mqtt.MessageHandler {
	return func(_ mqtt.Client, m mqtt.Message) {
		if s.stopping.Load() {
			return
		}
		recv := time.Now().UTC()
		s.m.MessagesReceived.Inc()
		t, c, err := ParseAirTemp(m.Payload(), recv)
		if err != nil {
			s.enqueue(&Message{Topic: m.Topic(), Recv: recv, Payload: m.Payload(), Ack: m.Ack, Err: err})
			return
		}
		if s.o.OnAir != nil {
			s.o.OnAir(site, t, c)
		}
		m.Ack()
	}
}

// ParseAirTemp reads an air-temperature payload: a bare number in °C, or a
// JSON object with "temp_c" (or "air_c") and an optional "time" (RFC 3339 or
// epoch, as in format json; absent: recv).
func ParseAirTemp(p []byte, recv time.Time) (time.Time, float64, error) {
	b := trimSpace(p)
	if v, err := strconv.ParseFloat(string(b), 64); err == nil {
		if !finite(v) {
			return recv, 0, decErr(ReasonNonFinite, "air temperature is not finite")
		}
		return recv, v, nil
	}
	var obj struct {
		Time  json.RawMessage `json:"time"`
		TempC *float64        `json:"temp_c"`
		AirC  *float64        `json:"air_c"`
	}
	if err := json.Unmarshal(b, &obj); err != nil {
		return recv, 0, decErr(ReasonBadNumber, "air temperature: want a number or {\"temp_c\": …}: %s", snippet(b))
	}
	v := obj.TempC
	if v == nil {
		v = obj.AirC
	}
	if v == nil {
		return recv, 0, decErr(ReasonMissingField, "air temperature: no temp_c")
	}
	t, _, err := resolveTime(obj.Time, recv)
	if err != nil {
		return recv, 0, err
	}
	return t, *v, nil
}

// unknownTopic handles messages no subscription matches (e.g. a filter the
// persistent session still holds from an older configuration): they can never
// be decoded, so they are dead-lettered and acknowledged.
func (s *Subscriber) unknownTopic(_ mqtt.Client, m mqtt.Message) {
	if s.stopping.Load() {
		return
	}
	s.m.MessagesReceived.Inc()
	s.enqueue(&Message{
		Topic: m.Topic(), Recv: time.Now().UTC(), Payload: m.Payload(), Ack: m.Ack,
		Reason: ReasonUnknownTopic, Err: fmt.Errorf("no subscription matches topic %q", clip(m.Topic())),
	})
}

func (s *Subscriber) enqueue(msg *Message) {
	if err := s.o.Sink.Enqueue(s.ctx, msg); err != nil {
		// Shutting down: not acknowledged, the broker redelivers it.
		s.log.Debug("message left to the broker", "topic", msg.Topic, "err", err)
	}
}
