package testenv

import (
	"crypto/tls"
	"crypto/x509"
	"errors"
	"os"
	"testing"
)

// TestGenerateTLS checks the generated PKI with crypto/x509's own path
// validation (RFC 5280): the server certificate is valid for localhost,
// 127.0.0.1 and ::1 under the CA and for server authentication only; the
// client certificate for client authentication; nothing verifies under the
// unrelated CA; private keys are ECDSA P-256 and match their certificates.
func TestGenerateTLS(t *testing.T) {
	m := GenerateTLS(t, t.TempDir())
	pool := func(path string) *x509.CertPool {
		b, err := os.ReadFile(path)
		if err != nil {
			t.Fatal(err)
		}
		p := x509.NewCertPool()
		if !p.AppendCertsFromPEM(b) {
			t.Fatalf("%s holds no certificate", path)
		}
		return p
	}
	leaf := func(cert, key string) *x509.Certificate {
		pair, err := tls.LoadX509KeyPair(cert, key)
		if err != nil {
			t.Fatalf("key pair %s: %v", cert, err)
		}
		c, err := x509.ParseCertificate(pair.Certificate[0])
		if err != nil {
			t.Fatal(err)
		}
		if c.PublicKeyAlgorithm != x509.ECDSA {
			t.Fatalf("%s: key algorithm %v", cert, c.PublicKeyAlgorithm)
		}
		return c
	}
	ca, other := pool(m.CAFile), pool(m.OtherCAFile)
	server := leaf(m.ServerCertFile, m.ServerKeyFile)
	for _, name := range []string{"localhost", "127.0.0.1", "::1"} {
		if _, err := server.Verify(x509.VerifyOptions{Roots: ca, DNSName: name, KeyUsages: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth}}); err != nil {
			t.Errorf("server certificate for %s: %v", name, err)
		}
	}
	if _, err := server.Verify(x509.VerifyOptions{Roots: ca, DNSName: "broker.example"}); err == nil {
		t.Error("server certificate valid for a name it does not list")
	}
	var unknown x509.UnknownAuthorityError
	if _, err := server.Verify(x509.VerifyOptions{Roots: other, DNSName: "localhost"}); !errors.As(err, &unknown) {
		t.Errorf("server certificate under the unrelated CA: %v", err)
	}
	client := leaf(m.ClientCertFile, m.ClientKeyFile)
	if _, err := client.Verify(x509.VerifyOptions{Roots: ca, KeyUsages: []x509.ExtKeyUsage{x509.ExtKeyUsageClientAuth}}); err != nil {
		t.Errorf("client certificate: %v", err)
	}
	if _, err := client.Verify(x509.VerifyOptions{Roots: ca, KeyUsages: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth}}); err == nil {
		t.Error("client certificate accepted for server authentication")
	}
	otherClient := leaf(m.OtherClientCertFile, m.OtherClientKeyFile)
	if _, err := otherClient.Verify(x509.VerifyOptions{Roots: ca, KeyUsages: []x509.ExtKeyUsage{x509.ExtKeyUsageClientAuth}}); err == nil {
		t.Error("the unrelated client certificate verifies under the test CA")
	}
	if !m.CA.IsCA || m.CA.Subject.CommonName != "holomix test CA" {
		t.Errorf("CA %+v", m.CA.Subject)
	}
}
