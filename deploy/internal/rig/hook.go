package rig

import (
	"context"
	"crypto/rand"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"sort"
	"strconv"
	"sync"
	"time"

	standardwebhooks "github.com/standard-webhooks/standard-webhooks/libraries/go"
)

// NewSecret returns a fresh Standard Webhooks secret ("whsec_" + base64 of 32 random bytes).
func NewSecret() (string, error) {
	key := make([]byte, 32)
	if _, err := rand.Read(key); err != nil {
		return "", err
	}
	return "whsec_" + base64.StdEncoding.EncodeToString(key), nil
}

// HookMode is how the receiver answers.
type HookMode int

// Receiver modes.
const (
	HookOK       HookMode = iota // 200
	HookFail                     // 500
	HookThrottle                 // 429 with Retry-After
)

// Delivery is one request the receiver got.
type Delivery struct {
	At        time.Time // when the request arrived
	Sent      time.Time // the sender's webhook-timestamp header (whole seconds), zero if absent
	WebhookID string
	Answer    int // HTTP status the receiver answered
	ID        string
	EpisodeID string
	Site      string
	Kind      string
	Status    string
	EventTime time.Time
}

// Hook is a loopback webhook receiver that verifies every request's
// signature with the Standard Webhooks reference library and records it.
type Hook struct {
	wh   *standardwebhooks.Webhook
	addr string

	mu         sync.Mutex
	srv        *http.Server
	mode       HookMode
	retryAfter int
	got        []Delivery
	badSig     int
	onOK       func(Delivery)
}

// NewHook starts a receiver on a free loopback port.
func NewHook(secret string) (*Hook, error) {
	wh, err := standardwebhooks.NewWebhook(secret)
	if err != nil {
		return nil, fmt.Errorf("hook: %w", err)
	}
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return nil, fmt.Errorf("hook: %w", err)
	}
	h := &Hook{wh: wh, addr: ln.Addr().String()}
	h.serve(ln)
	return h, nil
}

func (h *Hook) serve(ln net.Listener) {
	srv := &http.Server{Handler: h, ReadHeaderTimeout: 5 * time.Second}
	h.srv = srv
	go func() { _ = srv.Serve(ln) }()
}

// URL is the receiver's address.
func (h *Hook) URL() string { return "http://" + h.addr + "/hook" }

// OnDelivered sets a function called (on the request goroutine) for every
// delivery answered 200.
func (h *Hook) OnDelivered(f func(Delivery)) {
	h.mu.Lock()
	h.onOK = f
	h.mu.Unlock()
}

// SetMode sets how the receiver answers from now on; retryAfter (seconds)
// goes with HookThrottle.
func (h *Hook) SetMode(m HookMode, retryAfter int) {
	h.mu.Lock()
	h.mode, h.retryAfter = m, retryAfter
	h.mu.Unlock()
}

// Down stops listening: connections are refused until Up.
func (h *Hook) Down() {
	h.mu.Lock()
	srv := h.srv
	h.srv = nil
	h.mu.Unlock()
	if srv != nil {
		_ = srv.Close()
	}
}

// Up listens again on the same address.
func (h *Hook) Up() error {
	h.mu.Lock()
	defer h.mu.Unlock()
	if h.srv != nil {
		return nil
	}
	var ln net.Listener
	var err error
	for i := 0; i < 50; i++ {
		if ln, err = net.Listen("tcp", h.addr); err == nil {
			break
		}
		time.Sleep(100 * time.Millisecond)
	}
	if err != nil {
		return fmt.Errorf("hook: listen again on %s: %w", h.addr, err)
	}
	h.serve(ln)
	return nil
}

// Close stops the receiver.
func (h *Hook) Close() { h.Down() }

func (h *Hook) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	at := time.Now()
	body, err := io.ReadAll(io.LimitReader(r.Body, 4<<20))
	if err != nil {
		http.Error(w, "read", http.StatusBadRequest)
		return
	}
	if err := h.wh.Verify(body, r.Header); err != nil {
		h.mu.Lock()
		h.badSig++
		h.mu.Unlock()
		http.Error(w, "bad signature", http.StatusUnauthorized)
		return
	}
	var p struct {
		ID        string `json:"id"`
		EpisodeID string `json:"episode_id"`
		Site      struct {
			ID string `json:"id"`
		} `json:"site"`
		Kind      string    `json:"kind"`
		Status    string    `json:"status"`
		EventTime time.Time `json:"event_time"`
	}
	if err := json.Unmarshal(body, &p); err != nil {
		http.Error(w, "bad json", http.StatusBadRequest)
		return
	}
	d := Delivery{At: at, WebhookID: r.Header.Get("webhook-id"), ID: p.ID, EpisodeID: p.EpisodeID, Site: p.Site.ID,
		Kind: p.Kind, Status: p.Status, EventTime: p.EventTime.UTC()}
	if sec, err := strconv.ParseInt(r.Header.Get("webhook-timestamp"), 10, 64); err == nil {
		d.Sent = time.Unix(sec, 0).UTC()
	}
	h.mu.Lock()
	mode, ra, onOK := h.mode, h.retryAfter, h.onOK
	switch mode {
	case HookFail:
		d.Answer = http.StatusInternalServerError
	case HookThrottle:
		d.Answer = http.StatusTooManyRequests
	default:
		d.Answer = http.StatusOK
	}
	h.got = append(h.got, d)
	h.mu.Unlock()
	switch mode {
	case HookFail:
		http.Error(w, "receiver failing on purpose", http.StatusInternalServerError)
	case HookThrottle:
		w.Header().Set("Retry-After", strconv.Itoa(ra))
		http.Error(w, "slow down", http.StatusTooManyRequests)
	default:
		if onOK != nil {
			onOK(d)
		}
		w.WriteHeader(http.StatusOK)
	}
}

// Deliveries returns every request recorded, in arrival order.
func (h *Hook) Deliveries() []Delivery {
	h.mu.Lock()
	defer h.mu.Unlock()
	return append([]Delivery(nil), h.got...)
}

// BadSignatures counts requests whose signature did not verify.
func (h *Hook) BadSignatures() int {
	h.mu.Lock()
	defer h.mu.Unlock()
	return h.badSig
}

// AlertTally compares what a receiver accepted with the expected alerts.
type AlertTally struct {
	Expected  int // expected alerts (episode × status)
	Delivered int // expected alerts accepted (2xx) at least once
	Missing   []string
	// Duplicated counts alerts (episode × status) accepted under more than
	// one webhook-id: a second message for the same alert (never allowed).
	Duplicated int
	// Repeats counts extra 2xx answers for a webhook-id already accepted: a
	// resend after a crash between delivery and marking it delivered
	// (allowed by at-least-once delivery; receivers de-duplicate on it).
	Repeats int
	// Unexpected lists accepted alerts that were not expected.
	Unexpected []string
	Episodes   int // distinct episode ids accepted
	// Failed answers (5xx, 429) the receiver gave on purpose, and the
	// shortest gap between a 429 and the next attempt of the same message,
	// by the sender's own webhook-timestamp (whole seconds, taken when each
	// attempt starts, so a wait of Retry-After seconds shows as at least that
	// many exactly; arrival times would add each request's own latency).
	Refused          int
	MinRetryAfterGap time.Duration
	Throttled        int
}

// Tally checks deliveries against the expected alerts.
func Tally(deliveries []Delivery, want []ExpectedAlert) AlertTally {
	var t AlertTally
	type alertKey struct {
		site, kind, status string
		at                 int64
	}
	expected := map[alertKey]bool{}
	for _, w := range want {
		expected[alertKey{w.Site, w.Kind, w.Status, w.Time.Unix()}] = true
	}
	t.Expected = len(expected)
	okIDs := map[string]bool{}                // webhook-ids answered 2xx
	byAlert := map[alertKey]map[string]bool{} // alert → episode ids accepted
	byEpisodeStatus := map[string]map[string]bool{}
	episodes := map[string]bool{}
	lastThrottle := map[string]time.Time{}
	t.MinRetryAfterGap = -1
	for _, d := range deliveries {
		if at, ok := lastThrottle[d.WebhookID]; ok {
			if gap := d.Sent.Sub(at); t.MinRetryAfterGap < 0 || gap < t.MinRetryAfterGap {
				t.MinRetryAfterGap = gap
			}
			delete(lastThrottle, d.WebhookID)
		}
		if d.Answer/100 != 2 {
			t.Refused++
			if d.Answer == http.StatusTooManyRequests {
				t.Throttled++
				lastThrottle[d.WebhookID] = d.Sent
			}
			continue
		}
		if okIDs[d.WebhookID] {
			t.Repeats++
			continue
		}
		okIDs[d.WebhookID] = true
		episodes[d.EpisodeID] = true
		es := d.EpisodeID + " " + d.Status
		if byEpisodeStatus[es] == nil {
			byEpisodeStatus[es] = map[string]bool{}
		}
		byEpisodeStatus[es][d.WebhookID] = true
		// A resolved message carries the resolution time as its event time.
		k := alertKey{d.Site, d.Kind, d.Status, d.EventTime.Unix()}
		if byAlert[k] == nil {
			byAlert[k] = map[string]bool{}
		}
		byAlert[k][d.EpisodeID] = true
		if !expected[k] {
			t.Unexpected = append(t.Unexpected, fmt.Sprintf("%s %s %s %s (episode %s)", d.Site, d.Kind, d.Status,
				d.EventTime.Format(time.RFC3339), d.EpisodeID))
		}
	}
	for k := range expected {
		if len(byAlert[k]) > 0 {
			t.Delivered++
		} else {
			t.Missing = append(t.Missing, fmt.Sprintf("%s %s %s %s", k.site, k.kind, k.status, time.Unix(k.at, 0).UTC().Format(time.RFC3339)))
		}
	}
	// The same event under two episodes, or two messages of one status in
	// one episode: both are a second alert.
	for _, eps := range byAlert {
		if len(eps) > 1 {
			t.Duplicated += len(eps) - 1
		}
	}
	for _, ids := range byEpisodeStatus {
		if len(ids) > 1 {
			t.Duplicated += len(ids) - 1
		}
	}
	t.Episodes = len(episodes)
	sort.Strings(t.Missing)
	sort.Strings(t.Unexpected)
	return t
}

// WaitAlerts waits until every expected alert was accepted, or ctx ends.
func (h *Hook) WaitAlerts(ctx context.Context, want []ExpectedAlert) (AlertTally, error) {
	for {
		t := Tally(h.Deliveries(), want)
		if t.Delivered == t.Expected {
			return t, nil
		}
		select {
		case <-ctx.Done():
			return t, errors.Join(ctx.Err(), fmt.Errorf("%d of %d alerts delivered", t.Delivered, t.Expected))
		case <-time.After(100 * time.Millisecond):
		}
	}
}
