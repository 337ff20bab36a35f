// Package alert turns detection events into alerts: routing to receivers,
// episodes and de-duplication, a durable outbox (bbolt, outbox.db), webhook
// delivery signed per Standard Webhooks with retries, a log receiver read by
// the status page, and the message text people read (Compose), with the safety
// cautions that must travel with it.
//
// Flow: Submit writes the alert and one delivery per routed receiver to bolt
// and returns after the commit; per-receiver workers started by Run deliver,
// retry with capped exponential backoff and jitter (honouring Retry-After on 429
// and 503), and mark each delivery done. Delivery is at least once: after a
// crash between a receiver's 2xx and the mark, the message is sent again with
// the same webhook-id, which receivers use to de-duplicate.
//
// Episodes: every alert belongs to an episode of one (site, kind, subject).
// Conditions (intake_change, intake_overturn_risk, frazil_risk, sensor_fault)
// open an episode on firing and close it on resolved; firings in between are
// not re-sent, updates go out at most once per event day, and reminders
// repeat while the episode is open. Transitions (stratification_onset,
// overturn, max_density_reached, inverse_stratification, ice_off,
// degree_days) are one-shot: every firing is delivered as its own episode,
// closed at once, without reminders, so each season's overturn and each
// degree-day threshold is announced. ice_on is a condition that ends with a
// resolved ice_on (sent by detect when the data stop during ice cover: the
// message then says the cover can no longer be followed, not that it ended)
// or with an ice_off at the same site; the ice_off message is what its
// receivers get, and only receivers that asked for resolved messages but do
// not receive ice_off get a resolved ice_on instead. The next winter's ice_on
// is a new episode. Re-submitting an event is always a no-op (deterministic
// alert ids). See episode.go for the full rule.
//
// Secrets: a receiver secret "whsec_<base64>" is base64-decoded to the HMAC
// key (the Standard Webhooks form); any other string is used as raw key bytes.
// Verify with the same key: standardwebhooks.NewWebhook("whsec_…") for the
// first form, standardwebhooks.NewWebhookRaw([]byte(secret)) for the second.
package alert

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"net/http"
	"os"
	"path/filepath"
	"sort"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	bolt "go.etcd.io/bbolt"
	berrors "go.etcd.io/bbolt/errors"

	"holomix/config"
	"holomix/detect"
	"holomix/internal/mmtrim"
)

// OutboxFile is the name of the outbox database inside Options.Dir.
const OutboxFile = "outbox.db"

// ErrLocked is returned by Open when another process (normally the running
// daemon) holds the outbox file lock.
var ErrLocked = errors.New("the alert outbox is locked by another process")

// Defaults.
const (
	DefaultLockTimeout = 5 * time.Second
	DefaultRetention   = 90 * 24 * time.Hour
	DefaultLogSize     = 500
	backoffBase        = time.Second
	backoffCap         = 10 * time.Minute
	backoffJitter      = 0.2
	maxRetryAfter      = time.Hour
	housekeepingTick   = time.Minute
	commitLinger       = 50 * time.Millisecond
)

// Options configure a Dispatcher. Only Dir is required; with no receivers
// events are still recorded (episodes, de-duplication) but nothing is sent.
type Options struct {
	Dir         string // directory of outbox.db (created if missing)
	Receivers   []config.Receiver
	StatusURL   string              // base URL of the status page; links are StatusURL + "/sites/{id}"
	Sites       map[string]SiteInfo // names for site ids; unknown ids are shown as themselves
	Logger      *slog.Logger        // default slog.Default()
	Registerer  prometheus.Registerer
	Clock       func() time.Time // wall clock; default time.Now
	HTTPClient  *http.Client     // default: own transport; redirects are never followed
	LockTimeout time.Duration    // wait for the bolt file lock; default 5 s
	Retention   time.Duration    // delivered alerts and closed episodes are pruned after this; default 90 days
	LogSize     int              // entries kept for Recent; default 500
	// OnOutcome, when set, is called after every delivery attempt that ends in
	// delivered, failed or a scheduled retry (e.g. to feed the status page's alert log).
	// It runs on the receiver's worker and must not block.
	OnOutcome func(Outcome)

	// after is the timer used by workers (tests inject a fake clock); default time.NewTimer.
	after func(time.Duration) (<-chan time.Time, func() bool)
}

// Dispatcher routes events to receivers through the durable outbox.
type Dispatcher struct {
	db        *bolt.DB
	log       *slog.Logger
	now       func() time.Time
	after     func(time.Duration) (<-chan time.Time, func() bool)
	client    *http.Client
	ownTrans  *http.Transport
	statusURL string
	sites     map[string]SiteInfo
	receivers []*receiver
	byName    map[string]*receiver
	queues    map[string]*queue
	met       *metrics
	alog      *alertLog
	onOutcome func(Outcome)
	retention time.Duration
	hooks     hooks

	use     sync.RWMutex // held shared by public calls, exclusively by Close
	mu      sync.Mutex
	running bool
	closed  bool
	stop    chan struct{}
	runWG   sync.WaitGroup
}

// hooks let tests simulate crashes; nil fields do nothing.
type hooks struct {
	// afterSend runs after a notifier returned; returning false drops the result
	// as if the process died before marking the delivery.
	afterSend func(alertID, receiver string) bool
}

// Open opens (or creates) Dir/outbox.db, validates the receivers and loads the
// deliveries still pending from an earlier run. It returns ErrLocked (wrapped)
// when another process holds the file.
func Open(o Options) (*Dispatcher, error) {
	if o.Dir == "" {
		return nil, errors.New("alert: Options.Dir is required")
	}
	d := &Dispatcher{
		log:       o.Logger,
		now:       o.Clock,
		after:     o.after,
		statusURL: o.StatusURL,
		sites:     o.Sites,
		retention: o.Retention,
		queues:    map[string]*queue{},
		byName:    map[string]*receiver{},
		stop:      make(chan struct{}),
	}
	if d.log == nil {
		d.log = slog.Default()
	}
	d.log = d.log.With("component", "alert")
	if d.now == nil {
		d.now = time.Now
	}
	if d.after == nil {
		d.after = func(dur time.Duration) (<-chan time.Time, func() bool) {
			t := time.NewTimer(dur)
			return t.C, t.Stop
		}
	}
	if d.retention <= 0 {
		d.retention = DefaultRetention
	}
	size := o.LogSize
	if size <= 0 {
		size = DefaultLogSize
	}
	d.alog = &alertLog{max: size}
	d.onOutcome = o.OnOutcome
	if o.HTTPClient != nil {
		c := *o.HTTPClient
		c.CheckRedirect = noRedirect
		d.client = &c
	} else {
		d.ownTrans = http.DefaultTransport.(*http.Transport).Clone()
		d.ownTrans.MaxIdleConnsPerHost = 4
		d.client = &http.Client{Transport: d.ownTrans, CheckRedirect: noRedirect}
	}
	met, err := newMetrics(o.Registerer)
	if err != nil {
		return nil, fmt.Errorf("alert: register metrics: %w", err)
	}
	d.met = met
	rcvs, err := buildReceivers(d, o.Receivers, o.Sites)
	if err != nil {
		return nil, fmt.Errorf("alert: receivers: %w", err)
	}
	d.receivers = rcvs
	for _, r := range rcvs {
		d.byName[r.name] = r
		d.queues[r.name] = newQueue()
	}

	if err := os.MkdirAll(o.Dir, 0o750); err != nil {
		return nil, fmt.Errorf("alert: create outbox directory: %w", err)
	}
	lt := o.LockTimeout
	if lt <= 0 {
		lt = DefaultLockTimeout
	}
	path := filepath.Join(o.Dir, OutboxFile)
	// The free list is rebuilt on open instead of written on every commit
	// (it does not affect durability of the data).
	db, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: lt, NoFreelistSync: true, FreelistType: bolt.FreelistMapType})
	if err != nil {
		if errors.Is(err, berrors.ErrTimeout) {
			return nil, fmt.Errorf("alert: open %s: %w", path, ErrLocked)
		}
		return nil, fmt.Errorf("alert: open %s: %w", path, err)
	}
	d.db = db
	if err := db.Update(initBuckets); err != nil {
		db.Close()
		return nil, fmt.Errorf("alert: init %s: %w", path, err)
	}
	if n, err := d.closeStaleOneShot(d.now().UTC()); err != nil {
		db.Close()
		return nil, fmt.Errorf("alert: close stale transition episodes in %s: %w", path, err)
	} else if n > 0 {
		d.log.Info("closed transition episodes left open by an earlier version (each firing of these kinds is now its own episode)", "count", n)
	}
	if err := d.load(); err != nil {
		db.Close()
		return nil, fmt.Errorf("alert: load %s: %w", path, err)
	}
	return d, nil
}

func noRedirect(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }

// load queues the pending deliveries, fails those whose receiver is gone, and
// seeds the alert log from log receivers' recent deliveries.
func (d *Dispatcher) load() error {
	now := d.now()
	var orphans [][]byte
	var logged []LogEntry
	err := d.db.View(func(tx *bolt.Tx) error {
		dels, alerts := tx.Bucket(bktDeliveries), tx.Bucket(bktAlerts)
		cache := map[string]*Payload{}
		if err := tx.Bucket(bktPending).ForEach(func(k, _ []byte) error {
			var dr deliveryRecord
			if ok, err := getJSON(dels, k, &dr); err != nil || !ok {
				return fmt.Errorf("pending index entry %q without a valid delivery: %v", k, err)
			}
			q, ok := d.queues[dr.Receiver]
			if !ok {
				orphans = append(orphans, append([]byte(nil), k...))
				return nil
			}
			p := cache[dr.AlertID]
			if p == nil {
				seq, _ := splitDeliveryKey(k)
				var ar alertRecord
				if ok, err := getJSON(alerts, seq, &ar); err != nil || !ok {
					return fmt.Errorf("delivery %q without a valid alert: %v", k, err)
				}
				pl := d.buildPayload(&ar)
				p = &pl
				cache[dr.AlertID] = p
			}
			q.push(&item{key: string(k), alertID: dr.AlertID, receiver: dr.Receiver, next: dr.NextTry,
				attempts: dr.Attempts, created: dr.Created, payload: p})
			return nil
		}); err != nil {
			return err
		}
		// Seed the in-memory alert log from the newest log deliveries.
		c := dels.Cursor()
		for k, v := c.Last(); k != nil && len(logged) < d.alog.max; k, v = c.Prev() {
			seq, rn := splitDeliveryKey(k)
			r, ok := d.byName[rn]
			if !ok || r.typ != TypeLog {
				continue
			}
			var dr deliveryRecord
			// A damaged record only loses a line of the log: skip it.
			if json.Unmarshal(v, &dr) != nil || dr.State != StateDelivered {
				continue
			}
			var ar alertRecord
			if ok, err := getJSON(alerts, seq, &ar); err != nil || !ok {
				d.log.Warn("log delivery without a readable alert", "id", dr.AlertID, "error", err)
				continue
			}
			logged = append(logged, logEntry(rn, d.buildPayload(&ar), dr.Delivered))
		}
		return nil
	})
	if err != nil {
		return err
	}
	sort.Slice(logged, func(i, j int) bool { return logged[i].Time.Before(logged[j].Time) })
	for _, e := range logged {
		d.alog.add(e)
	}
	for name, q := range d.queues {
		d.met.pending.WithLabelValues(name).Set(float64(q.len()))
	}
	if len(orphans) == 0 {
		return nil
	}
	d.log.Warn("pending deliveries for receivers no longer configured moved to the failed list", "count", len(orphans))
	return writeTx(d.db, func(tx *bolt.Tx) error {
		dels := tx.Bucket(bktDeliveries)
		for _, k := range orphans {
			var dr deliveryRecord
			if _, err := getJSON(dels, k, &dr); err != nil {
				return err
			}
			dr.State, dr.LastError, dr.LastTry = StateFailed, "receiver no longer configured", now
			if err := putJSON(dels, k, dr); err != nil {
				return err
			}
			if err := setState(tx, k, StateFailed); err != nil {
				return err
			}
		}
		return nil
	})
}

// Close stops Run (if running), waits for in-flight results to be written and
// closes the outbox. It is safe to call more than once.
// TrimResident drops the pages of the outbox file the process has mapped
// from its resident set (they stay in the page cache); see mmtrim.
func (d *Dispatcher) TrimResident() error { return mmtrim.Trim(d.db) }

func (d *Dispatcher) Close() error {
	d.mu.Lock()
	if d.closed {
		d.mu.Unlock()
		return nil
	}
	d.closed = true
	close(d.stop)
	d.mu.Unlock()
	d.runWG.Wait()
	if d.ownTrans != nil {
		d.ownTrans.CloseIdleConnections()
	}
	d.use.Lock() // wait for calls in progress
	defer d.use.Unlock()
	if err := d.db.Close(); err != nil {
		return fmt.Errorf("alert: close outbox: %w", err)
	}
	return nil
}

// Run delivers until ctx is done or Close is called: one worker goroutine per
// receiver, a committer that writes results to bolt in groups, and a
// housekeeping loop (reminders every minute, pruning once a day). Deliveries
// left pending by an earlier run are resumed. Run returns nil on a normal stop.
func (d *Dispatcher) Run(ctx context.Context) error {
	d.mu.Lock()
	if d.closed {
		d.mu.Unlock()
		return errors.New("alert: dispatcher is closed")
	}
	if d.running {
		d.mu.Unlock()
		return errors.New("alert: Run is already running")
	}
	d.running = true
	d.runWG.Add(1)
	d.mu.Unlock()
	defer func() {
		d.mu.Lock()
		d.running = false
		d.mu.Unlock()
		d.runWG.Done()
	}()

	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	go func() {
		select {
		case <-d.stop:
			cancel()
		case <-ctx.Done():
		}
	}()

	results := make(chan result, 256)
	commitDone := make(chan struct{})
	go func() {
		defer close(commitDone)
		d.committer(results)
	}()
	var wg sync.WaitGroup
	for _, r := range d.receivers {
		wg.Go(func() { d.worker(ctx, r, results) })
	}
	wg.Go(func() { d.housekeeping(ctx) })
	wg.Wait()
	close(results)
	<-commitDone
	return nil
}

// Submit writes events to the outbox and returns after the bolt commit; the
// workers are only signalled. Each event is routed, matched to its episode and
// de-duplicated (see the package documentation). Submitting the same event
// again is a no-op. Invalid events are rejected with an error and counted;
// the valid ones of the same call are still written.
func (d *Dispatcher) Submit(evs ...detect.Event) error {
	release, err := d.acquire("submit")
	if err != nil {
		return err
	}
	defer release()
	var errs []error
	valid := make([]detect.Event, 0, len(evs))
	for _, ev := range evs {
		ev, err := d.normalise(ev)
		if err != nil {
			d.met.events.WithLabelValues("rejected").Inc()
			errs = append(errs, err)
			continue
		}
		valid = append(valid, ev)
	}
	if len(valid) == 0 {
		return errors.Join(errs...)
	}
	now := d.now().UTC()
	var items []*item
	var outcomes []string
	err = writeTx(d.db, func(tx *bolt.Tx) error {
		items, outcomes = items[:0], outcomes[:0]
		for _, ev := range valid {
			its, outcome, err := d.apply(tx, ev, now)
			if err != nil {
				return err
			}
			items = append(items, its...)
			outcomes = append(outcomes, outcome)
		}
		return nil
	})
	if err != nil {
		return errors.Join(append(errs, fmt.Errorf("alert: submit: outbox commit: %w", err))...)
	}
	for _, o := range outcomes {
		d.met.events.WithLabelValues(o).Inc()
	}
	d.enqueue(items)
	return errors.Join(errs...)
}

// enqueue hands freshly committed deliveries to their workers.
func (d *Dispatcher) enqueue(items []*item) {
	for _, it := range items {
		q := d.queues[it.receiver]
		if q == nil {
			continue
		}
		q.push(it)
		d.met.submitted.WithLabelValues(it.receiver).Inc()
		d.met.pending.WithLabelValues(it.receiver).Set(float64(q.len()))
	}
}

// acquire guards a public call against a concurrent Close.
func (d *Dispatcher) acquire(op string) (release func(), err error) {
	d.use.RLock()
	d.mu.Lock()
	closed := d.closed
	d.mu.Unlock()
	if closed {
		d.use.RUnlock()
		return nil, fmt.Errorf("alert: %s: dispatcher is closed", op)
	}
	return d.use.RUnlock, nil
}

// Pending lists deliveries still to be made, oldest first.
func (d *Dispatcher) Pending() ([]Delivery, error) { return d.list(bktPending) }

// Failed lists deliveries that were given up, oldest first.
func (d *Dispatcher) Failed() ([]Delivery, error) { return d.list(bktFailed) }

func (d *Dispatcher) list(index []byte) ([]Delivery, error) {
	release, err := d.acquire("list")
	if err != nil {
		return nil, err
	}
	defer release()
	var out []Delivery
	err = d.db.View(func(tx *bolt.Tx) error {
		dels, alerts := tx.Bucket(bktDeliveries), tx.Bucket(bktAlerts)
		return tx.Bucket(index).ForEach(func(k, _ []byte) error {
			var dr deliveryRecord
			if _, err := getJSON(dels, k, &dr); err != nil {
				return err
			}
			seq, _ := splitDeliveryKey(k)
			var ar alertRecord
			if _, err := getJSON(alerts, seq, &ar); err != nil {
				return err
			}
			out = append(out, d.deliveryView(dr, &ar))
			return nil
		})
	})
	if err != nil {
		return nil, fmt.Errorf("alert: list %s: %w", index, err)
	}
	sort.SliceStable(out, func(i, j int) bool { return out[i].Created.Before(out[j].Created) })
	return out, nil
}

// Retry moves the failed deliveries of alert id back to pending, due now. A
// running dispatcher picks them up at once; otherwise they go with the next
// Run, or DeliverNow.
func (d *Dispatcher) Retry(id string) error {
	release, err := d.acquire("retry")
	if err != nil {
		return err
	}
	defer release()
	var items []*item
	now := d.now().UTC()
	err = writeTx(d.db, func(tx *bolt.Tx) error {
		items = items[:0]
		dels := tx.Bucket(bktDeliveries)
		seq, ar, err := getAlert(tx, id)
		if err != nil {
			return err
		}
		if ar == nil {
			return fmt.Errorf("no alert with id %q", id)
		}
		keys := prefixKeys(tx.Bucket(bktFailed), seq)
		if len(keys) == 0 {
			return fmt.Errorf("alert %q has no failed delivery", id)
		}
		pl := d.buildPayload(ar)
		p := &pl
		for _, k := range keys {
			var dr deliveryRecord
			if _, err := getJSON(dels, k, &dr); err != nil {
				return err
			}
			if _, ok := d.byName[dr.Receiver]; !ok {
				return fmt.Errorf("alert %q: receiver %q is no longer configured", id, dr.Receiver)
			}
			dr.State, dr.NextTry = StatePending, now
			if err := putJSON(dels, k, dr); err != nil {
				return err
			}
			if err := setState(tx, k, StatePending); err != nil {
				return err
			}
			items = append(items, &item{key: string(k), alertID: id, receiver: dr.Receiver, next: now,
				attempts: dr.Attempts, created: dr.Created, payload: p})
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("alert: retry: %w", err)
	}
	for _, it := range items {
		q := d.queues[it.receiver]
		q.push(it)
		d.met.pending.WithLabelValues(it.receiver).Set(float64(q.len()))
	}
	return nil
}

// Recent returns up to n entries of the alert log written by "log" receivers,
// newest first (n <= 0: all kept entries).
func (d *Dispatcher) Recent(n int) []LogEntry { return d.alog.recent(n) }

// Receivers returns the configured receiver names in configuration order.
func (d *Dispatcher) Receivers() []string {
	out := make([]string, len(d.receivers))
	for i, r := range d.receivers {
		out[i] = r.name
	}
	return out
}
