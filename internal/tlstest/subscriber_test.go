package tlstest

import (
	"context"
	"fmt"
	"testing"
	"time"

	"holomix/ingest"
	"holomix/internal/testenv"
)

// chanSink acknowledges every message and hands it to the test.
type chanSink chan *ingest.Message

func (c chanSink) Enqueue(ctx context.Context, m *ingest.Message) error {
	if m.Ack != nil {
		m.Ack()
	}
	select {
	case c <- m:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}

// TestSubscriberOverTLS runs the daemon's own subscriber (ingest.Subscriber)
// against a broker that requires TLS with a client certificate and a password:
// it subscribes, and a reading published by another client arrives decoded.
// With only the unrelated CA trusted it never gets a session.
func TestSubscriberOverTLS(t *testing.T) {
	pki := testenv.GenerateTLS(t, t.TempDir())
	pwFile := passwordFile(t, "buoyreader", "K7#wren-larch-19")
	b := testenv.StartMosquitto(t, testenv.MosquittoOptions{TLS: pki.Files(true), PasswordFile: pwFile, Extra: testenv.MosquittoUserLine()})
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()

	body := func(ca string) string {
		return fmt.Sprintf("  broker: %s\n  client_id: sub-%d\n  username: buoyreader\n  password: {file: %s}\n  tls:\n    ca_file: %s\n    cert_file: %s\n    key_file: %s\n",
			b.TLSURL, time.Now().UnixNano(), secretFile(t, "K7#wren-larch-19"), ca, pki.ClientCertFile, pki.ClientKeyFile)
	}
	sink := make(chanSink, 4)
	sub, err := ingest.NewSubscriber(ingest.SubscriberOptions{MQTT: loadMQTT(t, body(pki.CAFile)), Sink: sink, ConnectRetry: 200 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	sub.Start(ctx)
	defer sub.Disconnect(100 * time.Millisecond)
	select {
	case <-sub.Subscribed():
	case <-time.After(15 * time.Second):
		t.Fatalf("subscriber did not subscribe over TLS within 15 s: last error %v\n%s", sub.LastError(), b.Log())
	}

	pubCfg := loadMQTT(t, body(pki.CAFile))
	pubCfg.ClientID = "publisher"
	pub, err := connect(t, pubCfg)
	if err != nil {
		t.Fatal(err)
	}
	payload := `{"time":"2026-11-20T06:00:00Z","depth_m":18,"temp_c":4.02}`
	if tok := pub.Publish("buoys/larchmere/chain", 1, false, payload); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("publish: %v", tok.Error())
	}
	select {
	case m := <-sink:
		if m.Err != nil || len(m.Readings) != 1 {
			t.Fatalf("message %+v", m)
		}
		r := m.Readings[0]
		if r.Site != "larchmere" || r.Depth != 18 || r.TempC != 4.02 || !r.Time.Equal(time.Date(2026, 11, 20, 6, 0, 0, 0, time.UTC)) {
			t.Fatalf("reading %+v", r)
		}
	case <-time.After(10 * time.Second):
		t.Fatal("reading not received by the subscriber over TLS")
	}

	bad, err := ingest.NewSubscriber(ingest.SubscriberOptions{MQTT: loadMQTT(t, body(pki.OtherCAFile)), Sink: make(chanSink, 1), ConnectRetry: 200 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	bad.Start(ctx)
	defer bad.Disconnect(0)
	select {
	case <-bad.Subscribed():
		t.Fatal("subscriber trusting only an unrelated CA got a session")
	case <-time.After(3 * time.Second):
	}
	if bad.Connected() {
		t.Fatal("subscriber trusting only an unrelated CA reports connected")
	}
	t.Logf("wrong-CA subscriber after 3 s: connected=%t last error=%v", bad.Connected(), bad.LastError())
}
