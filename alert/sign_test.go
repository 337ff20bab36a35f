package alert

import (
	"encoding/json"
	"errors"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	standardwebhooks "github.com/standard-webhooks/standard-webhooks/libraries/go"

	"holomix/config"
	"holomix/detect"
)

// Signatures are checked with the Standard Webhooks reference library
// (github.com/standard-webhooks/standard-webhooks/libraries/go), an
// implementation independent of this package: a valid message passes, a
// tampered body fails, a stale timestamp fails.
func TestSignatureVerifiesWithStandardWebhooksLibrary(t *testing.T) {
	const rawSecret = "a raw secret, not base64 at all"
	cases := []struct {
		name   string
		secret string
		verify func() (*standardwebhooks.Webhook, error)
	}{
		{"whsec", testSecret, func() (*standardwebhooks.Webhook, error) { return standardwebhooks.NewWebhook(testSecret) }},
		{"raw", rawSecret, func() (*standardwebhooks.Webhook, error) { return standardwebhooks.NewWebhookRaw([]byte(rawSecret)) }},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			s := newSink(t, nil, nil)
			d, _ := testOpen(t, Options{Receivers: []config.Receiver{webhook("hook", s.URL(), c.secret)}, StatusURL: "https://status.example.org/"})
			defer closeD(t, d)
			run(t, d)
			if err := d.Submit(event("vell", detect.KindMaxDensityReached, detect.StatusFiring, t0, "info")); err != nil {
				t.Fatal(err)
			}
			h := s.waitHits(1, 5*time.Second)[0]
			wh, err := c.verify()
			if err != nil {
				t.Fatal(err)
			}
			if err := wh.Verify(h.body, h.header); err != nil {
				t.Fatalf("valid message rejected by the reference library: %v", err)
			}
			if !regexp.MustCompile(`^v1,[A-Za-z0-9+/]{43}=$`).MatchString(h.header.Get("webhook-signature")) {
				t.Errorf("webhook-signature %q is not v1,<base64 of 32 bytes>", h.header.Get("webhook-signature"))
			}
			tampered := []byte(strings.Replace(string(h.body), `"severity":"info"`, `"severity":"critical"`, 1))
			if string(tampered) == string(h.body) {
				t.Fatal("tampering did not change the body")
			}
			if err := wh.Verify(tampered, h.header); !errors.Is(err, standardwebhooks.ErrNoMatchingSignature) {
				t.Errorf("tampered body: Verify = %v, want ErrNoMatchingSignature", err)
			}
			other, _ := standardwebhooks.NewWebhook("whsec_" + "c2VjcmV0LWZvci1hbm90aGVyLXJlY2VpdmVy")
			if err := other.Verify(h.body, h.header); err == nil {
				t.Error("a different secret verified the message")
			}
			var p Payload
			if err := json.Unmarshal(h.body, &p); err != nil {
				t.Fatal(err)
			}
			if h.header.Get("webhook-id") != webhookID(p.ID, "hook") || !strings.HasPrefix(h.header.Get("webhook-id"), p.ID) {
				t.Errorf("webhook-id %q is not derived from alert id %q and the receiver", h.header.Get("webhook-id"), p.ID)
			}
			if ts, _ := strconv.ParseInt(h.header.Get("webhook-timestamp"), 10, 64); ts != p.SentAt.Unix() {
				t.Errorf("webhook-timestamp %d differs from sent_at %v", ts, p.SentAt)
			}
			if p.Link != "https://status.example.org/sites/vell" {
				t.Errorf("link = %q", p.Link)
			}
		})
	}
}

func TestStaleTimestampFailsVerification(t *testing.T) {
	s := newSink(t, nil, nil)
	// The dispatcher's clock runs ten minutes behind: the reference library's
	// five-minute tolerance rejects the timestamp, though the HMAC is right.
	late := func() time.Time { return time.Now().Add(-10 * time.Minute) }
	d, _ := testOpen(t, Options{Receivers: []config.Receiver{webhook("hook", s.URL(), testSecret)}, Clock: late})
	defer closeD(t, d)
	run(t, d)
	if err := d.Submit(event("vell", detect.KindIceOn, detect.StatusFiring, t0, "warning")); err != nil {
		t.Fatal(err)
	}
	h := s.waitHits(1, 5*time.Second)[0]
	wh, _ := standardwebhooks.NewWebhook(testSecret)
	if err := wh.Verify(h.body, h.header); !errors.Is(err, standardwebhooks.ErrMessageTooOld) {
		t.Errorf("stale message: Verify = %v, want ErrMessageTooOld", err)
	}
	if err := wh.VerifyIgnoringTimestamp(h.body, h.header); err != nil {
		t.Errorf("stale message has a bad HMAC: %v", err)
	}
}

// Our sign() against the reference library's Sign on fixed inputs.
func TestSignMatchesReference(t *testing.T) {
	key, err := signingKey(testSecret)
	if err != nil {
		t.Fatal(err)
	}
	wh, _ := standardwebhooks.NewWebhook(testSecret)
	ts := time.Unix(1700000000, 0)
	body := []byte(`{"id":"al_x","summary":"Überschlag"}`)
	want, err := wh.Sign("al_x_0011aabb", ts, body)
	if err != nil {
		t.Fatal(err)
	}
	if got := sign(key, "al_x_0011aabb", ts, body); got != want {
		t.Errorf("sign = %s, reference = %s", got, want)
	}
	if _, err := signingKey("whsec_!!"); err == nil {
		t.Error("invalid whsec secret accepted")
	}
	if k, _ := signingKey(""); k != nil {
		t.Error("empty secret gave a key")
	}
}

// A body template for chat tools, with the json function; the templated body
// is what is signed.
func TestTemplateBody(t *testing.T) {
	s := newSink(t, nil, nil)
	rc := webhook("chat", s.URL(), testSecret)
	rc.Template = `{"text": {{json .Summary}}, "site": {{json .Site.Name}}}`
	plain := webhook("plain", s.URL(), testSecret)
	plain.Template = `{{.Site.Name}}: {{.Summary}}`
	d, _ := testOpen(t, Options{Receivers: []config.Receiver{rc, plain}})
	defer closeD(t, d)
	run(t, d)
	ev := event("vell", detect.KindOverturn, detect.StatusFiring, t0, "warning")
	ev.Season = "fall"
	if err := d.Submit(ev); err != nil {
		t.Fatal(err)
	}
	hits := s.waitHits(2, 5*time.Second)
	wh, _ := standardwebhooks.NewWebhook(testSecret)
	for _, h := range hits {
		if err := wh.Verify(h.body, h.header); err != nil {
			t.Errorf("templated body not verifiable: %v", err)
		}
		switch h.header.Get("Content-Type") {
		case "application/json":
			var m map[string]string
			if err := json.Unmarshal(h.body, &m); err != nil {
				t.Fatalf("chat body is not JSON: %v\n%s", err, h.body)
			}
			if !strings.HasPrefix(m["text"], "Fall overturn at Tarn Vell since 3 Nov 2025 06:40 UTC") || m["site"] != "Tarn Vell" || len(m) != 2 {
				t.Errorf("chat body = %v", m)
			}
		case "text/plain; charset=utf-8":
			if !strings.HasPrefix(string(h.body), "Tarn Vell: Fall overturn at Tarn Vell") {
				t.Errorf("plain body = %q", h.body)
			}
		default:
			t.Errorf("unexpected content type %q", h.header.Get("Content-Type"))
		}
	}
}

// The payload schema: every documented field is present, slices are [] not null.
func TestPayloadSchema(t *testing.T) {
	s := newSink(t, nil, nil)
	d, _ := testOpen(t, Options{Receivers: []config.Receiver{webhook("hook", s.URL(), testSecret)}, StatusURL: "https://status.example.org"})
	defer closeD(t, d)
	run(t, d)
	ev := detect.Event{Time: t0, Site: "unknown-site", Kind: detect.KindSensorFault, Status: detect.StatusFiring, Severity: "warning"}
	if err := d.Submit(ev); err != nil {
		t.Fatal(err)
	}
	h := s.waitHits(1, 5*time.Second)[0]
	var m map[string]any
	if err := json.Unmarshal(h.body, &m); err != nil {
		t.Fatal(err)
	}
	for _, k := range []string{"id", "episode_id", "site", "kind", "subject", "severity", "status", "event_time", "onset_time",
		"sent_at", "summary", "text", "details", "cautions", "metrics", "projections", "link", "confidence"} {
		if _, ok := m[k]; !ok {
			t.Errorf("payload lacks %q", k)
		}
	}
	for _, k := range []string{"cautions", "metrics", "projections"} {
		if _, ok := m[k].([]any); !ok {
			t.Errorf("%s = %v, want a JSON array", k, m[k])
		}
	}
	if _, ok := m["details"].(map[string]any); !ok {
		t.Errorf("details = %v, want an object", m["details"])
	}
	if site := m["site"].(map[string]any); site["id"] != "unknown-site" || site["name"] != "unknown-site" {
		t.Errorf("site = %v", site)
	}
	if h.header.Get("Content-Type") != "application/json" {
		t.Errorf("content type %q", h.header.Get("Content-Type"))
	}
	if h.header.Get("User-Agent") == "" || h.header.Get("webhook-id") == "" {
		t.Errorf("headers %v", h.header)
	}
}
