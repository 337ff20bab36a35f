package alert

import (
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"strings"
	"time"

	"holomix/detect"
)

// StatusReminder is the status of a reminder message: the episode is still open.
// It extends detect's statuses (firing, resolved, update) on the alert side only.
const StatusReminder detect.Status = "reminder"

// SiteInfo names a site in messages. Location (optional) is the site's time zone
// for the local time shown beside UTC in message text; nil means UTC only.
type SiteInfo struct {
	ID       string
	Name     string
	Location *time.Location
}

// SiteRef is the site object of the payload.
type SiteRef struct {
	ID   string `json:"id"`
	Name string `json:"name"`
}

// Payload is the JSON body of a webhook. The schema is stable: fields are only
// ever added. Slices and maps are never null (empty instead); subject is "" when
// the event has none.
type Payload struct {
	ID          string              `json:"id"`         // alert id, deterministic (see AlertID)
	EpisodeID   string              `json:"episode_id"` // shared by every message of one episode
	Site        SiteRef             `json:"site"`
	Kind        detect.Kind         `json:"kind"`
	Subject     string              `json:"subject"` // intake name, sensor depth, …
	Severity    string              `json:"severity"`
	Status      detect.Status       `json:"status"`     // firing | resolved | reminder | update
	EventTime   time.Time           `json:"event_time"` // data time of the event (UTC)
	OnsetTime   time.Time           `json:"onset_time"` // data time the episode began (UTC)
	SentAt      time.Time           `json:"sent_at"`    // wall-clock time of this delivery attempt (UTC)
	Summary     string              `json:"summary"`    // one line: the fact and its time
	Text        string              `json:"text"`       // the full message for people, plain text
	Details     map[string]string   `json:"details"`
	Cautions    []string            `json:"cautions"`
	Metrics     []detect.Metric     `json:"metrics"`
	Projections []detect.Projection `json:"projections"`
	Link        string              `json:"link"` // status page of the site
	Confidence  string              `json:"confidence"`
}

// idHash returns a short, stable hex digest of parts joined by NUL.
func idHash(parts ...string) string {
	h := sha256.Sum256([]byte(strings.Join(parts, "\x00")))
	return hex.EncodeToString(h[:12])
}

// onsetPrefix is the onset time as 9 hex digits of Unix seconds: ids sort by
// onset, so the outbox's id index grows at its end like the data does.
func onsetPrefix(onset time.Time) string {
	s := onset.Unix()
	if s < 0 {
		s = 0
	}
	return fmt.Sprintf("%09x", s)
}

// EpisodeID is the deterministic id of the episode that an event with this
// (site, kind, subject) opened at onset (data time): "ep_<onset>_<hash>".
func EpisodeID(site string, kind detect.Kind, subject string, onset time.Time) string {
	return "ep_" + onsetPrefix(onset) + "_" + idHash(site, string(kind), subject, onset.UTC().Format(time.RFC3339Nano))
}

// AlertID is the deterministic id of one message of an episode,
// "al_<onset>_<hash>". extra distinguishes messages of the same status within
// an episode: the event day for updates, receiver and sequence number for
// reminders, "" otherwise. The same inputs always give the same id, which
// makes Submit idempotent.
func AlertID(episodeID string, status detect.Status, extra string) string {
	prefix := "000000000"
	if p, _, ok := strings.Cut(strings.TrimPrefix(episodeID, "ep_"), "_"); ok && len(p) == len(prefix) {
		prefix = p
	}
	return "al_" + prefix + "_" + idHash(episodeID, string(status), extra)
}

// webhookID is the Standard Webhooks message id for one alert at one receiver:
// the same on every retry of that delivery.
func webhookID(alertID, receiver string) string {
	return alertID + "_" + idHash(receiver)[:8]
}

// eventDay is the UTC calendar day of an event time, "2006-01-02".
func eventDay(t time.Time) string { return t.UTC().Format("2006-01-02") }
