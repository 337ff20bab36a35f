package alert

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"maps"
	"net/url"
	"slices"
	"strconv"
	"strings"
	"time"

	bolt "go.etcd.io/bbolt"

	"holomix/detect"
)

// Episodes and de-duplication.
//
// Every alert belongs to an episode keyed by (site, kind, subject, onset).
// Alert ids are deterministic (see AlertID), so a re-fed event is recognised
// and ignored whatever the kind. How an episode ends depends on the kind:
// lifecycleOf classifies the kinds and endIceCover is how an ice_off ends an
// ice cover; nothing else decides it.
//
//   - Condition kinds (intake_change, intake_overturn_risk, frazil_risk,
//     sensor_fault, and any kind this package does not know): a firing event
//     opens an episode and its message goes out once. While the episode is
//     open, further firings for the same (site, kind, subject) are not
//     notified (flicker guard). A resolved event closes the open episode and
//     notifies the receivers that got the firing and asked for resolved
//     messages. An update event replaces the episode's latest figures; it is
//     sent only when its event-time UTC day differs from the day of the
//     episode's last firing or update message, so at most one message per
//     event day. Reminders repeat the latest figures every Receiver.Reminder
//     of wall-clock time while the episode is open.
//   - Transition kinds (stratification_onset, overturn, max_density_reached,
//     inverse_stratification, ice_off, degree_days) mark a moment, not a state
//     that later ends: detect never resolves them and already debounces them.
//     Each firing is its own episode, closed at once: every firing is
//     delivered (the spring overturn after a fall overturn, the next year's
//     overturn), never reminded, and updates or resolved events for these
//     kinds are not sent (counted as suppressed or orphan).
//   - ice_on is a condition kind (flicker guard, reminders such as a weekly
//     "ice cover continues") whose episode also ends when an ice_off fires at
//     the same site (any subject), with the ice_off's data time not before the
//     ice_on's onset. The ice_off message is what receivers of ice_off get; no
//     second message tells them the same thing. A receiver that got the ice_on
//     and asked for resolved messages but does not receive ice_off (its kinds
//     filter lists ice_on only) gets a resolved ice_on built from the ice_off
//     event instead: otherwise the end of the cover it was told about, and the
//     end of its reminders, would reach it by silence. detect also resolves
//     ice_on itself when the data stop during ice cover (Details["reason"] =
//     "data gap"); that message says the cover can no longer be followed, not
//     that it has ended (see Compose). Either way the next winter's ice_on
//     opens a new episode.
//
// Outboxes written before this rule may hold transition episodes that were
// left open; Open closes them silently (closeStaleOneShot).

// lifecycle says how the episodes of one event kind end.
type lifecycle int

const (
	// lcCondition: opened by a firing, closed by a resolved event.
	lcCondition lifecycle = iota
	// lcOneShot: each firing is its own episode, closed at once.
	lcOneShot
	// lcIceCover: a condition that an ice_off firing at the same site also
	// closes (endIceCover).
	lcIceCover
)

// lifecycleOf is the one place that says how the episodes of a kind end (see
// the rule above). Unknown kinds are conditions, as before this rule existed.
func lifecycleOf(k detect.Kind) lifecycle {
	switch k {
	case detect.KindStratificationOnset, detect.KindOverturn, detect.KindMaxDensityReached,
		detect.KindInverseStratification, detect.KindIceOff, detect.KindDegreeDays:
		return lcOneShot
	case detect.KindIceOn:
		return lcIceCover
	default:
		return lcCondition
	}
}

// normalise validates an event. Missing identity fields and unknown statuses
// are rejected; an unknown severity is delivered as "warning" (never dropped)
// and counted.
func (d *Dispatcher) normalise(ev detect.Event) (detect.Event, error) {
	var missing []string
	if ev.Site == "" {
		missing = append(missing, "site")
	}
	if ev.Kind == "" {
		missing = append(missing, "kind")
	}
	if ev.Time.IsZero() {
		missing = append(missing, "time")
	}
	if len(missing) > 0 {
		return ev, fmt.Errorf("alert: event rejected (site %q, kind %q): missing %s", ev.Site, ev.Kind, strings.Join(missing, ", "))
	}
	switch ev.Status {
	case detect.StatusFiring, detect.StatusResolved, detect.StatusUpdate:
	default:
		return ev, fmt.Errorf("alert: event rejected (site %q, kind %q): status %q, want firing, resolved or update", ev.Site, ev.Kind, ev.Status)
	}
	if _, ok := severityRank(ev.Severity); !ok {
		d.log.Warn("event with an unknown severity is delivered as warning", "site", ev.Site, "kind", string(ev.Kind), "severity", ev.Severity)
		d.met.events.WithLabelValues("bad_severity").Inc()
		ev.Severity = "warning"
	}
	ev.Time = ev.Time.UTC()
	return ev, nil
}

// route returns the receivers whose filters accept the event, in config order.
func (d *Dispatcher) route(ev detect.Event) []string {
	var out []string
	for _, r := range d.receivers {
		if r.wants(ev.Site, ev.Kind, ev.Severity) {
			out = append(out, r.name)
		}
	}
	return out
}

// apply records one event inside a write transaction and returns the
// deliveries to hand to workers after the commit, and the outcome for the
// events counter.
func (d *Dispatcher) apply(tx *bolt.Tx, ev detect.Event, now time.Time) ([]*item, string, error) {
	sk := subjectKey(ev.Site, ev.Kind, ev.Subject)
	sub := getSubject(tx, sk)
	attrs := []any{"site", ev.Site, "kind", string(ev.Kind), "subject", ev.Subject, "status", string(ev.Status), "event_time", ev.Time}

	switch ev.Status {
	case detect.StatusFiring:
		epID := EpisodeID(ev.Site, ev.Kind, ev.Subject, ev.Time)
		aid := AlertID(epID, detect.StatusFiring, "")
		if alertSeq(tx, aid) != nil {
			return nil, "duplicate", nil
		}
		if lifecycleOf(ev.Kind) == lcOneShot {
			return d.fireOneShot(tx, ev, sk, sub, epID, aid, now)
		}
		if sub.open != 0 {
			ep, err := getEpisode(tx, sub.open)
			if err != nil {
				return nil, "", err
			}
			if ep.ID == epID {
				return nil, "duplicate", nil
			}
			if !ev.Time.Before(ep.Latest.Time) {
				ep.Latest = ev
				if err := putEpisode(tx, ep); err != nil {
					return nil, "", err
				}
			}
			d.log.Debug("firing while its episode is open: not notified again", append(attrs, "episode", ep.ID)...)
			return nil, "suppressed", nil
		}
		seq, err := tx.Bucket(bktEpisodes).NextSequence()
		if err != nil {
			return nil, "", err
		}
		names := d.route(ev)
		ep := &episodeRecord{ID: epID, Seq: seq, Site: ev.Site, Kind: ev.Kind, Subject: ev.Subject, Onset: ev.Time, Open: true,
			LastMsgDay: eventDay(ev.Time), Latest: ev, Receivers: names, Opened: now}
		d.initReminders(ep, names, now)
		if err := putEpisode(tx, ep); err != nil {
			return nil, "", err
		}
		if err := putSubject(tx, sk, subjectRecord{open: seq, last: seq}); err != nil {
			return nil, "", err
		}
		items, err := d.newAlert(tx, ev, ep, detect.StatusFiring, aid, names, now, time.Time{})
		return items, "new", err

	case detect.StatusResolved:
		if sub.open == 0 {
			if sub.last != 0 {
				ep, err := getEpisode(tx, sub.last)
				if err != nil {
					return nil, "", err
				}
				if alertSeq(tx, AlertID(ep.ID, detect.StatusResolved, "")) != nil {
					return nil, "duplicate", nil
				}
			}
			d.log.Warn("resolved event without an open episode: nothing to resolve", attrs...)
			return nil, "orphan", nil
		}
		ep, err := getEpisode(tx, sub.open)
		if err != nil {
			return nil, "", err
		}
		if ev.Time.Before(ep.Onset) {
			// A resolution older than the open episode ended an earlier one:
			// it was re-fed after a restart (detection replays from its last
			// checkpoint) and was handled when it first came.
			d.log.Debug("resolved event older than the open episode: re-fed, ignored", append(attrs, "episode", ep.ID)...)
			return nil, "duplicate", nil
		}
		ep.Open, ep.End, ep.Closed, ep.Latest = false, ev.Time, now, ev
		if err := putEpisode(tx, ep); err != nil {
			return nil, "", err
		}
		if err := putSubject(tx, sk, subjectRecord{open: 0, last: ep.Seq}); err != nil {
			return nil, "", err
		}
		var names []string
		for _, n := range ep.Receivers {
			if r := d.byName[n]; r != nil && r.resolved {
				names = append(names, n)
			}
		}
		items, err := d.newAlert(tx, ev, ep, detect.StatusResolved, AlertID(ep.ID, detect.StatusResolved, ""), names, now, time.Time{})
		return items, "new", err

	default: // update
		if sub.open == 0 {
			if sub.last != 0 {
				d.log.Debug("update after its episode ended: ignored", attrs...)
				return nil, "suppressed", nil
			}
			d.log.Warn("update event without an open episode: ignored", attrs...)
			return nil, "orphan", nil
		}
		ep, err := getEpisode(tx, sub.open)
		if err != nil {
			return nil, "", err
		}
		day := eventDay(ev.Time)
		if day <= ep.LastMsgDay {
			// Same event day as the last message (or a re-fed older update):
			// keep the newest figures for reminders, send nothing.
			if !ev.Time.Before(ep.Latest.Time) {
				ep.Latest = ev
				if err := putEpisode(tx, ep); err != nil {
					return nil, "", err
				}
			}
			return nil, "suppressed", nil
		}
		aid := AlertID(ep.ID, detect.StatusUpdate, day)
		if alertSeq(tx, aid) != nil {
			return nil, "duplicate", nil
		}
		ep.Latest = ev
		names := slices.Clone(ep.Receivers)
		var added []string
		for _, n := range d.route(ev) { // e.g. a receiver that wants only critical, after an escalation
			if !slices.Contains(names, n) {
				names = append(names, n)
				added = append(added, n)
			}
		}
		ep.Receivers = names
		d.initReminders(ep, added, now)
		ep.LastMsgDay = day
		if err := putEpisode(tx, ep); err != nil {
			return nil, "", err
		}
		items, err := d.newAlert(tx, ev, ep, detect.StatusUpdate, aid, names, now, ep.Onset)
		return items, "new", err
	}
}

// fireOneShot records a firing of a transition kind as its own episode,
// closed at once, and delivers it to the receivers that route it. An ice_off
// also ends the open ice_on episodes of its site (endIceCover).
func (d *Dispatcher) fireOneShot(tx *bolt.Tx, ev detect.Event, sk []byte, sub subjectRecord, epID, aid string,
	now time.Time) ([]*item, string, error) {
	if sub.open != 0 {
		// Only an outbox written before the one-shot rule can hold an open
		// episode of a transition kind; Open closes those, so this is a
		// safety net that must not hold back the new firing.
		if err := closeStale(tx, sk, sub, now); err != nil {
			return nil, "", err
		}
	}
	seq, err := tx.Bucket(bktEpisodes).NextSequence()
	if err != nil {
		return nil, "", err
	}
	names := d.route(ev)
	ep := &episodeRecord{ID: epID, Seq: seq, Site: ev.Site, Kind: ev.Kind, Subject: ev.Subject, Onset: ev.Time, Open: false,
		End: ev.Time, LastMsgDay: eventDay(ev.Time), Latest: ev, Receivers: names, Opened: now, Closed: now}
	if err := putEpisode(tx, ep); err != nil {
		return nil, "", err
	}
	if err := putSubject(tx, sk, subjectRecord{open: 0, last: seq}); err != nil {
		return nil, "", err
	}
	items, err := d.newAlert(tx, ev, ep, detect.StatusFiring, aid, names, now, time.Time{})
	if err != nil {
		return nil, "", err
	}
	if ev.Kind == detect.KindIceOff {
		more, err := d.endIceCover(tx, ev, aid, names, now)
		if err != nil {
			return nil, "", err
		}
		items = append(items, more...)
	}
	return items, "new", nil
}

// endIceCover closes the open ice_on episodes of the ice_off event's site
// whose onset is not after the ice_off (offID: the ice_off alert, offNames:
// its receivers). It writes each episode's resolved alert, built from the
// ice_off figures, so that a later resolved ice_on (data gap) or a re-fed one
// is recognised as a duplicate; that alert goes only to receivers that got
// the ice_on, want resolved messages and do not receive the ice_off.
func (d *Dispatcher) endIceCover(tx *bolt.Tx, off detect.Event, offID string, offNames []string, now time.Time) ([]*item, error) {
	prefix := []byte(string(detect.KindIceOn) + "\x00")
	suffix := []byte("\x00" + off.Site)
	var keys [][]byte
	for _, k := range prefixKeys(tx.Bucket(bktSubjects), prefix) {
		// kind NUL subject NUL site: the site is what follows the last NUL.
		if i := bytes.LastIndexByte(k, 0); i >= 0 && bytes.Equal(k[i:], suffix) {
			keys = append(keys, k)
		}
	}
	var items []*item
	for _, sk := range keys {
		sub := getSubject(tx, sk)
		if sub.open == 0 {
			continue
		}
		ep, err := getEpisode(tx, sub.open)
		if err != nil {
			return nil, err
		}
		if off.Time.Before(ep.Onset) {
			d.log.Warn("ice_off older than the open ice cover: the cover stays open", "site", off.Site,
				"ice_off_time", off.Time, "episode", ep.ID, "onset", ep.Onset)
			continue
		}
		res := off
		res.Kind, res.Subject, res.Status = detect.KindIceOn, ep.Subject, detect.StatusResolved
		res.Details = maps.Clone(off.Details)
		if res.Details == nil {
			res.Details = map[string]string{}
		}
		res.Details["closed_by"] = "ice_off " + offID
		ep.Open, ep.End, ep.Closed, ep.Latest = false, off.Time, now, res
		if err := putEpisode(tx, ep); err != nil {
			return nil, err
		}
		if err := putSubject(tx, sk, subjectRecord{open: 0, last: ep.Seq}); err != nil {
			return nil, err
		}
		var names []string
		for _, n := range ep.Receivers {
			if r := d.byName[n]; r != nil && r.resolved && !slices.Contains(offNames, n) {
				names = append(names, n)
			}
		}
		d.log.Debug("ice_off ends the open ice cover", "site", off.Site, "episode", ep.ID, "resolved_to", names)
		its, err := d.newAlert(tx, res, ep, detect.StatusResolved, AlertID(ep.ID, detect.StatusResolved, ""), names, now, time.Time{})
		if err != nil {
			return nil, err
		}
		items = append(items, its...)
	}
	return items, nil
}

// closeStale closes the open episode of sk without a message (a transition
// episode left open by an earlier version of this package).
func closeStale(tx *bolt.Tx, sk []byte, sub subjectRecord, now time.Time) error {
	ep, err := getEpisode(tx, sub.open)
	if err != nil {
		return err
	}
	ep.Open, ep.End, ep.Closed, ep.Reminders = false, ep.Latest.Time, now, nil
	if err := putEpisode(tx, ep); err != nil {
		return err
	}
	return putSubject(tx, sk, subjectRecord{open: 0, last: sub.last})
}

// closeStaleOneShot closes, without messages, the open episodes of transition
// kinds that an outbox written before the one-shot rule may hold (they would
// otherwise suppress later firings and send reminders). It returns how many
// it closed; an outbox without any costs no write transaction.
func (d *Dispatcher) closeStaleOneShot(now time.Time) (int, error) {
	stale := func(tx *bolt.Tx) ([][]byte, error) {
		var keys [][]byte
		err := tx.Bucket(bktSubjects).ForEach(func(k, _ []byte) error {
			kind, _, _ := bytes.Cut(k, []byte{0})
			if lifecycleOf(detect.Kind(kind)) == lcOneShot && getSubject(tx, k).open != 0 {
				keys = append(keys, append([]byte(nil), k...))
			}
			return nil
		})
		return keys, err
	}
	var keys [][]byte
	if err := d.db.View(func(tx *bolt.Tx) (err error) { keys, err = stale(tx); return err }); err != nil || len(keys) == 0 {
		return 0, err
	}
	n := 0
	err := writeTx(d.db, func(tx *bolt.Tx) error {
		keys, err := stale(tx)
		if err != nil {
			return err
		}
		for _, sk := range keys {
			if err := closeStale(tx, sk, getSubject(tx, sk), now); err != nil {
				return err
			}
		}
		n = len(keys)
		return nil
	})
	if err != nil {
		return 0, err
	}
	return n, nil
}

func getEpisode(tx *bolt.Tx, seq uint64) (*episodeRecord, error) {
	ep := new(episodeRecord)
	ok, err := getJSON(tx.Bucket(bktEpisodes), seqKey(seq), ep)
	if err != nil || !ok {
		return nil, fmt.Errorf("episode %d: %w", seq, errors.Join(err, errMissing(ok)))
	}
	return ep, nil
}

func putEpisode(tx *bolt.Tx, ep *episodeRecord) error {
	return putJSON(tx.Bucket(bktEpisodes), seqKey(ep.Seq), ep)
}

func errMissing(found bool) error {
	if found {
		return nil
	}
	return errors.New("record missing")
}

func (d *Dispatcher) initReminders(ep *episodeRecord, names []string, now time.Time) {
	for _, n := range names {
		r := d.byName[n]
		if r == nil || r.reminder <= 0 {
			continue
		}
		if ep.Reminders == nil {
			ep.Reminders = map[string]reminderState{}
		}
		if _, ok := ep.Reminders[n]; !ok {
			ep.Reminders[n] = reminderState{Next: now.Add(r.reminder)}
		}
	}
}

// newAlert writes an alert and its pending deliveries. The alert is written
// even when no receiver wants it, so that a re-fed event stays a no-op.
func (d *Dispatcher) newAlert(tx *bolt.Tx, ev detect.Event, ep *episodeRecord, status detect.Status, aid string,
	names []string, now time.Time, textOnset time.Time) ([]*item, error) {
	alerts := tx.Bucket(bktAlerts)
	n, err := alerts.NextSequence()
	if err != nil {
		return nil, err
	}
	seq := seqKey(n)
	ar := &alertRecord{ID: aid, EpisodeID: ep.ID, EpisodeSeq: ep.Seq, Status: status, Event: ev, Onset: ep.Onset,
		TextOnset: textOnset, Receivers: names, Created: now}
	if err := putJSON(alerts, seq, ar); err != nil {
		return nil, err
	}
	if err := tx.Bucket(bktAlertIDs).Put([]byte(aid), seq); err != nil {
		return nil, err
	}
	if len(names) == 0 {
		d.log.Debug("no receiver wants this alert", "id", aid, "site", ev.Site, "kind", string(ev.Kind), "status", string(status))
		return nil, nil
	}
	pl := d.buildPayload(ar)
	dels := tx.Bucket(bktDeliveries)
	items := make([]*item, 0, len(names))
	for _, name := range names {
		if d.byName[name] == nil {
			continue // receiver removed from the configuration since the episode opened
		}
		k := deliveryKey(seq, name)
		dr := deliveryRecord{AlertID: aid, Receiver: name, State: StatePending, Created: now, NextTry: now}
		if err := putJSON(dels, k, dr); err != nil {
			return nil, err
		}
		if err := setState(tx, k, StatePending); err != nil {
			return nil, err
		}
		items = append(items, &item{key: string(k), alertID: aid, receiver: name, next: now, created: now, payload: &pl})
	}
	return items, nil
}

// siteInfo returns the configured name of a site, or the id itself.
func (d *Dispatcher) siteInfo(id string) SiteInfo {
	if s, ok := d.sites[id]; ok {
		if s.ID == "" {
			s.ID = id
		}
		if s.Name == "" {
			s.Name = id
		}
		return s
	}
	return SiteInfo{ID: id, Name: id}
}

// siteLink is the status page URL of a site ("" without a status URL).
func siteLink(base, id string) string {
	if base == "" {
		return ""
	}
	return strings.TrimRight(base, "/") + "/sites/" + url.PathEscape(id)
}

// buildPayload renders the message of one alert (deterministic; SentAt is
// left zero for the attempt to set).
func (d *Dispatcher) buildPayload(ar *alertRecord) Payload {
	ev := ar.Event
	site := d.siteInfo(ev.Site)
	tev := ev
	tev.Status = ar.Status
	msg := compose(tev, site, ar.TextOnset)
	link := siteLink(d.statusURL, site.ID)
	text := msg.Text()
	if link != "" {
		text += "\n\nStatus page: " + link
	}
	details := map[string]string{}
	maps.Copy(details, ev.Details)
	for k, v := range map[string]string{"from": ev.From, "to": ev.To, "season": ev.Season} {
		if _, taken := details[k]; v != "" && !taken {
			details[k] = v
		}
	}
	p := Payload{
		ID: ar.ID, EpisodeID: ar.EpisodeID, Site: SiteRef{ID: site.ID, Name: site.Name}, Kind: ev.Kind, Subject: ev.Subject,
		Severity: ev.Severity, Status: ar.Status, EventTime: ev.Time.UTC(), OnsetTime: ar.Onset.UTC(),
		Summary: msg.Summary, Text: text, Details: details, Cautions: msg.Cautions,
		Metrics: slices.Clone(ev.Metrics), Projections: slices.Clone(ev.Projections),
		Link: link, Confidence: ev.Confidence,
	}
	if p.Cautions == nil {
		p.Cautions = []string{}
	}
	if p.Metrics == nil {
		p.Metrics = []detect.Metric{}
	}
	if p.Projections == nil {
		p.Projections = []detect.Projection{}
	}
	return p
}

// remindersDue reports whether any open episode has a reminder due at now or
// a reminder schedule still to set, so that an idle minute costs no commit.
func (d *Dispatcher) remindersDue(now time.Time) (bool, error) {
	due := false
	err := d.db.View(func(tx *bolt.Tx) error {
		return tx.Bucket(bktSubjects).ForEach(func(k, _ []byte) error {
			s := getSubject(tx, k)
			if s.open == 0 || due {
				return nil
			}
			ep, err := getEpisode(tx, s.open)
			if err != nil {
				return err
			}
			for _, n := range ep.Receivers {
				if r := d.byName[n]; r != nil && r.reminder > 0 {
					rs, ok := ep.Reminders[n]
					if !ok || rs.Next.IsZero() || !now.Before(rs.Next) {
						due = true
					}
				}
			}
			return nil
		})
	})
	return due, err
}

// remind writes the reminders that are due at wall-clock time now.
func (d *Dispatcher) remind(now time.Time) error {
	now = now.UTC()
	if due, err := d.remindersDue(now); err != nil || !due {
		return err
	}
	var items []*item
	err := writeTx(d.db, func(tx *bolt.Tx) error {
		items = items[:0]
		var open []uint64
		if err := tx.Bucket(bktSubjects).ForEach(func(k, _ []byte) error {
			if s := getSubject(tx, k); s.open != 0 {
				open = append(open, s.open)
			}
			return nil
		}); err != nil {
			return err
		}
		for _, seq := range open {
			ep, err := getEpisode(tx, seq)
			if err != nil {
				return err
			}
			changed := false
			for _, n := range ep.Receivers {
				r := d.byName[n]
				if r == nil || r.reminder <= 0 {
					continue
				}
				if ep.Reminders == nil {
					ep.Reminders = map[string]reminderState{}
				}
				rs, ok := ep.Reminders[n]
				switch {
				case !ok || rs.Next.IsZero():
					rs.Next = now.Add(r.reminder)
				case !now.Before(rs.Next):
					rs.Seq++
					rs.Next = now.Add(r.reminder) // one reminder after a long stop, not a burst
					aid := AlertID(ep.ID, StatusReminder, n+"#"+strconv.Itoa(rs.Seq))
					its, err := d.newAlert(tx, ep.Latest, ep, StatusReminder, aid, []string{n}, now, ep.Onset)
					if err != nil {
						return err
					}
					items = append(items, its...)
				default:
					continue
				}
				ep.Reminders[n] = rs
				changed = true
			}
			if changed {
				if err := putEpisode(tx, ep); err != nil {
					return err
				}
			}
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("alert: reminders: %w", err)
	}
	d.enqueue(items)
	return nil
}

// prune deletes alerts (with their deliveries) that are fully delivered and
// older than the retention, unless their episode is still open, and closed
// episodes older than the retention.
func (d *Dispatcher) prune(now time.Time) (int, error) {
	cutoff := now.Add(-d.retention)
	n := 0
	err := writeTx(d.db, func(tx *bolt.Tx) error {
		n = 0
		alerts, ids, dels, eps := tx.Bucket(bktAlerts), tx.Bucket(bktAlertIDs), tx.Bucket(bktDeliveries), tx.Bucket(bktEpisodes)
		pending, failed := tx.Bucket(bktPending), tx.Bucket(bktFailed)
		type victim struct {
			seq []byte
			id  string
		}
		var drop []victim
		if err := alerts.ForEach(func(k, v []byte) error {
			var ar alertRecord
			if err := json.Unmarshal(v, &ar); err != nil {
				return fmt.Errorf("alert %x: %w", k, err)
			}
			if !ar.Created.Before(cutoff) {
				return nil
			}
			if ep, err := getEpisode(tx, ar.EpisodeSeq); err == nil && ep.Open {
				return nil
			}
			if len(prefixKeys(pending, k)) > 0 || len(prefixKeys(failed, k)) > 0 {
				return nil
			}
			drop = append(drop, victim{append([]byte(nil), k...), ar.ID})
			return nil
		}); err != nil {
			return err
		}
		for _, v := range drop {
			for _, dk := range prefixKeys(dels, v.seq) {
				if err := dels.Delete(dk); err != nil {
					return err
				}
			}
			if err := alerts.Delete(v.seq); err != nil {
				return err
			}
			if err := ids.Delete([]byte(v.id)); err != nil {
				return err
			}
			n++
		}
		var old []*episodeRecord
		if err := eps.ForEach(func(k, v []byte) error {
			ep := new(episodeRecord)
			if err := json.Unmarshal(v, ep); err != nil {
				return fmt.Errorf("episode %x: %w", k, err)
			}
			if !ep.Open && !ep.Closed.IsZero() && ep.Closed.Before(cutoff) {
				old = append(old, ep)
			}
			return nil
		}); err != nil {
			return err
		}
		for _, ep := range old {
			if err := eps.Delete(seqKey(ep.Seq)); err != nil {
				return err
			}
			sk := subjectKey(ep.Site, ep.Kind, ep.Subject)
			if s := getSubject(tx, sk); s.open == 0 && s.last == ep.Seq {
				if err := tx.Bucket(bktSubjects).Delete(sk); err != nil {
					return err
				}
			}
		}
		return nil
	})
	if err != nil {
		return 0, fmt.Errorf("alert: prune: %w", err)
	}
	return n, nil
}
