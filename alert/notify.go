package alert

import (
	"bytes"
	"context"
	"crypto/hmac"
	"crypto/sha256"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"text/template"
	"time"
)

// Notifier delivers one message to one receiver. It reports whether a failed
// attempt is worth retrying; the dispatcher owns the retry policy (backoff,
// Retry-After, giving up), so notifiers never sleep or loop.
type Notifier interface {
	Notify(ctx context.Context, n Notification) (retry bool, err error)
}

// Notification is one delivery attempt.
type Notification struct {
	MessageID string  // Standard Webhooks webhook-id: the same on every retry of this delivery
	Payload   Payload // SentAt is the time of this attempt
	Attempt   int     // 1 for the first attempt
}

// ExcerptBytes is how much of a receiver's answer is kept with a failure.
const ExcerptBytes = 512

// HTTPError is a non-2xx answer from a receiver.
type HTTPError struct {
	StatusCode int
	RetryAfter time.Duration // from a Retry-After header on 429 or 503; 0 if absent
	Body       string        // the first ExcerptBytes bytes of the answer
}

func (e *HTTPError) Error() string {
	msg := fmt.Sprintf("receiver answered HTTP %d %s", e.StatusCode, http.StatusText(e.StatusCode))
	if e.Body != "" {
		msg += ": " + strings.TrimSpace(e.Body)
	}
	return msg
}

// webhookNotifier POSTs the payload (JSON, or the receiver's template) signed
// per Standard Webhooks.
type webhookNotifier struct {
	client *http.Client
	url    string
	key    []byte // nil: no webhook-signature header
	tmpl   *template.Template
}

// sign returns the Standard Webhooks signature header value for a message:
// "v1," + base64(HMAC-SHA256(key, id + "." + unix seconds + "." + body)).
func sign(key []byte, id string, ts time.Time, body []byte) string {
	mac := hmac.New(sha256.New, key)
	fmt.Fprintf(mac, "%s.%d.", id, ts.Unix())
	mac.Write(body)
	return "v1," + base64.StdEncoding.EncodeToString(mac.Sum(nil))
}

// body renders the request body and its content type.
func (w *webhookNotifier) body(p Payload) ([]byte, string, error) {
	if w.tmpl == nil {
		b, err := json.Marshal(p)
		return b, "application/json", err
	}
	var buf bytes.Buffer
	if err := w.tmpl.Execute(&buf, p); err != nil {
		return nil, "", fmt.Errorf("render body template: %w", err)
	}
	if json.Valid(buf.Bytes()) {
		return buf.Bytes(), "application/json", nil
	}
	return buf.Bytes(), "text/plain; charset=utf-8", nil
}

func (w *webhookNotifier) Notify(ctx context.Context, n Notification) (bool, error) {
	_, retry, err := w.post(ctx, n)
	return retry, err
}

// post sends one request and classifies the answer; status is 0 when no
// answer was received.
func (w *webhookNotifier) post(ctx context.Context, n Notification) (status int, retry bool, err error) {
	body, ctype, err := w.body(n.Payload)
	if err != nil {
		return 0, false, err // a template that fails on this payload fails on every retry
	}
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, w.url, bytes.NewReader(body))
	if err != nil {
		return 0, false, fmt.Errorf("build request: %w", err)
	}
	ts := n.Payload.SentAt
	req.Header.Set("Content-Type", ctype)
	req.Header.Set("User-Agent", "holomix-alert/1")
	req.Header.Set("webhook-id", n.MessageID)
	req.Header.Set("webhook-timestamp", strconv.FormatInt(ts.Unix(), 10))
	if w.key != nil {
		req.Header.Set("webhook-signature", sign(w.key, n.MessageID, ts, body))
	}
	resp, err := w.client.Do(req)
	if err != nil {
		return 0, true, fmt.Errorf("post: %w", err)
	}
	defer resp.Body.Close()
	excerpt, _ := io.ReadAll(io.LimitReader(resp.Body, ExcerptBytes))
	// Drain a little more so the connection can be reused.
	_, _ = io.Copy(io.Discard, io.LimitReader(resp.Body, 64<<10))
	code := resp.StatusCode
	if code >= 200 && code < 300 {
		return code, false, nil
	}
	he := &HTTPError{StatusCode: code, Body: string(excerpt)}
	switch {
	case code == http.StatusTooManyRequests || code == http.StatusServiceUnavailable:
		he.RetryAfter = parseRetryAfter(resp.Header.Get("Retry-After"), ts)
		return code, true, he
	case code == http.StatusRequestTimeout || code >= 500:
		return code, true, he
	default: // other 4xx, and 3xx: redirects are not followed
		return code, false, he
	}
}

// parseRetryAfter reads a Retry-After header (RFC 9110 §10.2.3): either
// delay-seconds or an HTTP date, relative to now. Unparseable or past → 0.
func parseRetryAfter(v string, now time.Time) time.Duration {
	v = strings.TrimSpace(v)
	if v == "" {
		return 0
	}
	if s, err := strconv.ParseInt(v, 10, 64); err == nil {
		if s <= 0 {
			return 0
		}
		if s > int64(maxRetryAfter/time.Second) {
			return maxRetryAfter
		}
		return time.Duration(s) * time.Second
	}
	if t, err := http.ParseTime(v); err == nil {
		if d := t.Sub(now); d > 0 {
			return min(d, maxRetryAfter)
		}
	}
	return 0
}

// LogEntry is one alert written by a "log" receiver, for the status page.
type LogEntry struct {
	Time      time.Time // wall-clock time it was logged (UTC)
	Receiver  string
	AlertID   string
	EpisodeID string
	SiteID    string
	SiteName  string
	Kind      string
	Subject   string
	Severity  string
	Status    string
	EventTime time.Time
	Summary   string
	Text      string
	Link      string
}

// alertLog is a bounded in-memory list of recent log entries, oldest first.
type alertLog struct {
	mu      sync.Mutex
	entries []LogEntry
	max     int
}

func (l *alertLog) add(e LogEntry) {
	l.mu.Lock()
	defer l.mu.Unlock()
	l.entries = append(l.entries, e)
	if len(l.entries) > l.max {
		l.entries = append(l.entries[:0:0], l.entries[len(l.entries)-l.max:]...)
	}
}

// recent returns up to n entries, newest first.
func (l *alertLog) recent(n int) []LogEntry {
	l.mu.Lock()
	defer l.mu.Unlock()
	if n <= 0 || n > len(l.entries) {
		n = len(l.entries)
	}
	out := make([]LogEntry, 0, n)
	for i := len(l.entries) - 1; i >= 0 && len(out) < n; i-- {
		out = append(out, l.entries[i])
	}
	return out
}

func logEntry(receiver string, p Payload, at time.Time) LogEntry {
	return LogEntry{
		Time: at.UTC(), Receiver: receiver, AlertID: p.ID, EpisodeID: p.EpisodeID,
		SiteID: p.Site.ID, SiteName: p.Site.Name, Kind: string(p.Kind), Subject: p.Subject,
		Severity: p.Severity, Status: string(p.Status), EventTime: p.EventTime,
		Summary: p.Summary, Text: p.Text, Link: p.Link,
	}
}

// logNotifier writes alerts to slog and to the dispatcher's alert log.
type logNotifier struct {
	d        *Dispatcher
	receiver string
}

func (l *logNotifier) Notify(_ context.Context, n Notification) (bool, error) {
	p := n.Payload
	l.d.log.Info("alert", "receiver", l.receiver, "id", p.ID, "episode", p.EpisodeID, "site", p.Site.ID,
		"kind", string(p.Kind), "subject", p.Subject, "severity", p.Severity, "status", string(p.Status),
		"event_time", p.EventTime, "summary", p.Summary)
	l.d.alog.add(logEntry(l.receiver, p, p.SentAt))
	return false, nil
}

// asHTTPError is errors.As for *HTTPError.
func asHTTPError(err error) (*HTTPError, bool) {
	var he *HTTPError
	ok := errors.As(err, &he)
	return he, ok
}
