package alert

import (
	"bytes"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"time"

	bolt "go.etcd.io/bbolt"

	"holomix/detect"
)

// Bucket names of outbox.db. Records are keyed by a per-bucket sequence
// number (8 bytes, big-endian) so that new records append at the end of the
// B+tree: a commit touches few pages however large the outbox grows.
var (
	bktAlerts     = []byte("alerts")     // alert seq → alertRecord
	bktAlertIDs   = []byte("alert_ids")  // alert id → alert seq
	bktDeliveries = []byte("deliveries") // alert seq + receiver name → deliveryRecord
	bktPending    = []byte("pending")    // index: delivery keys still to deliver
	bktFailed     = []byte("failed")     // index: delivery keys that gave up
	bktEpisodes   = []byte("episodes")   // episode seq → episodeRecord
	bktSubjects   = []byte("subjects")   // kind NUL subject NUL site → open episode seq, latest episode seq
	bktMeta       = []byte("meta")
)

var allBuckets = [][]byte{bktAlerts, bktAlertIDs, bktDeliveries, bktPending, bktFailed, bktEpisodes, bktSubjects, bktMeta}

// schemaVersion is stored in meta/schema; a newer file is refused.
const schemaVersion = "1"

// Delivery states.
const (
	StatePending   = "pending"
	StateDelivered = "delivered"
	StateFailed    = "failed"
)

// alertRecord is one message, written before any delivery attempt. The
// payload is rebuilt from it (Dispatcher.buildPayload is deterministic), which
// keeps the record small.
type alertRecord struct {
	ID         string        `json:"id"`
	EpisodeID  string        `json:"episode_id"`
	EpisodeSeq uint64        `json:"episode_seq"`
	Status     detect.Status `json:"status"`
	Event      detect.Event  `json:"event"`               // the figures the message shows
	Onset      time.Time     `json:"onset"`               // episode onset (data time)
	TextOnset  time.Time     `json:"text_onset,omitzero"` // "since …" in update and reminder text
	Receivers  []string      `json:"receivers"`
	Created    time.Time     `json:"created"` // wall clock
}

// deliveryRecord is the state of one alert at one receiver.
type deliveryRecord struct {
	AlertID    string    `json:"alert_id"`
	Receiver   string    `json:"receiver"`
	State      string    `json:"state"`
	Attempts   int       `json:"attempts"`
	Created    time.Time `json:"created"`
	NextTry    time.Time `json:"next_try"`
	LastTry    time.Time `json:"last_try,omitzero"`
	Delivered  time.Time `json:"delivered,omitzero"`
	LastStatus int       `json:"last_status,omitempty"`
	LastError  string    `json:"last_error,omitempty"`
	Excerpt    string    `json:"excerpt,omitempty"`
}

// reminderState is the wall-clock reminder schedule of one receiver in one episode.
type reminderState struct {
	Next time.Time `json:"next"`
	Seq  int       `json:"seq"`
}

// episodeRecord is one condition at one (site, kind, subject) from onset to end.
type episodeRecord struct {
	ID         string                   `json:"id"`
	Seq        uint64                   `json:"seq"` // key in the episodes bucket
	Site       string                   `json:"site"`
	Kind       detect.Kind              `json:"kind"`
	Subject    string                   `json:"subject"`
	Onset      time.Time                `json:"onset"` // data time
	Open       bool                     `json:"open"`
	End        time.Time                `json:"end,omitzero"` // data time of the resolving event
	LastMsgDay string                   `json:"last_msg_day"` // event day of the last firing/update message
	Latest     detect.Event             `json:"latest"`       // the latest event, sent or not
	Receivers  []string                 `json:"receivers"`
	Reminders  map[string]reminderState `json:"reminders,omitempty"`
	Opened     time.Time                `json:"opened"`          // wall clock
	Closed     time.Time                `json:"closed,omitzero"` // wall clock
}

// appendFill is the page fill of buckets whose keys only grow (bolt's default
// 0.5 suits random inserts and would leave sequential pages half empty).
const appendFill = 0.9

// writeTx runs fn in a write transaction with the fill tuned for appends.
func writeTx(db *bolt.DB, fn func(tx *bolt.Tx) error) error {
	return db.Update(func(tx *bolt.Tx) error {
		for _, name := range [][]byte{bktAlerts, bktDeliveries, bktPending, bktFailed, bktEpisodes} {
			if b := tx.Bucket(name); b != nil {
				b.FillPercent = appendFill
			}
		}
		return fn(tx)
	})
}

// seqKey is a sequence number as an 8-byte big-endian key.
func seqKey(n uint64) []byte {
	var b [8]byte
	binary.BigEndian.PutUint64(b[:], n)
	return b[:]
}

// deliveryKey is the alert's sequence key followed by the receiver name.
func deliveryKey(alertSeq []byte, receiver string) []byte {
	k := make([]byte, 0, 8+len(receiver))
	return append(append(k, alertSeq[:8]...), receiver...)
}

// splitDeliveryKey returns the alert sequence key and the receiver name.
func splitDeliveryKey(k []byte) (alertSeq []byte, receiver string) {
	if len(k) < 8 {
		return nil, ""
	}
	return append([]byte(nil), k[:8]...), string(k[8:])
}

// subjectKey is kind NUL subject NUL site: events raised together (the same
// condition at many sites) land on neighbouring keys.
func subjectKey(site string, kind detect.Kind, subject string) []byte {
	return []byte(string(kind) + "\x00" + subject + "\x00" + site)
}

// subjectRecord points at the open (0: none) and the latest episode of one
// (site, kind, subject).
type subjectRecord struct{ open, last uint64 }

func getSubject(tx *bolt.Tx, sk []byte) subjectRecord {
	v := tx.Bucket(bktSubjects).Get(sk)
	if len(v) != 16 {
		return subjectRecord{}
	}
	return subjectRecord{open: binary.BigEndian.Uint64(v[:8]), last: binary.BigEndian.Uint64(v[8:])}
}

func putSubject(tx *bolt.Tx, sk []byte, s subjectRecord) error {
	v := make([]byte, 16)
	binary.BigEndian.PutUint64(v[:8], s.open)
	binary.BigEndian.PutUint64(v[8:], s.last)
	return tx.Bucket(bktSubjects).Put(sk, v)
}

// alertSeq returns the sequence key of an alert id (nil: unknown).
func alertSeq(tx *bolt.Tx, id string) []byte {
	v := tx.Bucket(bktAlertIDs).Get([]byte(id))
	if v == nil {
		return nil
	}
	return append([]byte(nil), v...)
}

// getAlert reads an alert by id.
func getAlert(tx *bolt.Tx, id string) ([]byte, *alertRecord, error) {
	seq := alertSeq(tx, id)
	if seq == nil {
		return nil, nil, nil
	}
	ar := new(alertRecord)
	ok, err := getJSON(tx.Bucket(bktAlerts), seq, ar)
	if err != nil || !ok {
		return nil, nil, fmt.Errorf("alert %s: %w", id, errors.Join(err, errMissing(ok)))
	}
	return seq, ar, nil
}

// prefixKeys returns copies of the keys in b that start with prefix.
func prefixKeys(b *bolt.Bucket, prefix []byte) [][]byte {
	var out [][]byte
	c := b.Cursor()
	for k, _ := c.Seek(prefix); k != nil && bytes.HasPrefix(k, prefix); k, _ = c.Next() {
		out = append(out, append([]byte(nil), k...))
	}
	return out
}

func getJSON(b *bolt.Bucket, key []byte, v any) (bool, error) {
	raw := b.Get(key)
	if raw == nil {
		return false, nil
	}
	if err := json.Unmarshal(raw, v); err != nil {
		return true, fmt.Errorf("decode %s/%q: %w", "record", key, err)
	}
	return true, nil
}

func putJSON(b *bolt.Bucket, key []byte, v any) error {
	raw, err := json.Marshal(v)
	if err != nil {
		return fmt.Errorf("encode %q: %w", key, err)
	}
	return b.Put(key, raw)
}

// setState moves a delivery between the pending and failed indexes.
func setState(tx *bolt.Tx, key []byte, state string) error {
	p, f := tx.Bucket(bktPending), tx.Bucket(bktFailed)
	switch state {
	case StatePending:
		if err := f.Delete(key); err != nil {
			return err
		}
		return p.Put(key, nil)
	case StateFailed:
		if err := p.Delete(key); err != nil {
			return err
		}
		return f.Put(key, nil)
	default:
		if err := p.Delete(key); err != nil {
			return err
		}
		return f.Delete(key)
	}
}

func initBuckets(tx *bolt.Tx) error {
	for _, name := range allBuckets {
		if _, err := tx.CreateBucketIfNotExists(name); err != nil {
			return fmt.Errorf("create bucket %s: %w", name, err)
		}
	}
	meta := tx.Bucket(bktMeta)
	switch v := string(meta.Get([]byte("schema"))); v {
	case "":
		return meta.Put([]byte("schema"), []byte(schemaVersion))
	case schemaVersion:
		return nil
	default:
		return fmt.Errorf("outbox schema %q is not supported by this version (want %s)", v, schemaVersion)
	}
}

// Delivery is the state of one alert at one receiver, as listed by Pending and Failed.
type Delivery struct {
	AlertID    string
	Receiver   string
	MessageID  string // webhook-id
	State      string // pending | delivered | failed
	SiteID     string
	Kind       string
	Subject    string
	Status     string // firing | resolved | reminder | update
	Severity   string
	Summary    string
	Attempts   int
	Created    time.Time // wall clock, when the alert was written
	NextTry    time.Time // pending: when the next attempt is due
	LastTry    time.Time
	LastStatus int    // HTTP status of the last attempt (0: none or not HTTP)
	LastError  string // last error, if any
	Excerpt    string // first 512 bytes of the last answer (failed deliveries)
}

func (d *Dispatcher) deliveryView(dr deliveryRecord, ar *alertRecord) Delivery {
	v := Delivery{
		AlertID: dr.AlertID, Receiver: dr.Receiver, MessageID: webhookID(dr.AlertID, dr.Receiver), State: dr.State,
		Attempts: dr.Attempts, Created: dr.Created, NextTry: dr.NextTry, LastTry: dr.LastTry,
		LastStatus: dr.LastStatus, LastError: dr.LastError, Excerpt: dr.Excerpt,
	}
	if ar != nil {
		p := d.buildPayload(ar)
		v.SiteID, v.Kind, v.Subject, v.Status, v.Severity, v.Summary = p.Site.ID, string(p.Kind), p.Subject, string(p.Status), p.Severity, p.Summary
	}
	return v
}
