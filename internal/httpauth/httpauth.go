// Package httpauth guards the status page, the API and /metrics with the
// authentication configured under http: (basic_user with basic_password, and/or
// bearer_token, both secrets read from a file or the environment). Credentials
// are compared in constant time and never logged or echoed.
package httpauth

import (
	"crypto/sha256"
	"crypto/subtle"
	"net/http"
	"strings"

	"holomix/config"
)

// Reasons a request is refused, passed to the rejected callback of WrapCounting.
const (
	ReasonMissing        = "missing"         // no Authorization header
	ReasonBadCredentials = "bad_credentials" // wrong user, password or token
	ReasonBadScheme      = "bad_scheme"      // an Authorization scheme that is not configured, or malformed
)

// Enabled reports whether c configures any authentication (with secrets loaded).
func Enabled(c config.HTTP) bool {
	return basicEnabled(c) || c.BearerToken.Get() != ""
}

func basicEnabled(c config.HTTP) bool { return c.BasicUser != "" && c.BasicPassword.Get() != "" }

// Wrap returns h guarded by the authentication configured in c: a request passes
// with a matching "Authorization: Bearer TOKEN" (when bearer_token is set) or
// matching basic credentials (when basic_user and basic_password are set); any
// other request gets 401 with a WWW-Authenticate challenge. Without configured
// authentication (the loopback default) h is returned unchanged.
func Wrap(h http.Handler, c config.HTTP) http.Handler { return WrapCounting(h, c, nil) }

// WrapCounting is Wrap that also calls rejected(reason) for every refused
// request (ReasonMissing, ReasonBadCredentials or ReasonBadScheme), e.g. to count
// them in a metric. rejected may be nil.
func WrapCounting(h http.Handler, c config.HTTP, rejected func(reason string)) http.Handler {
	if !Enabled(c) {
		return h
	}
	g := &guard{next: h, rejected: rejected}
	if basicEnabled(c) {
		g.basic = true
		g.user = digest(c.BasicUser)
		g.pass = digest(c.BasicPassword.Get())
	}
	if tok := c.BearerToken.Get(); tok != "" {
		g.bearer = true
		g.token = digest(tok)
	}
	return g
}

type guard struct {
	next          http.Handler
	rejected      func(string)
	basic, bearer bool
	user, pass    [32]byte
	token         [32]byte
}

// digest hashes a credential so comparisons take the same time whatever the
// lengths of the configured and the offered values.
func digest(s string) [32]byte { return sha256.Sum256([]byte(s)) }

func equal(a, b [32]byte) bool { return subtle.ConstantTimeCompare(a[:], b[:]) == 1 }

func (g *guard) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	reason := g.check(r)
	if reason == "" {
		g.next.ServeHTTP(w, r)
		return
	}
	if g.rejected != nil {
		g.rejected(reason)
	}
	if g.basic {
		w.Header().Add("WWW-Authenticate", `Basic realm="holomix", charset="UTF-8"`)
	}
	if g.bearer {
		w.Header().Add("WWW-Authenticate", `Bearer realm="holomix"`)
	}
	w.Header().Set("Cache-Control", "no-store")
	http.Error(w, "401 unauthorized: this status page requires authentication", http.StatusUnauthorized)
}

// check returns "" when the request carries valid credentials, else a reason.
func (g *guard) check(r *http.Request) string {
	h := r.Header.Get("Authorization")
	if h == "" {
		return ReasonMissing
	}
	scheme, rest, _ := strings.Cut(h, " ")
	switch {
	case g.bearer && strings.EqualFold(scheme, "Bearer"):
		tok := strings.TrimSpace(rest)
		if tok == "" {
			return ReasonBadScheme
		}
		if equal(digest(tok), g.token) {
			return ""
		}
		return ReasonBadCredentials
	case g.basic && strings.EqualFold(scheme, "Basic"):
		u, p, ok := r.BasicAuth()
		if !ok {
			return ReasonBadScheme
		}
		// Both comparisons always run: no early exit on a wrong user name.
		uok := equal(digest(u), g.user)
		pok := equal(digest(p), g.pass)
		if uok && pok {
			return ""
		}
		return ReasonBadCredentials
	}
	return ReasonBadScheme
}
