package config

import (
	"crypto/tls"
	"crypto/x509"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"holomix/internal/testenv"
)

func TestTLSClientConfig(t *testing.T) {
	pki := testenv.GenerateTLS(t, t.TempDir())

	c, err := TLS{CAFile: pki.CAFile, CertFile: pki.ClientCertFile, KeyFile: pki.ClientKeyFile, ServerName: "localhost"}.ClientConfig()
	if err != nil {
		t.Fatal(err)
	}
	if c.MinVersion != tls.VersionTLS12 || c.ServerName != "localhost" || c.InsecureSkipVerify || len(c.Certificates) != 1 || c.RootCAs == nil {
		t.Fatalf("tls.Config not as configured: %+v", c)
	}
	// The pool holds exactly the configured CA: the server certificate verifies
	// against it and not against the unrelated CA.
	server := loadCert(t, pki.ServerCertFile)
	if _, err := server.Verify(x509.VerifyOptions{Roots: c.RootCAs, DNSName: "localhost"}); err != nil {
		t.Fatalf("server certificate does not verify against ca_file: %v", err)
	}
	other, err := TLS{CAFile: pki.OtherCAFile}.ClientConfig()
	if err != nil {
		t.Fatal(err)
	}
	_, err = server.Verify(x509.VerifyOptions{Roots: other.RootCAs, DNSName: "localhost"})
	var unknown x509.UnknownAuthorityError
	if !errors.As(err, &unknown) {
		t.Fatalf("want unknown authority against the unrelated CA, got %v", err)
	}
	if h := TLSHint(err); !strings.Contains(h, "ca_file") {
		t.Fatalf("hint %q", h)
	}
	_, err = server.Verify(x509.VerifyOptions{Roots: c.RootCAs, DNSName: "broker.example"})
	if h := TLSHint(err); !strings.Contains(h, `"broker.example"`) || !strings.Contains(h, "server_name") {
		t.Fatalf("hostname hint %q for %v", h, err)
	}

	// No settings: system roots, no client certificate.
	c, err = TLS{}.ClientConfig()
	if err != nil || c.RootCAs != nil || len(c.Certificates) != 0 {
		t.Fatalf("empty TLS: %+v %v", c, err)
	}
}

func TestTLSClientConfigErrors(t *testing.T) {
	pki := testenv.GenerateTLS(t, t.TempDir())
	notPEM := filepath.Join(t.TempDir(), "ca.pem")
	if err := os.WriteFile(notPEM, []byte("not a certificate\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	cases := []struct {
		name string
		tls  TLS
		want string
	}{
		{"missing ca", TLS{CAFile: filepath.Join(t.TempDir(), "none.pem")}, "no such file"},
		{"ca not PEM", TLS{CAFile: notPEM}, "no PEM certificate found"},
		{"cert without key", TLS{CertFile: pki.ClientCertFile}, "must be given together"},
		{"key does not match", TLS{CertFile: pki.ClientCertFile, KeyFile: pki.OtherClientKeyFile}, "private key does not match"},
	}
	for _, tc := range cases {
		_, err := tc.tls.ClientConfig()
		if err == nil || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("%s: error %v, want one containing %q", tc.name, err, tc.want)
		}
	}
}

func TestBrokerUsesTLS(t *testing.T) {
	for broker, want := range map[string]bool{
		"ssl://b:8883": true, "tls://b:8883": true, "mqtts://b:8883": true, "wss://b/mqtt": true,
		"tcp://b:1883": false, "ws://b/mqtt": false, "mqtt://b:1883": false,
	} {
		if got := (MQTT{Broker: broker}).BrokerUsesTLS(); got != want {
			t.Errorf("%s: %t", broker, got)
		}
	}
}

func loadCert(t *testing.T, path string) *x509.Certificate {
	t.Helper()
	c, err := tls.LoadX509KeyPair(path, strings.TrimSuffix(path, ".pem")+".key")
	if err != nil {
		t.Fatal(err)
	}
	x, err := x509.ParseCertificate(c.Certificate[0])
	if err != nil {
		t.Fatal(err)
	}
	return x
}
