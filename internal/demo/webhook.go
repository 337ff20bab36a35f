package demo

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
	"sync"
	"time"

	standardwebhooks "github.com/standard-webhooks/standard-webhooks/libraries/go"

	"holomix/alert"
)

// maxBody bounds one webhook request body.
const maxBody = 1 << 20

// Alert is one alert as the demo's webhook receiver got it, after its
// Standard Webhooks signature was verified.
type Alert struct {
	MessageID string        // webhook-id header (the same on every retry)
	Payload   alert.Payload // the JSON body
	Received  time.Time     // wall clock
}

// receiver is the webhook endpoint the demo runs on loopback: it verifies
// each request's signature (Standard Webhooks: webhook-id, -timestamp and
// -signature headers, HMAC-SHA256 with the shared secret), answers 204 and
// hands each new message (de-duplicated by webhook-id, since delivery is at
// least once) to onAlert.
type receiver struct {
	wh      *standardwebhooks.Webhook
	secret  string
	url     string
	srv     *http.Server
	done    chan struct{}
	onAlert func(Alert)

	mu       sync.Mutex
	seen     map[string]bool
	alerts   []Alert
	rejected int // bad signature or body
	repeats  int // redeliveries of a message already received
}

// newSecret returns a fresh Standard Webhooks secret, "whsec_" + base64 of 32 random bytes.
func newSecret() (string, error) {
	b := make([]byte, 32)
	if _, err := rand.Read(b); err != nil {
		return "", fmt.Errorf("demo: webhook secret: %w", err)
	}
	return "whsec_" + base64.StdEncoding.EncodeToString(b), nil
}

func startReceiver(onAlert func(Alert)) (*receiver, error) {
	secret, err := newSecret()
	if err != nil {
		return nil, err
	}
	wh, err := standardwebhooks.NewWebhook(secret)
	if err != nil {
		return nil, fmt.Errorf("demo: webhook verifier: %w", err)
	}
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return nil, fmt.Errorf("demo: webhook receiver: listen: %w", err)
	}
	r := &receiver{wh: wh, secret: secret, url: "http://" + ln.Addr().String() + "/alerts", onAlert: onAlert,
		seen: map[string]bool{}, done: make(chan struct{})}
	mux := http.NewServeMux()
	mux.HandleFunc("POST /alerts", r.handle)
	r.srv = &http.Server{Handler: mux, ReadHeaderTimeout: 5 * time.Second}
	go func() {
		defer close(r.done)
		_ = r.srv.Serve(ln)
	}()
	return r, nil
}

func (r *receiver) handle(w http.ResponseWriter, req *http.Request) {
	body, err := io.ReadAll(io.LimitReader(req.Body, maxBody+1))
	if err != nil || len(body) > maxBody {
		r.reject()
		http.Error(w, "body unreadable or too large", http.StatusRequestEntityTooLarge)
		return
	}
	if err := r.wh.Verify(body, req.Header); err != nil {
		r.reject()
		http.Error(w, "signature verification failed", http.StatusUnauthorized)
		return
	}
	var p alert.Payload
	if err := json.Unmarshal(body, &p); err != nil {
		r.reject()
		http.Error(w, "payload is not an alert: "+err.Error(), http.StatusBadRequest)
		return
	}
	a := Alert{MessageID: req.Header.Get("webhook-id"), Payload: p, Received: time.Now().UTC()}
	r.mu.Lock()
	repeat := r.seen[a.MessageID]
	if repeat {
		r.repeats++
	} else {
		r.seen[a.MessageID] = true
		r.alerts = append(r.alerts, a)
	}
	r.mu.Unlock()
	w.WriteHeader(http.StatusNoContent)
	if !repeat && r.onAlert != nil {
		r.onAlert(a)
	}
}

func (r *receiver) reject() {
	r.mu.Lock()
	r.rejected++
	r.mu.Unlock()
}

// received returns the verified alerts in arrival order and the counts of
// rejected requests and repeated deliveries.
func (r *receiver) received() (alerts []Alert, rejected, repeats int) {
	r.mu.Lock()
	defer r.mu.Unlock()
	return append([]Alert(nil), r.alerts...), r.rejected, r.repeats
}

func (r *receiver) close(ctx context.Context) error {
	err := r.srv.Shutdown(ctx)
	<-r.done
	if errors.Is(err, http.ErrServerClosed) {
		return nil
	}
	return err
}
