package ingest

import (
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"iter"
	"log/slog"
	"math"
	"sync"
	"time"
)

// Message is one unit of input that is acknowledged as a whole, normally one
// MQTT message: its decoded readings, or the decode error that sends it to the
// dead-letter bucket.
type Message struct {
	Topic    string
	Payload  []byte    // kept only when the message is dead-lettered (first DeadLetterPayloadMax bytes)
	Recv     time.Time // receive time, UTC
	Readings []Reading
	Err      error  // decode error: the message is dead-lettered
	Reason   string // rejection label; "" means Reason(Err)
	// Redelivered is the MQTT DUP flag: the broker sent the message before.
	Redelivered bool
	Ack         func() // called once, after the message is durably handled; nil: nothing to acknowledge
}

// ErrCommitterClosed is returned by Enqueue once the committer drains for shutdown.
var ErrCommitterClosed = errors.New("committer: shutting down")

// Committer defaults.
const (
	DefaultCommitInterval = 5 * time.Millisecond
	DefaultCommitMax      = 5000
	backPressureLogEvery  = time.Minute
	rejectLogEvery        = 10 * time.Second
)

// CommitterOptions configure NewCommitter.
type CommitterOptions struct {
	Spool *Spool
	// QC flags readings before they are spooled (nil: a QualityControl with defaults).
	QC *QualityControl
	// DuplicateWindow is how many recent readings per sensor the exact-duplicate
	// memory keeps; use the QC duplicate window (<= 0: DefaultDuplicateWindow).
	DuplicateWindow int
	// Interval is the group-commit window: after the first message of a batch
	// arrives, the committer waits at most this long for more (<= 0: 5 ms).
	Interval time.Duration
	// Idle ends the wait early when no message arrived for this long
	// (<= 0: Interval/10). A full broker in-flight window arrives as one burst.
	Idle time.Duration
	// MaxReadings ends the wait once this many readings are queued, and bounds
	// one commit (whole messages; <= 0: 5000).
	MaxReadings int
	// QueueMax is how many readings may wait for the spool before Enqueue blocks
	// (<= 0: 20 × MaxReadings). The broker's in-flight window normally bounds
	// the queue long before.
	QueueMax int
	// Resolve maps a site as named by a source to the site id used for
	// quality control, storage and detection (nil: as is). It must be safe
	// for use from the committer goroutine.
	Resolve func(site string) string
	Logger  *slog.Logger
	Metrics *Metrics
	// OnCommit is called after each commit that added readings, with the last
	// sequence number, after the messages were acknowledged.
	OnCommit func(last uint64)
}

// Committer is the single goroutine that moves messages into the spool: it
// gathers what arrived within the commit window, runs quality control and
// the exact-duplicate check in arrival order, commits one bbolt transaction
// (one fsync), and only then acknowledges the messages, in order. When the
// spool is over its size limit it stops committing readings and therefore
// stops acknowledging: the broker keeps the messages (back-pressure).
type Committer struct {
	o     CommitterOptions
	spool *Spool
	log   *slog.Logger
	m     *Metrics

	mu      sync.Mutex
	queue   []*Message
	queued  int           // readings (at least 1 per message) in queue
	first   time.Time     // arrival of queue[0] when the queue was empty
	notify  chan struct{} // buffered(1): something was enqueued
	space   chan struct{} // closed and replaced when the queue shrinks
	closed  bool
	commErr error // last commit error (nil when the last commit succeeded)
	lastOK  time.Time
	bp      bool // back-pressure active

	stateMu sync.Mutex // QC, dups, lastSeq, dirty: held from QC to commit
	qc      *QualityControl
	dups    *dupMemory
	lastSeq uint64
	dirty   bool // QC ran on readings whose commit was abandoned

	// run-loop scratch
	entries  []Entry
	dead     []DeadLetter
	bpLog    time.Time
	bpLogged bool // the last back-pressure log line was "spool full"
	rl       rateLog
}

// NewCommitter returns a committer; call Restore (after a restart) and then Run.
func NewCommitter(o CommitterOptions) *Committer {
	if o.Interval <= 0 {
		o.Interval = DefaultCommitInterval
	}
	if o.Idle <= 0 {
		o.Idle = max(o.Interval/10, 50*time.Microsecond)
	}
	if o.MaxReadings <= 0 {
		o.MaxReadings = DefaultCommitMax
	}
	if o.QueueMax <= 0 {
		o.QueueMax = 20 * o.MaxReadings
	}
	if o.DuplicateWindow <= 0 {
		o.DuplicateWindow = DefaultDuplicateWindow
	}
	if o.Logger == nil {
		o.Logger = slog.New(slog.DiscardHandler)
	}
	if o.Metrics == nil {
		o.Metrics = NewMetrics(nil)
	}
	if o.QC == nil {
		o.QC = NewQualityControl(QCConfig{})
	}
	st, _ := o.Spool.Stats()
	return &Committer{
		o: o, spool: o.Spool, log: o.Logger, m: o.Metrics,
		notify: make(chan struct{}, 1), space: make(chan struct{}),
		qc: o.QC, dups: newDupMemory(o.DuplicateWindow), lastSeq: st.LastSeq,
		rl: rateLog{every: rejectLogEvery},
	}
}

// Enqueue hands a message to the committer. It blocks while QueueMax readings
// are waiting (back-pressure towards the broker connection) until ctx ends.
// After the committer began draining it returns ErrCommitterClosed and the
// message is not acknowledged (the broker redelivers it).
func (c *Committer) Enqueue(ctx context.Context, msg *Message) error {
	n := max(1, len(msg.Readings))
	for {
		c.mu.Lock()
		if c.closed {
			c.mu.Unlock()
			return ErrCommitterClosed
		}
		if c.queued+n <= c.o.QueueMax || len(c.queue) == 0 {
			if len(c.queue) == 0 {
				c.first = time.Now()
			}
			c.queue = append(c.queue, msg)
			c.queued += n
			c.m.AcksPending.Set(float64(len(c.queue)))
			c.mu.Unlock()
			select {
			case c.notify <- struct{}{}:
			default:
			}
			return nil
		}
		wait := c.space
		c.mu.Unlock()
		select {
		case <-wait:
		case <-ctx.Done():
			return ctx.Err()
		}
	}
}

// Pending returns the number of messages waiting for their acknowledgement.
func (c *Committer) Pending() int {
	c.mu.Lock()
	defer c.mu.Unlock()
	return len(c.queue)
}

// BackPressure reports whether the spool is full and acknowledgements stopped.
func (c *Committer) BackPressure() bool {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.bp
}

// CommitError returns the error of the last commit (nil after a success) and
// the time of the last successful commit.
func (c *Committer) CommitError() (error, time.Time) {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.commErr, c.lastOK
}

// LastSeq returns the last committed sequence number.
func (c *Committer) LastSeq() uint64 {
	c.stateMu.Lock()
	defer c.stateMu.Unlock()
	return c.lastSeq
}

// Run commits until ctx ends, then drains: Enqueue starts failing, what is
// queued is committed and acknowledged (unless the spool is full or failing,
// in which case those messages stay unacknowledged for the broker to
// redeliver), and Run returns nil. A non-nil error means a commit failed and
// shutdown abandoned it.
func (c *Committer) Run(ctx context.Context) error {
	for {
		if c.queueLen() == 0 {
			select {
			case <-c.notify:
			case <-ctx.Done():
				return c.drain()
			}
			c.linger(ctx)
		}
		if ctx.Err() != nil {
			return c.drain()
		}
		// With a backlog (messages arrived during the last commit) the next
		// commit starts at once: the group formed while the disk was busy.
		if _, err := c.commitOnce(ctx); err != nil {
			if ctx.Err() != nil {
				return c.drain()
			}
			return err
		}
	}
}

func (c *Committer) queueLen() int {
	c.mu.Lock()
	defer c.mu.Unlock()
	return len(c.queue)
}

// linger waits for the rest of a group: until Interval after the first
// message, MaxReadings queued, or Idle without a new arrival.
func (c *Committer) linger(ctx context.Context) {
	c.mu.Lock()
	deadline := c.first.Add(c.o.Interval)
	c.mu.Unlock()
	t := time.NewTimer(c.o.Idle)
	defer t.Stop()
	for {
		c.mu.Lock()
		full := c.queued >= c.o.MaxReadings
		c.mu.Unlock()
		rest := time.Until(deadline)
		if full || rest <= 0 {
			return
		}
		t.Reset(min(rest, c.o.Idle))
		select {
		case <-c.notify:
		case <-t.C:
			return
		case <-ctx.Done():
			return
		}
	}
}

// drain commits what is queued after shutdown began.
func (c *Committer) drain() error {
	c.mu.Lock()
	c.closed = true
	close(c.space) // wake Enqueue calls waiting for room: they return ErrCommitterClosed
	c.space = make(chan struct{})
	c.mu.Unlock()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
	defer cancel()
	for c.queueLen() > 0 {
		progressed, err := c.commitOnce(ctx)
		if err != nil {
			return err
		}
		if !progressed {
			break // spool full: leave the rest to the broker
		}
	}
	if n := c.queueLen(); n > 0 {
		c.log.Warn("shutdown with messages not acknowledged; the broker will redeliver them", "messages", n)
	}
	return nil
}

// commitOnce commits the head of the queue. progressed is false when nothing
// could be committed because the spool is full.
func (c *Committer) commitOnce(ctx context.Context) (progressed bool, err error) {
	c.mu.Lock()
	if len(c.queue) == 0 {
		c.mu.Unlock()
		return false, nil
	}
	freed := c.spool.Freed() // before measuring: a release after this wakes the wait below
	room := c.spool.Room()
	empty := c.spool.Empty()
	k, readings := 0, 0
	var need int64
	blocked := false
	for k < len(c.queue) && readings < c.o.MaxReadings {
		msg := c.queue[k]
		var sz int64
		for i := range msg.Readings {
			sz += entrySize(&msg.Readings[i])
		}
		if sz > 0 && need+sz > room && !(empty && k == 0) {
			blocked = true
			break
		}
		need += sz
		readings += len(msg.Readings)
		k++
	}
	batch := c.queue[:k]
	c.mu.Unlock()

	// Back-pressure is on while the head of the queue cannot be committed. (The
	// room check uses an upper bound of the encoded size, so a few smaller
	// commits usually fit before that.)
	c.setBackPressure(blocked && k == 0)
	if k == 0 {
		// Wait for the writer to free space, then let the caller retry.
		select {
		case <-freed:
		case <-time.After(time.Second):
		case <-ctx.Done():
		}
		return false, nil
	}

	c.stateMu.Lock()
	defer c.stateMu.Unlock()
	now := time.Now().UTC()
	entries, dead := c.entries[:0], c.dead[:0]
	dupN := 0
	for _, msg := range batch {
		if msg.Err != nil || msg.Reason != "" {
			dead = append(dead, c.deadLetter(msg, now))
			continue
		}
		for _, r := range msg.Readings {
			if c.o.Resolve != nil {
				r.Site = c.o.Resolve(r.Site)
			}
			pre := r.QC
			f := c.qc.Check(&r, msg.Recv)
			tracked := f&(QCFuture|QCUnknownDepth) == 0
			if f&QCDuplicate != 0 && c.dups.seen(&r) {
				dupN++
				c.log.Debug("exact duplicate reading dropped", "site", r.Site, "depth_m", r.Depth, "time", r.Time, "topic", msg.Topic)
				continue
			}
			if tracked {
				c.dups.remember(&r)
			}
			entries = append(entries, Entry{Recv: msg.Recv, PreQC: pre, Redelivered: msg.Redelivered, Reading: r})
		}
	}
	c.entries, c.dead = entries, dead

	start := time.Now()
	var last uint64
	var retry Retry
	for {
		last, err = c.spool.Commit(entries, dead)
		if err == nil {
			break
		}
		c.mu.Lock()
		c.commErr = err
		c.mu.Unlock()
		if retry.LogNow() {
			c.log.Error("spool commit failed; retrying, messages stay unacknowledged", "err", err, "readings", len(entries), "attempt", retry.Attempt())
		}
		if !retry.Wait(ctx) {
			c.dirty = true
			return false, fmt.Errorf("spool commit abandoned at shutdown: %w", err)
		}
	}
	c.m.CommitDuration.Observe(time.Since(start).Seconds())
	c.m.CommitReadings.Observe(float64(len(entries)))
	c.m.ReadingsCommitted.Add(float64(len(entries)))
	c.m.ReadingsDuplicate.Add(float64(dupN))
	for _, d := range dead {
		c.m.MessagesRejected.WithLabelValues(d.Reason).Inc()
	}
	if last > 0 {
		c.lastSeq = last
	}
	// Acknowledge in arrival order (MQTT 3.1.1 §4.6).
	for _, msg := range batch {
		if msg.Ack != nil {
			msg.Ack()
		}
	}
	c.mu.Lock()
	for i := range batch {
		c.queued -= max(1, len(batch[i].Readings))
		batch[i] = nil // batch aliases the head of the queue
	}
	c.queue = c.queue[k:]
	if len(c.queue) == 0 {
		c.queue = c.queue[:0:0]
	} else {
		c.first = time.Now()
	}
	c.commErr = nil
	c.lastOK = time.Now()
	close(c.space)
	c.space = make(chan struct{})
	c.m.AcksPending.Set(float64(len(c.queue)))
	c.mu.Unlock()
	clear(c.entries[:cap(c.entries)])
	if last > 0 && c.o.OnCommit != nil {
		c.o.OnCommit(last)
	}
	return true, nil
}

func (c *Committer) setBackPressure(on bool) {
	c.mu.Lock()
	was := c.bp
	c.bp = on
	c.mu.Unlock()
	if on {
		c.m.BackPressure.Set(1)
		if time.Since(c.bpLog) >= backPressureLogEvery {
			c.bpLog, c.bpLogged = time.Now(), true
			st, _ := c.spool.Stats()
			c.log.Error("spool full: messages are not acknowledged, the broker keeps them until the database catches up",
				"spool_bytes", st.Bytes, "spool_max_bytes", st.MaxBytes, "spool_readings", st.Pending,
				"acks_pending", c.Pending())
		}
		return
	}
	c.m.BackPressure.Set(0)
	if was && c.bpLogged {
		c.bpLogged = false
		c.log.Info("spool has room again: acknowledging messages", "spool_room_bytes", c.spool.Room())
	}
}

func (c *Committer) deadLetter(msg *Message, now time.Time) DeadLetter {
	reason := msg.Reason
	if reason == "" {
		reason = Reason(msg.Err)
	}
	detail := ""
	if msg.Err != nil {
		detail = msg.Err.Error()
	}
	p := msg.Payload
	if len(p) > DeadLetterPayloadMax {
		p = p[:DeadLetterPayloadMax]
	}
	if n, ok := c.rl.allow(reason, now); ok {
		c.log.Warn("message rejected to the dead-letter bucket", "reason", reason, "topic", clip(msg.Topic), "err", detail, "suppressed", n)
	}
	return DeadLetter{Time: now, Kind: DeadMessage, Topic: msg.Topic, Reason: reason, Detail: detail, Payload: append([]byte(nil), p...)}
}

// Snapshot returns the quality-control and duplicate memory and the last
// sequence number they include, for the detection checkpoint. It fails when a
// commit was abandoned after quality control ran (the memory is ahead of the
// spool): the previous checkpoint stays the valid one.
func (c *Committer) Snapshot() (qc, dups []byte, seq uint64, err error) {
	c.stateMu.Lock()
	defer c.stateMu.Unlock()
	if c.dirty {
		return nil, nil, 0, errors.New("committer: quality-control memory is ahead of the spool after an abandoned commit")
	}
	qc, err = c.qc.State()
	if err != nil {
		return nil, nil, 0, err
	}
	return qc, c.dups.state(), c.lastSeq, nil
}

// WriteState saves the quality-control and duplicate memory in per-site
// chunks for the detection checkpoint (see QualityControl.WriteStateChunks):
// only the sites whose memory changed since the previous call unless all is
// set; after a save that failed, call it with all set. It returns the last
// sequence number the memory includes. The committer waits while it runs
// (put should be quick: an in-memory insert). It fails, as Snapshot does,
// when a commit was abandoned after quality control ran.
func (c *Committer) WriteState(all bool, putQC, putDups ChunkFunc) (seq uint64, err error) {
	c.stateMu.Lock()
	defer c.stateMu.Unlock()
	if c.dirty {
		return 0, errors.New("committer: quality-control memory is ahead of the spool after an abandoned commit")
	}
	if err := c.qc.WriteStateChunks(all, putQC); err != nil {
		return 0, err
	}
	if err := c.dups.writeChunks(all, putDups); err != nil {
		return 0, err
	}
	return c.lastSeq, nil
}

// RestoreChunks is Restore for memory saved by WriteState: qc and dups yield
// (site, chunk) pairs (either may yield nothing: start empty).
func (c *Committer) RestoreChunks(qc, dups iter.Seq2[string, []byte], seq uint64) (replayed int, err error) {
	c.stateMu.Lock()
	if err := c.qc.RestoreChunks(qc); err != nil {
		c.stateMu.Unlock()
		return 0, err
	}
	if err := c.dups.restoreChunks(dups); err != nil {
		c.stateMu.Unlock()
		return 0, err
	}
	c.stateMu.Unlock()
	return c.Restore(nil, nil, seq)
}

// Restore loads memory saved by Snapshot (either may be nil: start empty) and
// replays the spooled readings after seq through quality control and the
// duplicate memory, so a message redelivered after a crash is recognised.
// Call it before Run.
func (c *Committer) Restore(qc, dups []byte, seq uint64) (replayed int, err error) {
	c.stateMu.Lock()
	defer c.stateMu.Unlock()
	if qc != nil {
		if err := c.qc.Restore(qc); err != nil {
			return 0, err
		}
	}
	if dups != nil {
		if err := c.dups.restore(dups); err != nil {
			return 0, err
		}
	}
	var buf []Entry
	after := seq
	for {
		buf, err = c.spool.ReadReadings(after, 4096, buf[:0])
		if err != nil {
			return replayed, err
		}
		if len(buf) == 0 {
			return replayed, nil
		}
		for i := range buf {
			e := &buf[i]
			r := e.Reading
			r.QC = e.PreQC
			f := c.qc.Check(&r, e.Recv)
			if f&(QCFuture|QCUnknownDepth) == 0 {
				c.dups.remember(&r)
			}
			after = e.Seq
			replayed++
		}
	}
}

// dupMemory remembers, per sensor (site and depth), a fingerprint of the
// sensor id, time and temperature of its most recent readings. Quality
// control already knows when a (site, depth, time) repeats; the fingerprint
// tells an exact repeat (a redelivered message: dropped) from a different
// value at the same time (stored with QCDuplicate). A 32-bit fingerprint can
// collide with odds of 2^-32 per repeated time: such a reading is dropped as
// a duplicate instead of being stored flagged.
type dupMemory struct {
	window int
	series map[dupKey]*dupRing
	// Change record for writeChunks, as in QualityControl.
	changed SiteChanges // sites whose saved memory is out of date
}

type dupKey struct {
	site  string
	depth uint64 // float64 bits
}

type dupRing struct {
	fp   []uint32
	head int
}

const (
	dupStateVersion = 1
	maxDupSeries    = maxSensors
)

func newDupMemory(window int) *dupMemory {
	return &dupMemory{window: min(window, maxDuplicateWindow), series: make(map[dupKey]*dupRing), changed: SiteChanges{all: true}}
}

func fingerprint(r *Reading) uint32 {
	h := uint64(14695981039346656037)
	for i := 0; i < len(r.Sensor); i++ {
		h ^= uint64(r.Sensor[i])
		h *= 1099511628211
	}
	h = mix64(h ^ uint64(r.Time.UnixNano()))
	h = mix64(h ^ math.Float64bits(r.TempC))
	return uint32(h ^ h>>32)
}

// mix64 is the splitmix64 finaliser.
func mix64(x uint64) uint64 {
	x ^= x >> 30
	x *= 0xbf58476d1ce4e5b9
	x ^= x >> 27
	x *= 0x94d049bb133111eb
	x ^= x >> 31
	return x
}

func (d *dupMemory) seen(r *Reading) bool {
	s := d.series[dupKey{r.Site, math.Float64bits(r.Depth)}]
	if s == nil {
		return false
	}
	fp := fingerprint(r)
	for _, x := range s.fp {
		if x == fp {
			return true
		}
	}
	return false
}

func (d *dupMemory) remember(r *Reading) {
	k := dupKey{r.Site, math.Float64bits(r.Depth)}
	s := d.series[k]
	if s == nil {
		if len(d.series) >= maxDupSeries {
			return
		}
		s = &dupRing{}
		d.series[k] = s
	}
	s.add(fingerprint(r), d.window)
	d.changed.Touch(r.Site)
}

func (s *dupRing) add(fp uint32, window int) {
	if len(s.fp) < window {
		s.fp = append(s.fp, fp)
		return
	}
	s.fp[s.head] = fp
	s.head = (s.head + 1) % len(s.fp)
}

// state encodes the memory: version, series count, then per series the site
// (uvarint length, bytes), the depth bits (8 bytes), the fingerprint count and
// the fingerprints, oldest first (4 bytes each). Order is map order: the
// encoding is not canonical.
func (d *dupMemory) state() []byte {
	n := 0
	for k, s := range d.series {
		n += len(k.site) + 16 + 4*len(s.fp)
	}
	b := make([]byte, 0, n+16)
	b = append(b, dupStateVersion)
	b = binary.AppendUvarint(b, uint64(len(d.series)))
	for k, s := range d.series {
		b = binary.AppendUvarint(b, uint64(len(k.site)))
		b = append(b, k.site...)
		b = binary.BigEndian.AppendUint64(b, k.depth)
		b = binary.AppendUvarint(b, uint64(len(s.fp)))
		for i := range s.fp {
			b = binary.BigEndian.AppendUint32(b, s.fp[(s.head+i)%len(s.fp)])
		}
	}
	return b
}

func (d *dupMemory) restore(b []byte) error {
	bad := errors.New("duplicate memory: truncated or corrupt state")
	if len(b) < 1 || b[0] != dupStateVersion {
		return fmt.Errorf("duplicate memory: state version %d, want %d", firstByte(b), dupStateVersion)
	}
	p := b[1:]
	uv := func() (uint64, bool) {
		x, k := binary.Uvarint(p)
		if k <= 0 {
			return 0, false
		}
		p = p[k:]
		return x, true
	}
	n, ok := uv()
	if !ok || n > maxDupSeries {
		return bad
	}
	series := make(map[dupKey]*dupRing, n)
	for range n {
		l, ok := uv()
		if !ok || l > uint64(len(p)) {
			return bad
		}
		site := string(p[:l])
		p = p[l:]
		if len(p) < 8 {
			return bad
		}
		k := dupKey{site: site, depth: binary.BigEndian.Uint64(p)}
		p = p[8:]
		m, ok := uv()
		if !ok || m > uint64(len(p))/4 {
			return bad
		}
		s := &dupRing{}
		for i := uint64(0); i < m; i++ {
			if m-i <= uint64(d.window) {
				s.add(binary.BigEndian.Uint32(p[4*i:]), d.window)
			}
		}
		p = p[4*m:]
		series[k] = s
	}
	d.series = series
	d.changed.SetAll()
	return nil
}

// dupChunkVersion is the first byte of a per-site duplicate-memory chunk.
const dupChunkVersion = 2

// writeChunks encodes, per site whose memory changed since the last call
// (every site with all set), the version byte, the series count and per
// series the depth bits (8 bytes), the fingerprint count (uvarint) and the
// fingerprints oldest first (4 bytes each), series in depth-bit order; it
// calls put once per site, sites in ascending order.
func (d *dupMemory) writeChunks(all bool, put ChunkFunc) error {
	changed := d.changed.Take(all)
	bySite := make(map[string][]chunkEntry[uint64, *dupRing])
	for k, r := range d.series {
		if changed.Has(k.site) {
			bySite[k.site] = append(bySite[k.site], chunkEntry[uint64, *dupRing]{k.depth, r})
		}
	}
	return writeSiteChunks("duplicate memory", dupChunkVersion, bySite, func(b []byte, depth uint64, r *dupRing) []byte {
		b = binary.BigEndian.AppendUint64(b, depth)
		b = binary.AppendUvarint(b, uint64(len(r.fp)))
		for i := range r.fp {
			b = binary.BigEndian.AppendUint32(b, r.fp[(r.head+i)%len(r.fp)])
		}
		return b
	}, put)
}

// restoreChunks replaces the memory with chunks written by writeChunks
// (unchanged on error).
func (d *dupMemory) restoreChunks(chunks iter.Seq2[string, []byte]) error {
	series := make(map[dupKey]*dupRing)
	for site, b := range chunks {
		if len(b) < 1 || b[0] != dupChunkVersion {
			return fmt.Errorf("duplicate memory: site %q: chunk version %d, want %d", site, firstByte(b), dupChunkVersion)
		}
		r := &chunkReader{p: b[1:]}
		n := r.uvarint(uint64(len(b)))
		for i := 0; i < n && !r.bad; i++ {
			if len(series) >= maxDupSeries {
				return fmt.Errorf("duplicate memory: more than %d series", maxDupSeries)
			}
			if len(r.p) < 8 {
				r.bad = true
				break
			}
			k := dupKey{site: site, depth: binary.BigEndian.Uint64(r.p)}
			r.p = r.p[8:]
			m := r.uvarint(uint64(len(r.p)) / 4)
			if r.bad {
				break
			}
			s := &dupRing{}
			for j := 0; j < m; j++ {
				if m-j <= d.window {
					s.add(binary.BigEndian.Uint32(r.p[4*j:]), d.window)
				}
			}
			r.p = r.p[4*m:]
			if _, dup := series[k]; dup {
				return fmt.Errorf("duplicate memory: site %q: a series listed twice", site)
			}
			series[k] = s
		}
		if r.bad || len(r.p) != 0 {
			return fmt.Errorf("duplicate memory: site %q: truncated or corrupt chunk", site)
		}
	}
	d.series = series
	d.changed.SetAll()
	return nil
}

// rateLog lets one log line per key through every interval and counts the rest.
type rateLog struct {
	mu    sync.Mutex // the writer's batches in flight log concurrently
	every time.Duration
	last  map[string]time.Time
	supp  map[string]int
}

func (l *rateLog) allow(key string, now time.Time) (suppressed int, ok bool) {
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.last == nil {
		l.last, l.supp = make(map[string]time.Time), make(map[string]int)
	}
	if t, seen := l.last[key]; seen && now.Sub(t) < l.every {
		l.supp[key]++
		return 0, false
	}
	n := l.supp[key]
	l.last[key], l.supp[key] = now, 0
	return n, true
}
