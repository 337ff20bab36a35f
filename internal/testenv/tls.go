package testenv

import (
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
	"path/filepath"
	"testing"
	"time"
)

// TLSMaterial is a small PKI for tests, every file PEM in Dir:
//
//	ca.pem                      the test CA (self-signed)
//	server.pem / server.key     server certificate for 127.0.0.1, ::1 and localhost, signed by the CA
//	client.pem / client.key     client certificate (CN "holomix-test-client"), signed by the CA
//	other-ca.pem                a second, unrelated CA: trusting only it must fail
//	other-client.pem / .key     a client certificate signed by the unrelated CA
//
// Keys are ECDSA P-256, certificates valid from an hour ago for a day.
type TLSMaterial struct {
	Dir                                     string
	CAFile                                  string
	ServerCertFile, ServerKeyFile           string
	ClientCertFile, ClientKeyFile           string
	OtherCAFile                             string
	OtherClientCertFile, OtherClientKeyFile string // signed by the unrelated CA
	CA                                      *x509.Certificate
}

// Files returns the broker-side files for testenv.MosquittoOptions.TLS.
func (m TLSMaterial) Files(requireClientCert bool) *TLSFiles {
	return &TLSFiles{CAFile: m.CAFile, CertFile: m.ServerCertFile, KeyFile: m.ServerKeyFile, RequireClientCert: requireClientCert}
}

type issuer struct {
	cert *x509.Certificate
	key  *ecdsa.PrivateKey
}

// GenerateTLS writes a fresh CA, server and client certificates and an unrelated
// CA into dir (created if needed) with Go's crypto/x509. It fails the test on any error.
func GenerateTLS(t testing.TB, dir string) TLSMaterial {
	t.Helper()
	m, err := generateTLS(dir, time.Now())
	if err != nil {
		t.Fatalf("testenv: generate TLS material: %v", err)
	}
	return m
}

func generateTLS(dir string, now time.Time) (TLSMaterial, error) {
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return TLSMaterial{}, err
	}
	m := TLSMaterial{
		Dir:                 dir,
		CAFile:              filepath.Join(dir, "ca.pem"),
		ServerCertFile:      filepath.Join(dir, "server.pem"),
		ServerKeyFile:       filepath.Join(dir, "server.key"),
		ClientCertFile:      filepath.Join(dir, "client.pem"),
		ClientKeyFile:       filepath.Join(dir, "client.key"),
		OtherCAFile:         filepath.Join(dir, "other-ca.pem"),
		OtherClientCertFile: filepath.Join(dir, "other-client.pem"),
		OtherClientKeyFile:  filepath.Join(dir, "other-client.key"),
	}
	ca, err := newCA("holomix test CA", now, m.CAFile)
	if err != nil {
		return m, err
	}
	m.CA = ca.cert
	other, err := newCA("unrelated test CA", now, m.OtherCAFile)
	if err != nil {
		return m, err
	}
	server := &x509.Certificate{
		Subject:     pkix.Name{CommonName: "localhost"},
		DNSNames:    []string{"localhost"},
		IPAddresses: []net.IP{net.ParseIP("127.0.0.1"), net.IPv6loopback},
		KeyUsage:    x509.KeyUsageDigitalSignature,
		ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth},
	}
	if err := ca.issue(server, now, m.ServerCertFile, m.ServerKeyFile); err != nil {
		return m, err
	}
	client := func() *x509.Certificate {
		return &x509.Certificate{
			Subject:     pkix.Name{CommonName: "holomix-test-client"},
			KeyUsage:    x509.KeyUsageDigitalSignature,
			ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageClientAuth},
		}
	}
	if err := ca.issue(client(), now, m.ClientCertFile, m.ClientKeyFile); err != nil {
		return m, err
	}
	if err := other.issue(client(), now, m.OtherClientCertFile, m.OtherClientKeyFile); err != nil {
		return m, err
	}
	return m, nil
}

func serial() (*big.Int, error) {
	return rand.Int(rand.Reader, new(big.Int).Lsh(big.NewInt(1), 120))
}

func newCA(name string, now time.Time, certFile string) (*issuer, error) {
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		return nil, fmt.Errorf("CA key: %w", err)
	}
	sn, err := serial()
	if err != nil {
		return nil, err
	}
	tmpl := &x509.Certificate{
		SerialNumber:          sn,
		Subject:               pkix.Name{CommonName: name, Organization: []string{"holomix tests"}},
		NotBefore:             now.Add(-time.Hour),
		NotAfter:              now.Add(24 * time.Hour),
		IsCA:                  true,
		BasicConstraintsValid: true,
		MaxPathLenZero:        true,
		KeyUsage:              x509.KeyUsageCertSign | x509.KeyUsageCRLSign | x509.KeyUsageDigitalSignature,
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		return nil, fmt.Errorf("CA certificate: %w", err)
	}
	cert, err := x509.ParseCertificate(der)
	if err != nil {
		return nil, err
	}
	if err := writePEM(certFile, "CERTIFICATE", der, 0o644); err != nil {
		return nil, err
	}
	return &issuer{cert: cert, key: key}, nil
}

func (ca *issuer) issue(tmpl *x509.Certificate, now time.Time, certFile, keyFile string) error {
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		return fmt.Errorf("key for %s: %w", tmpl.Subject.CommonName, err)
	}
	sn, err := serial()
	if err != nil {
		return err
	}
	tmpl.SerialNumber = sn
	tmpl.NotBefore = now.Add(-time.Hour)
	tmpl.NotAfter = now.Add(24 * time.Hour)
	der, err := x509.CreateCertificate(rand.Reader, tmpl, ca.cert, &key.PublicKey, ca.key)
	if err != nil {
		return fmt.Errorf("certificate for %s: %w", tmpl.Subject.CommonName, err)
	}
	keyDER, err := x509.MarshalPKCS8PrivateKey(key)
	if err != nil {
		return err
	}
	if err := writePEM(certFile, "CERTIFICATE", der, 0o644); err != nil {
		return err
	}
	// Readable by the broker even when it drops privileges to its own user;
	// these throwaway keys live only in a test's temporary directory.
	return writePEM(keyFile, "PRIVATE KEY", keyDER, 0o644)
}

func writePEM(path, typ string, der []byte, mode os.FileMode) error {
	b := pem.EncodeToMemory(&pem.Block{Type: typ, Bytes: der})
	if err := os.WriteFile(path, b, mode); err != nil {
		return fmt.Errorf("write %s: %w", path, err)
	}
	return nil
}

// MosquittoUserLine returns the mosquitto.conf line that keeps a broker started
// by root running as root ("user root"), or "" for other users. Append it to
// MosquittoOptions.Extra when the broker must read files (certificates, a
// password file) in a test's temporary directory: those directories are mode
// 0700, and Mosquitto 2.0 started as root otherwise drops to the "mosquitto"
// user before it reads them.
func MosquittoUserLine() string {
	if os.Geteuid() == 0 {
		return "user root\n"
	}
	return ""
}
