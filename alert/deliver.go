package alert

import (
	"container/heap"
	"context"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"sync"
	"time"

	bolt "go.etcd.io/bbolt"

	"holomix/detect"
)

// item is one pending delivery in a receiver's queue.
type item struct {
	key      string // alert id NUL receiver
	alertID  string
	receiver string
	next     time.Time
	attempts int
	created  time.Time
	payload  *Payload // shared, read-only; nil: load from bolt
	seq      uint64
	index    int
}

type itemHeap []*item

func (h itemHeap) Len() int { return len(h) }
func (h itemHeap) Less(i, j int) bool {
	if !h[i].next.Equal(h[j].next) {
		return h[i].next.Before(h[j].next)
	}
	return h[i].seq < h[j].seq
}
func (h itemHeap) Swap(i, j int) { h[i], h[j] = h[j], h[i]; h[i].index = i; h[j].index = j }
func (h *itemHeap) Push(x any) {
	it := x.(*item)
	it.index = len(*h)
	*h = append(*h, it)
}
func (h *itemHeap) Pop() any {
	old := *h
	it := old[len(old)-1]
	old[len(old)-1] = nil
	*h = old[:len(old)-1]
	return it
}

// queue holds one receiver's pending deliveries ordered by next attempt time.
// A key stays known from push until done, also while its attempt is in flight,
// so the same delivery is never attempted twice at once.
type queue struct {
	mu   sync.Mutex
	h    itemHeap
	keys map[string]bool
	seq  uint64
	wake chan struct{}
}

func newQueue() *queue {
	return &queue{keys: map[string]bool{}, wake: make(chan struct{}, 1)}
}

func (q *queue) signal() {
	select {
	case q.wake <- struct{}{}:
	default:
	}
}

// push adds a delivery unless it is already queued or in flight.
func (q *queue) push(it *item) {
	q.mu.Lock()
	if q.keys[it.key] {
		q.mu.Unlock()
		return
	}
	q.keys[it.key] = true
	q.seq++
	it.seq = q.seq
	heap.Push(&q.h, it)
	q.mu.Unlock()
	q.signal()
}

// requeue puts an in-flight delivery back for a later attempt.
func (q *queue) requeue(it *item) {
	q.mu.Lock()
	q.seq++
	it.seq = q.seq
	heap.Push(&q.h, it)
	q.mu.Unlock()
	q.signal()
}

// done forgets a delivery that was delivered or failed.
func (q *queue) done(key string) {
	q.mu.Lock()
	delete(q.keys, key)
	q.mu.Unlock()
}

// next pops the earliest delivery if it is due; otherwise it returns the wait
// until the earliest is due (-1: the queue is empty).
func (q *queue) next(now time.Time) (*item, time.Duration) {
	q.mu.Lock()
	defer q.mu.Unlock()
	if len(q.h) == 0 {
		return nil, -1
	}
	if w := q.h[0].next.Sub(now); w > 0 {
		return nil, w
	}
	return heap.Pop(&q.h).(*item), 0
}

// take removes a queued (not in-flight) delivery by key.
func (q *queue) take(key string) *item {
	q.mu.Lock()
	defer q.mu.Unlock()
	for i, it := range q.h {
		if it.key == key {
			heap.Remove(&q.h, i)
			return it
		}
	}
	return nil
}

// len counts queued and in-flight deliveries.
func (q *queue) len() int {
	q.mu.Lock()
	defer q.mu.Unlock()
	return len(q.keys)
}

// result is the outcome of one attempt, written to bolt by the committer.
type result struct {
	key       string
	state     string
	attempts  int
	lastTry   time.Time
	nextTry   time.Time
	status    int
	errText   string
	excerpt   string
	delivered time.Time
}

// backoff is the wait before retry number n (n ≥ 1, counting failed attempts):
// 1 s·2^(n-1), capped at 10 min, with ±20 % uniform jitter. jitter is in [0, 1).
func backoff(n int, jitter float64) time.Duration {
	if n < 1 {
		n = 1
	}
	d := backoffCap
	if n-1 < 30 {
		d = min(backoffBase*time.Duration(1<<(n-1)), backoffCap)
	}
	f := 1 + backoffJitter*(2*jitter-1)
	return time.Duration(math.Round(float64(d) * f))
}

// attempt makes one delivery attempt and decides what happens next. abandoned
// is true when the attempt was cut short by shutdown: nothing is recorded and
// the delivery stays pending in bolt.
func (d *Dispatcher) attempt(ctx context.Context, r *receiver, it *item) (res result, abandoned bool) {
	if it.payload == nil {
		ar := new(alertRecord)
		err := d.db.View(func(tx *bolt.Tx) error {
			seq, _ := splitDeliveryKey([]byte(it.key))
			ok, err := getJSON(tx.Bucket(bktAlerts), seq, ar)
			return errors.Join(err, errMissing(ok))
		})
		if err != nil {
			// The alert cannot be read: retrying cannot help.
			d.log.Error("alert record unreadable; delivery failed", "id", it.alertID, "receiver", r.name, "error", err)
			return result{key: it.key, state: StateFailed, attempts: it.attempts, lastTry: d.now().UTC(),
				errText: fmt.Sprintf("alert record unreadable: %v", err)}, false
		}
		p := d.buildPayload(ar)
		it.payload = &p
	}
	now := d.now().UTC()
	p := *it.payload
	p.SentAt = now.Truncate(time.Second)
	actx, cancel := context.WithTimeout(ctx, r.timeout)
	retry, err := r.notifier.Notify(actx, Notification{MessageID: webhookID(it.alertID, r.name), Payload: p, Attempt: it.attempts + 1})
	cancel()
	if err != nil && ctx.Err() != nil {
		return result{}, true
	}
	res = result{key: it.key, attempts: it.attempts + 1, lastTry: now}
	if err == nil {
		res.state, res.delivered = StateDelivered, d.now().UTC()
		return res, false
	}
	res.errText = err.Error()
	var ra time.Duration
	if he, ok := asHTTPError(err); ok {
		res.status, res.excerpt, ra = he.StatusCode, he.Body, he.RetryAfter
	} else if errors.Is(err, context.DeadlineExceeded) {
		res.errText = fmt.Sprintf("no answer within %s: %v", r.timeout, err)
	}
	if !retry {
		res.state = StateFailed
		return res, false
	}
	wait := ra
	if wait <= 0 {
		wait = backoff(res.attempts, rand.Float64())
	}
	res.state, res.nextTry = StatePending, now.Add(wait)
	return res, false
}

// worker delivers one receiver's queue until ctx is done.
func (d *Dispatcher) worker(ctx context.Context, r *receiver, results chan<- result) {
	q := d.queues[r.name]
	for {
		if ctx.Err() != nil {
			return
		}
		it, wait := q.next(d.now())
		if it == nil {
			var tc <-chan time.Time
			stop := func() bool { return false }
			if wait >= 0 {
				tc, stop = d.after(wait)
			}
			select {
			case <-ctx.Done():
				stop()
				return
			case <-q.wake:
			case <-tc:
			}
			stop()
			continue
		}
		res, abandoned := d.attempt(ctx, r, it)
		if abandoned {
			q.requeue(it) // still pending in bolt; picked up by the next Run
			return
		}
		if d.hooks.afterSend != nil && !d.hooks.afterSend(it.alertID, r.name) {
			q.done(it.key) // simulated crash: the result is lost, bolt still says pending
			continue
		}
		d.account(r, it, res)
		switch res.state {
		case StatePending:
			it.attempts, it.next = res.attempts, res.nextTry
			q.requeue(it)
		default:
			q.done(it.key)
		}
		d.met.pending.WithLabelValues(r.name).Set(float64(q.len()))
		results <- res // the committer reads until Run closes the channel
	}
}

// Outcome is what became of one delivery attempt, for observers such as the status page.
type Outcome struct {
	Time      time.Time // wall-clock time of the attempt (UTC)
	Receiver  string
	AlertID   string
	SiteID    string
	Kind      string
	Status    string // firing, resolved, reminder, update
	EventTime time.Time
	Summary   string
	State     string // delivered, pending (will retry) or failed
	Error     string
}

// account updates metrics and logs for one attempt and tells Options.OnOutcome.
func (d *Dispatcher) account(r *receiver, it *item, res result) {
	if d.onOutcome != nil && it.payload != nil {
		p := it.payload
		d.onOutcome(Outcome{Time: res.lastTry, Receiver: r.name, AlertID: it.alertID, SiteID: p.Site.ID, Kind: string(p.Kind),
			Status: string(p.Status), EventTime: p.EventTime, Summary: p.Summary, State: res.state, Error: res.errText})
	}
	attrs := []any{"receiver", r.name, "id", it.alertID, "attempt", res.attempts}
	switch res.state {
	case StateDelivered:
		d.met.delivered.WithLabelValues(r.name).Inc()
		d.met.latency.WithLabelValues(r.name).Observe(res.delivered.Sub(it.created).Seconds())
		d.log.Debug("alert delivered", attrs...)
	case StatePending:
		d.met.retried.WithLabelValues(r.name).Inc()
		d.log.Warn("alert delivery failed; will retry", append(attrs, "status", res.status, "next_try", res.nextTry, "error", res.errText)...)
	case StateFailed:
		d.met.failed.WithLabelValues(r.name).Inc()
		d.log.Error("alert delivery failed; not retrying", append(attrs, "status", res.status, "error", res.errText)...)
	}
}

// committer writes attempt results to bolt in groups: after the first result
// it gathers more for up to commitLinger (or maxGroup results), so a busy
// outbox makes few fsyncs. It runs until results is closed and drained. A
// result not yet written when the process dies only causes a resend with the
// same webhook-id.
func (d *Dispatcher) committer(results <-chan result) {
	const maxGroup = 2048
	batch := make([]result, 0, maxGroup)
	for res := range results {
		batch = append(batch[:0], res)
		linger := time.NewTimer(commitLinger)
	more:
		for len(batch) < maxGroup {
			select {
			case r, ok := <-results:
				if !ok {
					break more
				}
				batch = append(batch, r)
			case <-linger.C:
				break more
			}
		}
		linger.Stop()
		if err := writeTx(d.db, func(tx *bolt.Tx) error { return writeResults(tx, batch) }); err != nil {
			// The deliveries stay pending in bolt: they will be retried after a
			// restart (possibly a duplicate with the same webhook-id).
			d.log.Error("writing delivery results to the outbox failed", "count", len(batch), "error", err)
		}
	}
}

func writeResults(tx *bolt.Tx, rs []result) error {
	dels := tx.Bucket(bktDeliveries)
	for _, r := range rs {
		k := []byte(r.key)
		var dr deliveryRecord
		ok, err := getJSON(dels, k, &dr)
		if err != nil {
			return err
		}
		if !ok {
			continue // pruned meanwhile
		}
		dr.State, dr.Attempts, dr.LastTry, dr.LastStatus, dr.LastError = r.state, r.attempts, r.lastTry, r.status, r.errText
		dr.Excerpt = r.excerpt
		if r.state == StatePending {
			dr.NextTry = r.nextTry
		}
		if r.state == StateDelivered {
			dr.Delivered, dr.LastError, dr.Excerpt = r.delivered, "", ""
		}
		if err := putJSON(dels, k, dr); err != nil {
			return err
		}
		if err := setState(tx, k, r.state); err != nil {
			return err
		}
	}
	return nil
}

// housekeeping sends due reminders every minute and prunes once a day.
func (d *Dispatcher) housekeeping(ctx context.Context) {
	var lastPrune time.Time
	for {
		now := d.now()
		if err := d.remind(now); err != nil {
			d.log.Error("reminders", "error", err)
		}
		if lastPrune.IsZero() || now.Sub(lastPrune) >= 24*time.Hour {
			if n, err := d.prune(now); err != nil {
				d.log.Error("pruning the outbox", "error", err)
			} else if n > 0 {
				d.log.Info("pruned delivered alerts from the outbox", "count", n)
			}
			lastPrune = now
		}
		tc, stop := d.after(housekeepingTick)
		select {
		case <-ctx.Done():
			stop()
			return
		case <-tc:
		}
	}
}

// DeliverNow makes one attempt now for each pending delivery of alert id and
// records the outcome; it is for use without a running dispatcher (the
// `holomix alerts retry` command) and refuses while Run is active.
func (d *Dispatcher) DeliverNow(ctx context.Context, id string) ([]Delivery, error) {
	release, err := d.acquire("deliver now")
	if err != nil {
		return nil, err
	}
	defer release()
	d.mu.Lock()
	running := d.running
	d.mu.Unlock()
	if running {
		return nil, errors.New("alert: deliver now: the dispatcher is running; its workers deliver the alert")
	}
	var seq []byte
	if err := d.db.View(func(tx *bolt.Tx) error { seq = alertSeq(tx, id); return nil }); err != nil {
		return nil, fmt.Errorf("alert: deliver now: %w", err)
	}
	if seq == nil {
		return nil, fmt.Errorf("alert: deliver now: no alert with id %q", id)
	}
	var out []Delivery
	for _, r := range d.receivers {
		key := string(deliveryKey(seq, r.name))
		q := d.queues[r.name]
		it := q.take(key)
		if it == nil {
			continue
		}
		res, abandoned := d.attempt(ctx, r, it)
		if abandoned {
			q.requeue(it)
			return out, fmt.Errorf("alert: deliver now: %w", ctx.Err())
		}
		d.account(r, it, res)
		if res.state == StatePending {
			it.attempts, it.next = res.attempts, res.nextTry
			q.requeue(it)
		} else {
			q.done(it.key)
		}
		if err := writeTx(d.db, func(tx *bolt.Tx) error { return writeResults(tx, []result{res}) }); err != nil {
			return out, fmt.Errorf("alert: deliver now: record result: %w", err)
		}
		var dr deliveryRecord
		var ar alertRecord
		if err := d.db.View(func(tx *bolt.Tx) error {
			_, err := getJSON(tx.Bucket(bktDeliveries), []byte(key), &dr)
			if err != nil {
				return err
			}
			_, err = getJSON(tx.Bucket(bktAlerts), seq, &ar)
			return err
		}); err != nil {
			return out, fmt.Errorf("alert: deliver now: %w", err)
		}
		out = append(out, d.deliveryView(dr, &ar))
	}
	if len(out) == 0 {
		return nil, fmt.Errorf("alert: deliver now: alert %q has no pending delivery", id)
	}
	return out, nil
}

// SendTest sends a signed test alert to one receiver, bypassing the outbox,
// and returns the HTTP status of the answer (0 for a log receiver).
func (d *Dispatcher) SendTest(ctx context.Context, receiverName string) (int, error) {
	release, err := d.acquire("test")
	if err != nil {
		return 0, err
	}
	defer release()
	r, ok := d.byName[receiverName]
	if !ok {
		return 0, fmt.Errorf("alert: test: no receiver named %q (configured: %v)", receiverName, d.Receivers())
	}
	now := d.now().UTC().Truncate(time.Second)
	ev := detect.Event{Time: now, Site: "test", Kind: "test", Status: detect.StatusFiring, Severity: "info",
		Summary: "Test message; no action needed.", Confidence: "test", Metrics: []detect.Metric{}}
	epID := EpisodeID("test", "test", receiverName, now)
	aid := AlertID(epID, detect.StatusFiring, "test")
	p := d.buildPayload(&alertRecord{ID: aid, EpisodeID: epID, Status: detect.StatusFiring, Event: ev, Onset: now})
	p.Site = SiteRef{ID: "test", Name: "holomix test"}
	p.Summary = fmt.Sprintf("Test alert from holomix to receiver %q at %s: delivery works if you can read this.", receiverName, formatTime(now, nil))
	p.Text = p.Summary + "\n\nThis is a test message. It is not about any lake; no action is needed."
	p.Link = siteLink(d.statusURL, "test")
	p.SentAt = now
	actx, cancel := context.WithTimeout(ctx, r.timeout)
	defer cancel()
	n := Notification{MessageID: webhookID(aid, r.name), Payload: p, Attempt: 1}
	if w, ok := r.notifier.(*webhookNotifier); ok {
		status, _, err := w.post(actx, n)
		if err != nil {
			return status, fmt.Errorf("alert: test %s: %w", receiverName, err)
		}
		return status, nil
	}
	if _, err := r.notifier.Notify(actx, n); err != nil {
		return 0, fmt.Errorf("alert: test %s: %w", receiverName, err)
	}
	return 0, nil
}
