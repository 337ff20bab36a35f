package config

import (
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"os"
	"strings"
)

// IsSet reports whether any TLS setting is given.
func (t TLS) IsSet() bool {
	return t.CAFile != "" || t.CertFile != "" || t.KeyFile != "" || t.ServerName != "" || t.InsecureSkipVerify
}

// ClientConfig builds the tls.Config of a client connection from these settings:
//   - ca_file (PEM, one or more certificates) becomes the only trusted roots;
//     without it the system's roots are used;
//   - cert_file and key_file (PEM) are the client certificate, offered when the
//     server asks for one;
//   - server_name overrides the name checked against the server's certificate
//     (by default the host of the URL, which the MQTT and HTTP clients fill in);
//   - insecure_skip_verify turns verification off (validation warns about it).
//
// The minimum protocol version is TLS 1.2. Errors name the file and the problem.
func (t TLS) ClientConfig() (*tls.Config, error) {
	c := &tls.Config{
		MinVersion:         tls.VersionTLS12,
		ServerName:         t.ServerName,
		InsecureSkipVerify: t.InsecureSkipVerify, //nolint:gosec // opt-in, warned about by validation
	}
	if t.CAFile != "" {
		pem, err := os.ReadFile(t.CAFile)
		if err != nil {
			return nil, fmt.Errorf("tls ca_file: %w", err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return nil, fmt.Errorf("tls ca_file %s: no PEM certificate found", t.CAFile)
		}
		c.RootCAs = pool
	}
	switch {
	case t.CertFile != "" && t.KeyFile != "":
		pair, err := tls.LoadX509KeyPair(t.CertFile, t.KeyFile)
		if err != nil {
			return nil, fmt.Errorf("tls client certificate %s / %s: %w", t.CertFile, t.KeyFile, err)
		}
		c.Certificates = []tls.Certificate{pair}
	case t.CertFile != "" || t.KeyFile != "":
		return nil, errors.New("tls: cert_file and key_file must be given together")
	}
	return c, nil
}

// BrokerUsesTLS reports whether the broker URL asks for TLS (ssl, tls, mqtts, wss).
func (m MQTT) BrokerUsesTLS() bool {
	scheme, _, _ := strings.Cut(m.Broker, "://")
	switch strings.ToLower(scheme) {
	case "ssl", "tls", "mqtts", "wss":
		return true
	}
	return false
}

// TLSHint turns a TLS handshake error into a sentence an operator can act on,
// naming the certificate problem, or returns "" when err is not a TLS problem
// it recognises. Use it beside the error, never instead of it.
func TLSHint(err error) string {
	if err == nil {
		return ""
	}
	var unknown x509.UnknownAuthorityError
	var hostErr x509.HostnameError
	var invalid x509.CertificateInvalidError
	var recErr tls.RecordHeaderError
	switch {
	case errors.As(err, &unknown):
		return "the server's certificate is not signed by a CA in tls.ca_file (or the system roots): check ca_file names the CA that issued the server's certificate"
	case errors.As(err, &hostErr):
		return fmt.Sprintf("the server's certificate is not valid for %q: connect with a name the certificate lists, or set tls.server_name", hostErr.Host)
	case errors.As(err, &invalid):
		switch invalid.Reason {
		case x509.Expired:
			return "the server's certificate has expired or is not valid yet: renew it, and check the clocks"
		default:
			return "the server's certificate is invalid: " + invalid.Error()
		}
	case errors.As(err, &recErr):
		return "the server did not answer with TLS: is this a plain listener? use tcp:// for it, or the TLS port"
	}
	msg := err.Error()
	switch {
	case strings.Contains(msg, "certificate required"), strings.Contains(msg, "bad certificate"):
		return "the server requires a client certificate it accepts: set tls.cert_file and tls.key_file to one issued by the server's client CA"
	case strings.Contains(msg, "unknown certificate authority") || strings.Contains(msg, "unknown ca"):
		return "the server does not trust the client certificate's CA: use a client certificate issued by the CA the server is configured with"
	}
	return ""
}
