package tlstest

import (
	"crypto/x509"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"

	"holomix/config"
	"holomix/ingest"
	"holomix/internal/testenv"
)

// loadMQTT writes a configuration file with the given mqtt section body and loads
// it the way the daemon does (secrets resolved, relative paths made absolute).
func loadMQTT(t *testing.T, mqttBody string) config.MQTT {
	t.Helper()
	dir := t.TempDir()
	y := "mqtt:\n" + mqttBody + "  subscriptions:\n    - topic: buoys/+/chain\n      template: buoys/{site}/chain\n" +
		"storage:\n  dir: " + dir + "\n"
	path := filepath.Join(dir, "holomix.yaml")
	if err := os.WriteFile(path, []byte(y), 0o600); err != nil {
		t.Fatal(err)
	}
	cfg, err := config.LoadWith(path, config.Options{Getenv: func(string) string { return "" }})
	if err != nil {
		t.Fatalf("load configuration: %v\n%s", err, y)
	}
	return cfg.MQTT
}

// connect opens a one-shot MQTT connection from the configuration with the
// daemon's own TLS code (ingest.TLSConfig), so each refusal comes back as an
// error to inspect: broker URL, client id, username and password from the
// secret. The subscriber itself retries forever; TestSubscriberOverTLS runs it.
func connect(t *testing.T, m config.MQTT) (mqtt.Client, error) {
	t.Helper()
	o := mqtt.NewClientOptions().AddBroker(m.Broker).SetClientID(m.ClientID).
		SetConnectRetry(false).SetAutoReconnect(false).SetConnectTimeout(5 * time.Second)
	if m.Username != "" {
		o.SetUsername(m.Username)
		o.SetPassword(m.Password.Get())
	}
	tc, err := ingest.TLSConfig(m.TLS, m.Broker)
	if err != nil {
		return nil, fmt.Errorf("tls settings: %w", err)
	}
	if m.BrokerUsesTLS() != (tc != nil) {
		t.Fatalf("ingest.TLSConfig and config.BrokerUsesTLS disagree about %s", m.Broker)
	}
	if tc != nil {
		o.SetTLSConfig(tc)
	}
	c := mqtt.NewClient(o)
	tok := c.Connect()
	if !tok.WaitTimeout(10 * time.Second) {
		return nil, errors.New("connect timed out")
	}
	if err := tok.Error(); err != nil {
		return nil, err
	}
	t.Cleanup(func() { c.Disconnect(100) })
	return c, nil
}

// roundTrip proves the connection carries messages: subscribe, publish at QoS 1, receive.
func roundTrip(t *testing.T, c mqtt.Client) {
	t.Helper()
	got := make(chan string, 1)
	if tok := c.Subscribe("buoys/+/chain", 1, func(_ mqtt.Client, msg mqtt.Message) { got <- string(msg.Payload()) }); !tok.WaitTimeout(15*time.Second) || tok.Error() != nil {
		t.Fatalf("subscribe: %v", tok.Error())
	}
	payload := `{"time":"2026-11-20T06:00:00Z","depth_m":4,"temp_c":4.02}`
	if tok := c.Publish("buoys/fenwater/chain", 1, false, payload); !tok.WaitTimeout(15*time.Second) || tok.Error() != nil {
		t.Fatalf("publish: %v", tok.Error())
	}
	select {
	case s := <-got:
		if s != payload {
			t.Fatalf("received %q, want %q", s, payload)
		}
	case <-time.After(15 * time.Second):
		t.Fatal("message not received over the connection within 15 s")
	}
}

func tlsBody(broker string, lines ...string) string {
	var b strings.Builder
	fmt.Fprintf(&b, "  broker: %s\n  client_id: tls-test-%d\n", broker, time.Now().UnixNano())
	if len(lines) > 0 {
		b.WriteString("  tls:\n")
		for _, l := range lines {
			b.WriteString("    " + l + "\n")
		}
	}
	return b.String()
}

// TestTLSVerifiedConnection: a broker certificate signed by the configured CA is
// verified (by IP SAN 127.0.0.1, and by name with server_name: localhost) and the
// connection carries messages.
func TestTLSVerifiedConnection(t *testing.T) {
	pki := testenv.GenerateTLS(t, t.TempDir())
	b := testenv.StartMosquitto(t, testenv.MosquittoOptions{TLS: pki.Files(false), Extra: testenv.MosquittoUserLine()})

	c, err := connect(t, loadMQTT(t, tlsBody(b.TLSURL, "ca_file: "+pki.CAFile)))
	if err != nil {
		t.Fatalf("verified TLS connection refused: %v\n%s", err, b.Log())
	}
	roundTrip(t, c)

	byName := strings.Replace(b.TLSURL, "127.0.0.1", "localhost", 1)
	if _, err := connect(t, loadMQTT(t, tlsBody(byName, "ca_file: "+pki.CAFile, "server_name: localhost"))); err != nil {
		t.Fatalf("connection by name refused: %v", err)
	}
}

// TestTLSWrongCARefused: trusting only an unrelated CA must refuse the broker,
// and the error must name the certificate problem (x509 unknown authority);
// config.TLSHint turns it into an instruction about tls.ca_file.
func TestTLSWrongCARefused(t *testing.T) {
	pki := testenv.GenerateTLS(t, t.TempDir())
	b := testenv.StartMosquitto(t, testenv.MosquittoOptions{TLS: pki.Files(false), Extra: testenv.MosquittoUserLine()})

	_, err := connect(t, loadMQTT(t, tlsBody(b.TLSURL, "ca_file: "+pki.OtherCAFile)))
	if err == nil {
		t.Fatal("a broker certificate from an untrusted CA was accepted")
	}
	var unknown x509.UnknownAuthorityError
	if !errors.As(err, &unknown) {
		t.Fatalf("error does not carry x509.UnknownAuthorityError: %v", err)
	}
	if !strings.Contains(err.Error(), "certificate signed by unknown authority") {
		t.Fatalf("error does not name the certificate problem: %v", err)
	}
	if h := config.TLSHint(err); !strings.Contains(h, "ca_file") {
		t.Fatalf("hint %q does not point at ca_file", h)
	}
	t.Logf("refused as expected: %v (hint: %s)", err, config.TLSHint(err))
}

// TestTLSHostnameMismatch: a certificate valid for 127.0.0.1/localhost must not
// be accepted for another name.
func TestTLSHostnameMismatch(t *testing.T) {
	pki := testenv.GenerateTLS(t, t.TempDir())
	b := testenv.StartMosquitto(t, testenv.MosquittoOptions{TLS: pki.Files(false), Extra: testenv.MosquittoUserLine()})

	_, err := connect(t, loadMQTT(t, tlsBody(b.TLSURL, "ca_file: "+pki.CAFile, "server_name: broker.larchmere.example")))
	var host x509.HostnameError
	if !errors.As(err, &host) {
		t.Fatalf("want a hostname error, got %v", err)
	}
	if h := config.TLSHint(err); !strings.Contains(h, "server_name") {
		t.Fatalf("hint %q does not mention server_name", h)
	}
}

// TestTLSClientCertificate: with require_certificate on, a client without a
// certificate or with one from an unrelated CA is refused; the configured
// client certificate is accepted and the connection carries messages.
func TestTLSClientCertificate(t *testing.T) {
	pki := testenv.GenerateTLS(t, t.TempDir())
	b := testenv.StartMosquitto(t, testenv.MosquittoOptions{TLS: pki.Files(true), Extra: testenv.MosquittoUserLine()})

	_, err := connect(t, loadMQTT(t, tlsBody(b.TLSURL, "ca_file: "+pki.CAFile)))
	if err == nil {
		t.Fatal("connection without a client certificate was accepted by a broker that requires one")
	}
	// TLS 1.3 (RFC 8446 §4.4.2.4): the server aborts with a certificate_required
	// alert. The client reads it when it arrives before the client's CONNECT
	// write; otherwise the write meets the closed socket (reset / broken pipe).
	switch msg := err.Error(); {
	case strings.Contains(msg, "certificate required"):
		if !strings.Contains(config.TLSHint(err), "cert_file") {
			t.Fatalf("hint %q does not point at cert_file", config.TLSHint(err))
		}
	case strings.Contains(msg, "connection reset"), strings.Contains(msg, "broken pipe"), strings.Contains(msg, "EOF"):
	default:
		t.Fatalf("unexpected refusal without a client certificate: %v", err)
	}
	t.Logf("without a client certificate: %v (hint: %s)", err, config.TLSHint(err))
	_, err = connect(t, loadMQTT(t, tlsBody(b.TLSURL, "ca_file: "+pki.CAFile,
		"cert_file: "+pki.OtherClientCertFile, "key_file: "+pki.OtherClientKeyFile)))
	if err == nil {
		t.Fatal("a client certificate from an unrelated CA was accepted")
	}
	t.Logf("client certificate from an unrelated CA: %v (hint: %s)", err, config.TLSHint(err))
	c, err := connect(t, loadMQTT(t, tlsBody(b.TLSURL, "ca_file: "+pki.CAFile,
		"cert_file: "+pki.ClientCertFile, "key_file: "+pki.ClientKeyFile)))
	if err != nil {
		t.Fatalf("connection with the client certificate refused: %v\n%s", err, b.Log())
	}
	roundTrip(t, c)
}

// TestUsernamePassword: with a password_file made by mosquitto_passwd, the
// configured username and password (from a secret file) connect; a wrong
// password and an anonymous client are refused with "not authorised".
func TestUsernamePassword(t *testing.T) {
	pwFile := passwordFile(t, "buoyreader", "K7#wren-larch-19")
	b := testenv.StartMosquitto(t, testenv.MosquittoOptions{PasswordFile: pwFile, Extra: testenv.MosquittoUserLine()})

	body := func(pw string) string {
		return fmt.Sprintf("  broker: %s\n  client_id: pw-test-%d\n  username: buoyreader\n  password: {file: %s}\n", b.URL, time.Now().UnixNano(), secretFile(t, pw))
	}
	c, err := connect(t, loadMQTT(t, body("K7#wren-larch-19")))
	if err != nil {
		t.Fatalf("right password refused: %v\n%s", err, b.Log())
	}
	roundTrip(t, c)

	_, err = connect(t, loadMQTT(t, body("wrong-password")))
	if err == nil || !strings.Contains(strings.ToLower(err.Error()), "not authori") {
		t.Fatalf("wrong password: want a 'not authorised' refusal, got %v", err)
	}
	_, err = connect(t, loadMQTT(t, fmt.Sprintf("  broker: %s\n  client_id: anon-%d\n", b.URL, time.Now().UnixNano())))
	if err == nil {
		t.Fatal("anonymous client accepted by a broker with a password file")
	}
}

// passwordFile makes a Mosquitto password_file with mosquitto_passwd (shipped
// with the broker package).
func passwordFile(t *testing.T, user, pass string) string {
	t.Helper()
	bin, err := exec.LookPath("mosquitto_passwd")
	if err != nil {
		t.Fatalf("mosquitto_passwd not found (it ships with the broker: apt-get update && apt-get install -y mosquitto): %v", err)
	}
	p := filepath.Join(t.TempDir(), "passwords")
	if out, err := exec.Command(bin, "-b", "-c", p, user, pass).CombinedOutput(); err != nil {
		t.Fatalf("mosquitto_passwd: %v\n%s", err, out)
	}
	return p
}

// secretFile writes a secret the way an operator does: one line, mode 0600.
func secretFile(t *testing.T, v string) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), "secret")
	if err := os.WriteFile(p, []byte(v+"\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	return p
}
