package ingest

import (
	"context"
	"crypto/tls"
	"errors"
	"fmt"
	"hash/maphash"
	"log/slog"
	"math/rand/v2"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"time"

	influxdb2 "github.com/influxdata/influxdb-client-go/v2"
	"github.com/influxdata/influxdb-client-go/v2/api"
	ihttp "github.com/influxdata/influxdb-client-go/v2/api/http"
)

// Measurement and schema of stored readings:
//
//	water_temperature,depth_m=<depth>,sensor=<sensor>,site=<site> qc=<flags>i,temp_c=<°C> <time ns>
//
// depth_m is the depth formatted canonically (strconv.FormatFloat(d, 'f', -1, 64):
// 5, 0.5, 12.25), sensor is present only when the reading names one, qc is the
// QC bit set (reading.go) as an integer.
//
// InfluxDB keeps one point per series (measurement + tag set) and timestamp: a
// second write with the same tags and time REPLACES the field values. Exact
// duplicates are therefore never written twice (the committer drops them), and
// a reading with the same site, depth, sensor and time but a different value
// replaces the stored one, flagged QCDuplicate.
const (
	MeasurementReadings = "water_temperature"
	DefaultBatchSize    = 5000
	DefaultInFlight     = 2
	defaultWriteTimeout = 10 * time.Second
	defaultBackoffMin   = 250 * time.Millisecond
	defaultBackoffMax   = 30 * time.Second
	pingEvery           = 10 * time.Second
	// maxSplitRequests bounds the extra requests spent isolating the points a
	// database refused in one batch; beyond it the rest of a refused part is
	// dead-lettered whole.
	maxSplitRequests = 64
)

// WriterOptions configure NewWriter.
type WriterOptions struct {
	Spool *Spool
	// URL of the database (http://127.0.0.1:8086). InfluxDB 1.8: Bucket is
	// "database/retention" and Token "user:password" (":" without auth), Org is
	// ignored. InfluxDB 2.x/3.x: Org, Bucket and an API token.
	URL, Org, Bucket, Token string
	TLS                     *tls.Config
	// Timeout of one write request (<= 0: 10 s).
	Timeout time.Duration
	// BatchSize is the number of points per request (<= 0: 5000).
	BatchSize int
	// InFlight is the number of reading batches written at once (<= 0: 2):
	// the next batch is read and sent while the database still works on the
	// previous one. Batches are marked written in sequence order, and a batch
	// that rewrites a point (same series and time) of a batch still in
	// flight waits for it, so the later value always wins.
	InFlight int
	// BackoffMin and BackoffMax bound the retry delay (exponential, full
	// jitter; defaults 250 ms and 30 s).
	BackoffMin, BackoffMax time.Duration
	HTTPClient             *http.Client
	Logger                 *slog.Logger
	Metrics                *Metrics
}

// Writer moves spooled readings and derived points into InfluxDB, in sequence
// order, through the blocking write API of influxdb-client-go. A failed
// request is retried with exponential backoff and jitter (never dropped);
// points the database refuses as bad data (HTTP 400, 422) are isolated by
// splitting the batch and go to the dead-letter bucket, so one bad point
// never blocks the queue.
type Writer struct {
	o      WriterOptions
	spool  *Spool
	client influxdb2.Client
	api    api.WriteAPIBlocking
	log    *slog.Logger
	m      *Metrics
	wake   chan struct{}

	// run-loop state (one goroutine at a time: Run, then Flush)
	cursor  uint64 // last reading written and marked
	dcursor uint64
	derived []DerivedPoint
	free    []*flight // flights to reuse
	seed    maphash.Seed
	rl      rateLog

	mu        sync.Mutex
	reachable bool
	known     bool // reachable has been determined
	lastErr   error
	lastOK    time.Time
}

// NewWriter returns a writer that resumes at the spool's cursors.
func NewWriter(o WriterOptions) (*Writer, error) {
	if o.URL == "" {
		return nil, errors.New("writer: no database URL")
	}
	if o.Bucket == "" {
		return nil, errors.New("writer: no bucket (InfluxDB 1.8: \"database/retention\")")
	}
	if o.Timeout <= 0 {
		o.Timeout = defaultWriteTimeout
	}
	if o.BatchSize <= 0 {
		o.BatchSize = DefaultBatchSize
	}
	if o.InFlight <= 0 {
		o.InFlight = DefaultInFlight
	}
	if o.BackoffMin <= 0 {
		o.BackoffMin = defaultBackoffMin
	}
	if o.BackoffMax <= 0 {
		o.BackoffMax = defaultBackoffMax
	}
	if o.Logger == nil {
		o.Logger = slog.New(slog.DiscardHandler)
	}
	if o.Metrics == nil {
		o.Metrics = NewMetrics(nil)
	}
	opts := influxdb2.DefaultOptions().
		SetHTTPRequestTimeout(uint(max(1, o.Timeout.Round(time.Second)/time.Second))).
		SetPrecision(time.Nanosecond)
	if o.TLS != nil {
		opts.SetTLSConfig(o.TLS)
	}
	if o.HTTPClient != nil {
		opts.SetHTTPClient(o.HTTPClient)
	}
	client := influxdb2.NewClientWithOptions(o.URL, o.Token, opts)
	st, err := o.Spool.Stats()
	if err != nil {
		client.Close()
		return nil, err
	}
	w := &Writer{
		o: o, spool: o.Spool, client: client, api: client.WriteAPIBlocking(o.Org, o.Bucket),
		log: o.Logger, m: o.Metrics, wake: make(chan struct{}, 1),
		cursor: st.Written, rl: rateLog{every: rejectLogEvery}, seed: maphash.MakeSeed(),
	}
	w.dcursor = w.spoolDerivedCursor()
	return w, nil
}

func (w *Writer) spoolDerivedCursor() uint64 {
	w.spool.mu.Lock()
	defer w.spool.mu.Unlock()
	return w.spool.meta.dWritten
}

// Close releases the HTTP client.
func (w *Writer) Close() { w.client.Close() }

// Notify wakes the writer (after a commit).
func (w *Writer) Notify() {
	select {
	case w.wake <- struct{}{}:
	default:
	}
}

// Reachable reports whether the last database request succeeded; known is
// false before the first request.
func (w *Writer) Reachable() (reachable, known bool, lastErr error, lastOK time.Time) {
	w.mu.Lock()
	defer w.mu.Unlock()
	return w.reachable, w.known, w.lastErr, w.lastOK
}

func (w *Writer) setReachable(ok bool, err error) {
	w.mu.Lock()
	w.reachable, w.known = ok, true
	if ok {
		w.lastErr, w.lastOK = nil, time.Now()
	} else {
		w.lastErr = err
	}
	w.mu.Unlock()
	if ok {
		w.m.DBReachable.Set(1)
	} else {
		w.m.DBReachable.Set(0)
	}
}

// Run writes until ctx ends. It returns nil on cancellation and an error only
// when the spool fails; a full storage disk (ENOSPC, EDQUOT) is not a
// failure: the step is retried after a pause until space returns (a batch
// written but not yet marked is written again; its points overwrite
// themselves in the database).
func (w *Writer) Run(ctx context.Context) error {
	idle := time.NewTimer(time.Second)
	defer idle.Stop()
	lastPing := time.Time{}
	var full Retry
	for {
		n, err := w.pump(ctx, true)
		if ctx.Err() != nil {
			return nil
		}
		if DiskFull(err) {
			if full.LogNow() {
				w.log.Error("storage disk full: the database writer waits for space", "err", err, "attempt", full.Attempt())
			}
			if !full.Wait(ctx) {
				return nil
			}
			continue
		}
		full.Reset()
		if err != nil {
			return err
		}
		if n > 0 {
			continue
		}
		if r, known, _, _ := w.Reachable(); (!known || !r) && time.Since(lastPing) >= pingEvery {
			lastPing = time.Now()
			w.ping(ctx)
		}
		idle.Reset(time.Second)
		select {
		case <-ctx.Done():
			return nil
		case <-w.wake:
		case <-idle.C:
		}
	}
}

func (w *Writer) ping(ctx context.Context) {
	pctx, cancel := context.WithTimeout(ctx, 2*time.Second)
	defer cancel()
	ok, err := w.client.Ping(pctx)
	if ctx.Err() != nil {
		return
	}
	if err == nil && !ok {
		err = errors.New("ping: not ready")
	}
	w.setReachable(err == nil, err)
}

// Flush writes what is pending without retrying (a failure returns the
// error); used at shutdown within ctx's deadline.
func (w *Writer) Flush(ctx context.Context) error {
	for {
		n, err := w.pump(ctx, false)
		if err != nil {
			return err
		}
		if n == 0 {
			return nil
		}
	}
}

// flight is one batch of readings on its way to the database.
type flight struct {
	entries []Entry
	buf     []byte
	keys    map[uint64]struct{} // series and time of each point (hashed)
	last    uint64              // sequence of the last reading
	stored  int
	err     error
	done    chan struct{}
}

// pointKey identifies a stored point: InfluxDB keeps one per series and time.
type pointKey struct {
	site, sensor string
	depth        float64
	time         int64
}

// pump writes the spooled readings after w.cursor, up to o.InFlight batches
// at once, marking each written in sequence order as it completes, and the
// derived points that may follow them; n is the number of points handled
// (0: nothing was pending). On an error it waits for the batches still in
// flight and returns; batches not yet marked are sent again next time (their
// points overwrite themselves in the database).
func (w *Writer) pump(ctx context.Context, retry bool) (n int, err error) {
	var q []*flight
	var held *flight // read, but it rewrites a point of a batch in flight
	defer func() {
		for _, f := range q {
			<-f.done
			w.release(f)
		}
		if held != nil {
			w.release(held)
		}
	}()
	sent := w.cursor
	for {
		for len(q) < w.o.InFlight {
			f := held
			held = nil
			if f == nil {
				if f, err = w.prepare(sent); err != nil {
					return n, err
				}
				if f == nil {
					break
				}
			}
			if w.clashes(f, q) {
				held = f
				break
			}
			sent = f.last
			q = append(q, f)
			go func() {
				defer close(f.done)
				body := string(f.buf[:len(f.buf)-1])
				f.stored, f.err = w.deliver(ctx, body, len(f.entries), MeasurementReadings, retry)
			}()
		}
		if len(q) == 0 {
			m, err := w.writeDerived(ctx, retry)
			return n + m, err
		}
		f := q[0]
		<-f.done
		q = q[1:]
		if f.err != nil {
			w.release(f)
			return n, f.err
		}
		if err := w.spool.MarkWritten(f.last); err != nil {
			w.release(f)
			return n, err
		}
		w.cursor = f.last
		w.m.ReadingsStored.Add(float64(f.stored))
		n += len(f.entries)
		w.release(f)
		m, err := w.writeDerived(ctx, retry)
		n += m
		if err != nil {
			return n, err
		}
	}
}

// prepare reads the batch after seq and encodes it (nil: nothing pending).
func (w *Writer) prepare(seq uint64) (*flight, error) {
	var f *flight
	if k := len(w.free); k > 0 {
		f, w.free = w.free[k-1], w.free[:k-1]
	} else {
		f = &flight{}
	}
	var err error
	f.entries, err = w.spool.ReadReadings(seq, w.o.BatchSize, f.entries[:0])
	if err != nil || len(f.entries) == 0 {
		w.release(f)
		return nil, err
	}
	f.buf = f.buf[:0]
	for i := range f.entries {
		f.buf = AppendLineProtocol(f.buf, &f.entries[i].Reading)
	}
	f.last = f.entries[len(f.entries)-1].Seq
	f.stored, f.err, f.done = 0, nil, make(chan struct{})
	if w.o.InFlight > 1 {
		if f.keys == nil {
			f.keys = make(map[uint64]struct{}, len(f.entries))
		}
		clear(f.keys)
		for i := range f.entries {
			r := &f.entries[i].Reading
			f.keys[maphash.Comparable(w.seed, pointKey{r.Site, r.Sensor, r.Depth, r.Time.UnixNano()})] = struct{}{}
		}
	}
	return f, nil
}

// clashes reports whether f writes a point (series and time) that a batch
// in q also writes: f must then wait, so that the later value wins. A hash
// collision only costs that wait.
func (w *Writer) clashes(f *flight, q []*flight) bool {
	for _, o := range q {
		small, big := f.keys, o.keys
		if len(small) > len(big) {
			small, big = big, small
		}
		for k := range small {
			if _, ok := big[k]; ok {
				return true
			}
		}
	}
	return false
}

func (w *Writer) release(f *flight) {
	clear(f.entries)
	f.entries = f.entries[:0]
	if len(w.free) < w.o.InFlight+1 {
		w.free = append(w.free, f)
	}
}

// writeDerived writes one batch of the derived points whose readings are
// written (a derived point waits for the readings it must follow: a late
// reading's flagged copy must land after the reading itself).
func (w *Writer) writeDerived(ctx context.Context, retry bool) (n int, err error) {
	w.derived, err = w.spool.ReadDerived(w.dcursor, w.cursor, w.o.BatchSize, w.derived[:0])
	if err != nil || len(w.derived) == 0 {
		return 0, err
	}
	var b strings.Builder
	for i := range w.derived {
		if i > 0 {
			b.WriteByte('\n')
		}
		b.Write(w.derived[i].Line)
	}
	stored, err := w.deliver(ctx, b.String(), len(w.derived), "derived", retry)
	if err != nil {
		return 0, err
	}
	last := w.derived[len(w.derived)-1].Seq
	if err := w.spool.MarkDerivedWritten(last); err != nil {
		return 0, err
	}
	w.dcursor = last
	w.m.DerivedStored.Add(float64(stored))
	n = len(w.derived)
	clear(w.derived)
	return n, nil
}

// AppendLineProtocol appends the water_temperature point of r (with a
// trailing newline) to b.
func AppendLineProtocol(b []byte, r *Reading) []byte {
	b = append(b, MeasurementReadings+",depth_m="...)
	b = strconv.AppendFloat(b, r.Depth, 'f', -1, 64)
	if r.Sensor != "" {
		b = append(b, ",sensor="...)
		b = appendTag(b, r.Sensor)
	}
	b = append(b, ",site="...)
	b = appendTag(b, r.Site)
	b = append(b, " qc="...)
	b = strconv.AppendUint(b, uint64(r.QC), 10)
	b = append(b, "i,temp_c="...)
	b = strconv.AppendFloat(b, r.TempC, 'g', -1, 64)
	b = append(b, ' ')
	b = strconv.AppendInt(b, r.Time.UnixNano(), 10)
	return append(b, '\n')
}

// appendTag escapes a tag value for line protocol: comma, equals sign and
// space get a backslash. Identifiers never hold control characters (decode.go).
func appendTag(b []byte, s string) []byte {
	for i := 0; i < len(s); i++ {
		switch c := s[i]; c {
		case ',', '=', ' ':
			b = append(b, '\\', c)
		default:
			b = append(b, c)
		}
	}
	return b
}

// errorClass sorts a write error: "client" (the data was refused: 400, 422),
// "too_large" (413), "config" (401, 403, 404: credentials or bucket),
// "server" (429, 5xx) or "network".
func errorClass(err error) (class string, status int, retryAfter time.Duration) {
	var he *ihttp.Error
	if errors.As(err, &he) && he.StatusCode != 0 {
		ra := time.Duration(he.RetryAfter) * time.Second
		switch s := he.StatusCode; {
		case s == http.StatusBadRequest || s == http.StatusUnprocessableEntity:
			return "client", s, 0
		case s == http.StatusRequestEntityTooLarge:
			return "too_large", s, 0
		case s == http.StatusUnauthorized || s == http.StatusForbidden || s == http.StatusNotFound:
			return "config", s, ra
		default:
			return "server", s, ra
		}
	}
	return "network", 0, 0
}

// deliver writes body (n points, one per line), retrying transient failures
// (when retry is set) and dead-lettering what the database refuses. It
// returns the number of points stored; an error only when ctx ended, a
// non-retried attempt failed, or the spool failed.
func (w *Writer) deliver(ctx context.Context, body string, n int, what string, retry bool) (stored int, err error) {
	budget := maxSplitRequests
	var rejected []DeadLetter
	var rec func(part string, n int) error
	rec = func(part string, n int) error {
		err := w.send(ctx, part, n, retry)
		if err == nil {
			stored += n
			return nil
		}
		class, status, _ := errorClass(err)
		if class != "client" && class != "too_large" {
			return err
		}
		if n > 1 && budget >= 2 {
			budget -= 2
			a, b, na := splitLines(part, n/2)
			if err := rec(a, na); err != nil {
				return err
			}
			return rec(b, n-na)
		}
		if class == "too_large" && n > 1 {
			return fmt.Errorf("database refuses even small batches as too large: %w", err)
		}
		for _, l := range strings.Split(part, "\n") {
			rejected = append(rejected, DeadLetter{
				Time: time.Now().UTC(), Kind: DeadPoint, Topic: measurementOf(l),
				Reason: "influx_" + strconv.Itoa(status), Detail: err.Error(), Payload: []byte(l),
			})
		}
		return nil
	}
	if err := rec(body, n); err != nil {
		return stored, err
	}
	if len(rejected) > 0 {
		if err := w.spool.AddDeadLetters(rejected); err != nil {
			return stored, err
		}
		w.m.PointsRejected.Add(float64(len(rejected)))
		w.m.MessagesRejected.WithLabelValues(ReasonInfluxReject).Add(float64(len(rejected)))
		if n, ok := w.rl.allow("rejected", time.Now()); ok {
			w.log.Error("database refused points; they are in the dead-letter bucket",
				"points", len(rejected), "series", what, "reason", rejected[0].Reason, "err", rejected[0].Detail,
				"first", clip(string(rejected[0].Payload)), "suppressed", n)
		}
	}
	return stored, nil
}

// splitLines splits body after its k-th line (0 < k < lines): the first part,
// the rest, and the number of lines in the first part.
func splitLines(body string, k int) (string, string, int) {
	off := 0
	for i := 0; i < k; i++ {
		j := strings.IndexByte(body[off:], '\n')
		if j < 0 {
			return body, "", i + 1
		}
		off += j + 1
	}
	return body[:off-1], body[off:], k
}

func measurementOf(line string) string {
	for i := 0; i < len(line); i++ {
		switch line[i] {
		case '\\':
			i++
		case ',', ' ':
			return line[:i]
		}
	}
	return line
}

// send posts one request, retrying transient failures with exponential
// backoff and full jitter when retry is set. Client errors (4xx data) are
// returned at once.
func (w *Writer) send(ctx context.Context, body string, n int, retry bool) error {
	for attempt := 0; ; attempt++ {
		start := time.Now()
		rctx, cancel := context.WithTimeout(ctx, w.o.Timeout)
		err := w.api.WriteRecord(rctx, body)
		cancel()
		if err == nil {
			w.m.WriteDuration.Observe(time.Since(start).Seconds())
			if attempt > 0 {
				w.log.Info("database writes succeed again", "attempts", attempt+1)
			}
			w.setReachable(true, nil)
			return nil
		}
		if ctx.Err() != nil {
			return ctx.Err()
		}
		class, status, retryAfter := errorClass(err)
		switch class {
		case "client", "too_large":
			w.m.WriteErrors.WithLabelValues("client").Inc()
			w.setReachable(true, nil)
			return err
		case "network":
			w.m.WriteErrors.WithLabelValues("network").Inc()
			w.setReachable(false, err)
		default:
			w.m.WriteErrors.WithLabelValues("server").Inc()
			w.setReachable(status < 500 && status != http.StatusTooManyRequests, err)
		}
		if !retry {
			return fmt.Errorf("write %d points: %w", n, err)
		}
		delay := w.backoff(attempt)
		if retryAfter > delay {
			delay = min(retryAfter, w.o.BackoffMax)
		}
		if n, ok := w.rl.allow("write_"+class, time.Now()); ok {
			lvl := slog.LevelWarn
			if class == "config" {
				lvl = slog.LevelError // credentials or bucket: an operator must act
			}
			w.log.Log(ctx, lvl, "database write failed; readings stay in the spool, retrying",
				"err", err, "class", class, "status", status, "points", n, "attempt", attempt+1,
				"retry_in", delay.Round(time.Millisecond), "suppressed", n)
		}
		t := time.NewTimer(delay)
		select {
		case <-ctx.Done():
			t.Stop()
			return ctx.Err()
		case <-t.C:
		}
	}
}

// backoff is the delay before retry attempt+1: uniform in
// [min, min(max, min·2^attempt)] ("full jitter" above the floor).
func (w *Writer) backoff(attempt int) time.Duration {
	hi := w.o.BackoffMin << min(attempt, 20)
	if hi > w.o.BackoffMax || hi <= 0 {
		hi = w.o.BackoffMax
	}
	lo := w.o.BackoffMin
	if hi <= lo {
		return lo
	}
	return lo + rand.N(hi-lo)
}
