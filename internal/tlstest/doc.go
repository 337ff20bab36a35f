// Package tlstest holds end-to-end tests of the broker connection's security
// settings (TLS with verification, client certificates, username and password)
// against a real Mosquitto started by internal/testenv. It has no non-test code
// beyond this comment.
package tlstest
