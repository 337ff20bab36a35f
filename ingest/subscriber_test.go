package ingest

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"fmt"
	"math/big"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"

	"holomix/config"
	"holomix/internal/testenv"
)

// subRig is a spool, a committer and a subscriber running together.
type subRig struct {
	spool *Spool
	com   *Committer
	sub   *Subscriber
	m     *Metrics
	logs  *spLogBuf
	stop  func()
}

func subMQTT(broker, clientID string) config.MQTT {
	return config.MQTT{
		Broker: broker, ClientID: clientID, QoS: 1,
		Subscriptions: []config.Subscription{{Topic: "lakes/+/temp", Format: FormatJSON, Template: "lakes/{site}/temp"}},
	}
}

func startSubRig(t *testing.T, spoolPath string, mc config.MQTT) *subRig {
	t.Helper()
	s, err := OpenSpool(spoolPath, SpoolOptions{})
	if err != nil {
		t.Fatal(err)
	}
	r := &subRig{spool: s, m: NewMetrics(nil), logs: &spLogBuf{}}
	log := spLogger(r.logs)
	r.com = NewCommitter(CommitterOptions{Spool: s, Metrics: r.m, Logger: log})
	r.sub, err = NewSubscriber(SubscriberOptions{MQTT: mc, Sink: r.com, Metrics: r.m, Logger: log, ConnectRetry: 200 * time.Millisecond, MaxReconnect: time.Second})
	if err != nil {
		s.Close()
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- r.com.Run(ctx) }()
	r.sub.Start(ctx)
	select {
	case <-r.sub.Subscribed():
	case <-time.After(15 * time.Second):
		t.Fatalf("not subscribed within 15 s; log:\n%s", r.logs.String())
	}
	stopped := false
	r.stop = func() {
		if stopped {
			return
		}
		stopped = true
		r.sub.StopIntake()
		cancel()
		if err := <-done; err != nil {
			t.Errorf("committer: %v", err)
		}
		r.sub.Disconnect(250 * time.Millisecond)
		s.Close()
	}
	t.Cleanup(r.stop)
	return r
}

// subPublish publishes QoS 1 messages and waits for every PUBACK.
func subPublish(t testing.TB, broker, id string, msgs map[string][]string) {
	t.Helper()
	c := mqtt.NewClient(mqtt.NewClientOptions().AddBroker(broker).SetClientID(id))
	if tok := c.Connect(); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		t.Fatalf("publisher connect: %v", tok.Error())
	}
	defer c.Disconnect(100)
	var toks []mqtt.Token
	for topic, ps := range msgs {
		for _, p := range ps {
			toks = append(toks, c.Publish(topic, 1, false, p))
		}
	}
	for _, tok := range toks {
		if !tok.WaitTimeout(20*time.Second) || tok.Error() != nil {
			t.Fatalf("publish: %v", tok.Error())
		}
	}
}

func subPayloads(n int, start time.Time) []string {
	out := make([]string, n)
	for i := range out {
		out[i] = fmt.Sprintf(`{"time":"%s","depth_m":%d,"temp_c":%.2f}`, start.Add(time.Duration(i)*time.Minute).Format(time.RFC3339), i%12, 4+float64(i%50)/10)
	}
	return out
}

func TestSubscriberSpoolsAcknowledgesAndDeadLetters(t *testing.T) {
	mq := testenv.StartMosquitto(t, testenv.MosquittoOptions{Extra: testenv.MosquittoUserLine()})
	// A persistent session left over from an older configuration holds "old/#".
	old := mqtt.NewClient(mqtt.NewClientOptions().AddBroker(mq.URL).SetClientID("holomix-sub1").SetCleanSession(false))
	if tok := old.Connect(); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		t.Fatal(tok.Error())
	}
	if tok := old.Subscribe("old/#", 1, nil); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		t.Fatal(tok.Error())
	}
	old.Disconnect(100)

	path := filepath.Join(t.TempDir(), "spool.db")
	r := startSubRig(t, path, subMQTT(mq.URL, "holomix-sub1"))
	for _, want := range []string{`msg=connected`, `client_id=holomix-sub1`, `msg=subscribed topic=lakes/+/temp qos=1`} {
		if !strings.Contains(r.logs.String(), want) {
			t.Fatalf("log lacks %q:\n%s", want, r.logs.String())
		}
	}
	subPublish(t, mq.URL, "pub1", map[string][]string{
		"lakes/fen/temp":  subPayloads(300, spT0),
		"lakes/mere/temp": append(subPayloads(200, spT0), `{"depth_m": 1, "temp_c": }`, `{"depth_m": -4, "temp_c": 3}`),
		"old/x":           {"stale"},
	})
	spWaitFor(t, "500 readings and 3 dead letters", 20*time.Second, func() bool {
		st, _ := r.spool.Stats()
		return st.LastSeq == 500 && st.DeadLetters == 3 && r.com.Pending() == 0
	})
	dl, _ := r.spool.DeadLetters(0, 10)
	reasons := map[string]string{}
	for _, d := range dl {
		reasons[d.Reason] = d.Topic
	}
	if reasons[ReasonBadJSON] != "lakes/mere/temp" || reasons[ReasonNegativeDepth] != "lakes/mere/temp" || reasons[ReasonUnknownTopic] != "old/x" {
		t.Fatalf("dead letters by reason: %v", reasons)
	}
	es, _ := r.spool.ReadReadings(0, 1000, nil)
	sites := map[string]int{}
	for _, e := range es {
		sites[e.Site]++
	}
	if sites["fen"] != 300 || sites["mere"] != 200 {
		t.Fatalf("readings per site %v", sites)
	}
	if v := spValue(r.m.MessagesReceived); v != 503 {
		t.Fatalf("messages received %v, want 503", v)
	}
	r.stop()

	// Everything was acknowledged: a new session with the same client id gets
	// nothing again, only what is published now.
	r2 := startSubRig(t, path, subMQTT(mq.URL, "holomix-sub1"))
	subPublish(t, mq.URL, "pub2", map[string][]string{"lakes/fen/temp": subPayloads(1, spT0.Add(24*time.Hour))})
	spWaitFor(t, "one more reading", 10*time.Second, func() bool { st, _ := r2.spool.Stats(); return st.LastSeq == 501 })
	time.Sleep(300 * time.Millisecond)
	if st, _ := r2.spool.Stats(); st.LastSeq != 501 || spValue(r2.m.ReadingsDuplicate) != 0 {
		t.Fatalf("after reconnecting: last seq %d, duplicates %v: acknowledged messages came back", st.LastSeq, spValue(r2.m.ReadingsDuplicate))
	}
}

// holdSink receives messages and never acknowledges them.
type holdSink struct{ n chan struct{} }

func (h *holdSink) Enqueue(_ context.Context, _ *Message) error {
	h.n <- struct{}{}
	return nil
}

// TestSubscriberUnacknowledgedAreRedelivered: messages received but never
// acknowledged (e.g. the process died before the spool commit) come back in
// the next session of the same client id.
func TestSubscriberUnacknowledgedAreRedelivered(t *testing.T) {
	mq := testenv.StartMosquitto(t, testenv.MosquittoOptions{Extra: testenv.MosquittoUserLine()})
	hold := &holdSink{n: make(chan struct{}, 100)}
	sub, err := NewSubscriber(SubscriberOptions{MQTT: subMQTT(mq.URL, "holomix-redeliver"), Sink: hold})
	if err != nil {
		t.Fatal(err)
	}
	sub.Start(context.Background())
	within(t, sub.Subscribed(), 15*time.Second, "subscribed")
	subPublish(t, mq.URL, "pub", map[string][]string{"lakes/fen/temp": subPayloads(10, spT0)})
	for i := 0; i < 10; i++ {
		select {
		case <-hold.n:
		case <-time.After(10 * time.Second):
			t.Fatalf("received %d of 10", i)
		}
	}
	sub.Disconnect(0)

	r := startSubRig(t, filepath.Join(t.TempDir(), "spool.db"), subMQTT(mq.URL, "holomix-redeliver"))
	spWaitFor(t, "10 redelivered readings", 15*time.Second, func() bool { st, _ := r.spool.Stats(); return st.LastSeq == 10 })
	es, _ := r.spool.ReadReadings(0, 100, nil)
	for _, e := range es {
		if !e.Redelivered {
			t.Fatalf("a redelivered message (MQTT DUP) is not marked: %+v", e)
		}
	}
}

// TestSubscriberReconnectsAndResubscribes restarts the broker under a
// running subscriber.
func TestSubscriberReconnectsAndResubscribes(t *testing.T) {
	mq := testenv.StartMosquitto(t, testenv.MosquittoOptions{Extra: testenv.MosquittoUserLine()})
	mc := subMQTT(mq.URL, "holomix-reconnect")
	mc.CleanSession = true // resubscription in OnConnect must work without a stored session too
	r := startSubRig(t, filepath.Join(t.TempDir(), "spool.db"), mc)
	mq.Stop()
	spWaitFor(t, "disconnect noticed", 10*time.Second, func() bool { return !r.sub.Connected() })
	mq.Start(t)
	spWaitFor(t, "reconnected", 20*time.Second, func() bool { return r.sub.Connected() })
	// The subscription is renewed right after CONNACK; with a clean session a
	// publish before that would reach no one.
	spWaitFor(t, "subscribed again", 10*time.Second, func() bool { return strings.Count(r.logs.String(), "msg=subscribed") >= 2 })
	subPublish(t, mq.URL, "pub", map[string][]string{"lakes/fen/temp": subPayloads(5, spT0)})
	spWaitFor(t, "readings after reconnect", 15*time.Second, func() bool { st, _ := r.spool.Stats(); return st.LastSeq == 5 })
	if v := spValue(r.m.Reconnects); v != 1 {
		t.Fatalf("holomix_mqtt_reconnects_total = %v, want 1", v)
	}
	if n := strings.Count(r.logs.String(), "msg=subscribed"); n != 2 {
		t.Fatalf("subscribed %d times, want 2 (initial + after reconnect):\n%s", n, r.logs.String())
	}
}

// TestSubscriberTLSAndPassword connects through a TLS listener that requires
// a client certificate, with a server name and a password.
func TestSubscriberTLSAndPassword(t *testing.T) {
	dir := t.TempDir()
	files := subCerts(t, dir)
	pw := filepath.Join(dir, "passwd")
	if out, err := exec.Command("mosquitto_passwd", "-b", "-c", pw, "buoyreader", "tern-42").CombinedOutput(); err != nil {
		t.Fatalf("mosquitto_passwd: %v: %s", err, out)
	}
	mq := testenv.StartMosquitto(t, testenv.MosquittoOptions{Extra: testenv.MosquittoUserLine(), PasswordFile: pw, TLS: &testenv.TLSFiles{
		CAFile: files["ca"], CertFile: files["server"], KeyFile: files["server-key"], RequireClientCert: true}})
	mc := subMQTT(mq.TLSURL, "holomix-tls")
	mc.Username = "buoyreader"
	mc.Password.Set("tern-42")
	mc.TLS = config.TLS{CAFile: files["ca"], CertFile: files["client"], KeyFile: files["client-key"], ServerName: "broker.holomix.test"}
	r := startSubRig(t, filepath.Join(dir, "spool.db"), mc)

	pub := mqtt.NewClient(mqtt.NewClientOptions().AddBroker(mq.URL).SetClientID("pub").SetUsername("buoyreader").SetPassword("tern-42"))
	if tok := pub.Connect(); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		t.Fatal(tok.Error())
	}
	defer pub.Disconnect(100)
	if tok := pub.Publish("lakes/fen/temp", 1, false, subPayloads(1, spT0)[0]); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		t.Fatal(tok.Error())
	}
	spWaitFor(t, "a reading over TLS", 10*time.Second, func() bool { st, _ := r.spool.Stats(); return st.LastSeq == 1 })

	// A wrong password is refused (and retried, not fatal).
	bad := subMQTT(mq.TLSURL, "holomix-tls-bad")
	bad.Username = "buoyreader"
	bad.Password.Set("wrong")
	bad.TLS = mc.TLS
	s, err := NewSubscriber(SubscriberOptions{MQTT: bad, Sink: &holdSink{n: make(chan struct{}, 1)}, ConnectRetry: 100 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	s.Start(context.Background())
	time.Sleep(700 * time.Millisecond)
	if s.Connected() {
		t.Fatal("connected with a wrong password")
	}
	s.Disconnect(0)
}

func TestTLSConfigErrors(t *testing.T) {
	if tc, err := TLSConfig(config.TLS{CAFile: "/nonexistent"}, "tcp://127.0.0.1:1883"); tc != nil || err != nil {
		t.Fatalf("plain tcp: %v %v", tc, err)
	}
	if tc, err := TLSConfig(config.TLS{}, "ssl://127.0.0.1:8883"); tc == nil || err != nil {
		t.Fatalf("ssl scheme without settings uses the system roots: %v %v", tc, err)
	}
	if _, err := TLSConfig(config.TLS{CAFile: "/nonexistent/ca.pem"}, "ssl://x"); err == nil {
		t.Fatal("missing CA file accepted")
	}
	if _, err := TLSConfig(config.TLS{CertFile: "c.pem"}, "ssl://x"); err == nil {
		t.Fatal("cert without key accepted")
	}
}

func TestNewSubscriberRejectsBadConfig(t *testing.T) {
	sink := &holdSink{}
	for name, mc := range map[string]config.MQTT{
		"no broker":     {Subscriptions: []config.Subscription{{Topic: "a", Format: "json"}}},
		"no subs":       {Broker: "tcp://127.0.0.1:1"},
		"twice":         {Broker: "tcp://127.0.0.1:1", Subscriptions: []config.Subscription{{Topic: "a", Format: "json"}, {Topic: "a", Format: "json"}}},
		"bad format":    {Broker: "tcp://127.0.0.1:1", Subscriptions: []config.Subscription{{Topic: "a", Format: "xml"}}},
		"bad qos":       {Broker: "tcp://127.0.0.1:1", QoS: 3, Subscriptions: []config.Subscription{{Topic: "a", Format: "json"}}},
		"bad tls files": {Broker: "ssl://127.0.0.1:1", TLS: config.TLS{CAFile: "/nonexistent"}, Subscriptions: []config.Subscription{{Topic: "a", Format: "json"}}},
	} {
		if _, err := NewSubscriber(SubscriberOptions{MQTT: mc, Sink: sink}); err == nil {
			t.Errorf("%s: accepted", name)
		}
	}
}

// subCerts writes a CA, a server certificate (127.0.0.1 and
// broker.holomix.test) and a client certificate as PEM files.
func subCerts(t *testing.T, dir string) map[string]string {
	t.Helper()
	files := map[string]string{}
	write := func(name, typ string, der []byte) {
		p := filepath.Join(dir, name+".pem")
		if err := os.WriteFile(p, pem.EncodeToMemory(&pem.Block{Type: typ, Bytes: der}), 0o600); err != nil {
			t.Fatal(err)
		}
		files[name] = p
	}
	newKey := func(name string) *ecdsa.PrivateKey {
		k, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
		if err != nil {
			t.Fatal(err)
		}
		der, _ := x509.MarshalECPrivateKey(k)
		write(name, "EC PRIVATE KEY", der)
		return k
	}
	caKey := newKey("ca-key")
	ca := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "holomix test CA"},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(24 * time.Hour),
		IsCA: true, BasicConstraintsValid: true, KeyUsage: x509.KeyUsageCertSign}
	caDER, err := x509.CreateCertificate(rand.Reader, ca, ca, &caKey.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	write("ca", "CERTIFICATE", caDER)
	caCert, _ := x509.ParseCertificate(caDER)
	leaf := func(name string, serial int64, usage x509.ExtKeyUsage) {
		k := newKey(name + "-key")
		tpl := &x509.Certificate{SerialNumber: big.NewInt(serial), Subject: pkix.Name{CommonName: name},
			NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(24 * time.Hour),
			KeyUsage: x509.KeyUsageDigitalSignature, ExtKeyUsage: []x509.ExtKeyUsage{usage},
			DNSNames: []string{"broker.holomix.test"}, IPAddresses: []net.IP{net.ParseIP("127.0.0.1")}}
		der, err := x509.CreateCertificate(rand.Reader, tpl, caCert, &k.PublicKey, caKey)
		if err != nil {
			t.Fatal(err)
		}
		write(name, "CERTIFICATE", der)
	}
	leaf("server", 2, x509.ExtKeyUsageServerAuth)
	leaf("client", 3, x509.ExtKeyUsageClientAuth)
	return files
}

// TestSubscriberAirTopics: air temperatures go to OnAir (not to the spool);
// a payload that does not parse is dead-lettered.
func TestSubscriberAirTopics(t *testing.T) {
	mq := testenv.StartMosquitto(t, testenv.MosquittoOptions{Extra: testenv.MosquittoUserLine()})
	s, err := OpenSpool(filepath.Join(t.TempDir(), "spool.db"), SpoolOptions{})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	com := NewCommitter(CommitterOptions{Spool: s})
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	go com.Run(ctx)
	type air struct {
		site string
		t    time.Time
		c    float64
	}
	got := make(chan air, 10)
	sub, err := NewSubscriber(SubscriberOptions{MQTT: subMQTT(mq.URL, "holomix-air"), Sink: com,
		AirTopics: map[string]string{"weather/fen/air": "fen"},
		OnAir:     func(site string, ts time.Time, c float64) { got <- air{site, ts, c} }})
	if err != nil {
		t.Fatal(err)
	}
	sub.Start(ctx)
	within(t, sub.Subscribed(), 15*time.Second, "subscribed")
	defer sub.Disconnect(100 * time.Millisecond)
	subPublish(t, mq.URL, "pub", map[string][]string{"weather/fen/air": {"-7.25"}})
	subPublish(t, mq.URL, "pub", map[string][]string{"weather/fen/air": {`{"time":"2026-01-10T06:00:00Z","temp_c":-12.5}`}})
	subPublish(t, mq.URL, "pub", map[string][]string{"weather/fen/air": {"cold"}})
	a := within(t, got, 15*time.Second, "the bare-number air temperature")
	if a.site != "fen" || a.c != -7.25 || time.Since(a.t) > time.Minute {
		t.Fatalf("bare number: %+v", a)
	}
	a = within(t, got, 15*time.Second, "the JSON air temperature")
	if a.c != -12.5 || !a.t.Equal(time.Date(2026, 1, 10, 6, 0, 0, 0, time.UTC)) {
		t.Fatalf("json: %+v", a)
	}
	spWaitFor(t, "dead letter", 5*time.Second, func() bool { st, _ := s.Stats(); return st.DeadLetters == 1 })
	if st, _ := s.Stats(); st.LastSeq != 0 {
		t.Fatalf("air temperatures reached the reading spool: %d", st.LastSeq)
	}
}

func TestParseAirTemp(t *testing.T) {
	recv := spT0
	for _, c := range []struct {
		in     string
		want   float64
		reason string
	}{{" 3.5\n", 3.5, ""}, {`{"air_c": -2}`, -2, ""}, {`{"time": 1}`, 0, ReasonMissingField}, {"NaN", 0, ReasonNonFinite}, {"[1]", 0, ReasonBadNumber}} {
		_, v, err := ParseAirTemp([]byte(c.in), recv)
		if Reason(err) != c.reason || (err == nil && v != c.want) {
			t.Errorf("%q: %v, %v; want %v, reason %q", c.in, v, err, c.want, c.reason)
		}
	}
}

// within receives from ch or fails the test after d.
func within[T any](t *testing.T, ch <-chan T, d time.Duration, what string) T {
	t.Helper()
	select {
	case v := <-ch:
		return v
	case <-time.After(d):
		t.Fatalf("no %s within %v", what, d)
	}
	var zero T
	return zero
}
