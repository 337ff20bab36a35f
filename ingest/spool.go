package ingest

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"sync"
	"time"

	"github.com/influxdata/influxdb-client-go/v2/api/write"
	bolt "go.etcd.io/bbolt"

	"holomix/internal/mmtrim"
)

// The spool is the durable queue between the broker and the database. It is a
// bbolt file (spool.db in storage.dir) with four buckets:
//
//	r  readings: key = sequence number (uint64, big-endian) of the first reading
//	   of a block, value = a block of up to spoolBlockMax readings (spool_codec.go).
//	   Sequence numbers start at 1, increase by one per reading and are never reused.
//	d  derived points (the engine's water_column and lake_event series, and
//	   re-flagged readings): key = sequence number, value = the reading
//	   sequence number the point must not be written before (uint64,
//	   big-endian; 0: none) followed by one line of InfluxDB line protocol.
//	x  dead letters: key = sequence number, value = an encoded DeadLetter.
//	m  meta: the counters and cursors below, rewritten in every transaction that
//	   changes them.
//
// A reading block is deleted once every reading in it is at or below
// min(writer cursor, detection checkpoint): InfluxDB has acknowledged it and the
// detection engine's saved state includes it. A derived point is deleted once
// the writer has stored it. bbolt commits are atomic and fsynced, so the spool
// survives kill -9 and power loss (short of a lying disk).

// Spool defaults.
const (
	// DefaultSpoolMaxBytes is the back-pressure threshold when none is configured.
	DefaultSpoolMaxBytes = 1 << 30
	// DefaultDeadLetterMax is the number of dead letters kept when none is configured.
	DefaultDeadLetterMax = 10000
	// DeadLetterPayloadMax is the number of payload bytes a dead letter keeps.
	DeadLetterPayloadMax = 512
	// spoolBlockMax is the largest number of readings in one block.
	spoolBlockMax    = 1024
	spoolMetaVersion = 1
	// spoolInitialMmap is the initial size of the file mapping (address space).
	spoolInitialMmap = 256 << 20
)

var (
	bktReadings = []byte("r")
	bktDerived  = []byte("d")
	bktDead     = []byte("x")
	bktMeta     = []byte("m")
	keyMeta     = []byte("meta")
)

// ErrSpoolClosed is returned by the operations of a closed spool.
var ErrSpoolClosed = errors.New("spool: closed")

// Entry is one spooled reading with its sequence number and receive time (UTC).
type Entry struct {
	Seq  uint64
	Recv time.Time
	// PreQC holds the flags the decoder set before quality control (QCNoTime),
	// so quality control can be replayed exactly after a restart.
	PreQC QC
	// Redelivered is set when the broker marked the message as a redelivery
	// (MQTT DUP flag): the reading may have been stored and detected before.
	Redelivered bool
	Reading
}

// ReadingSink takes committed readings in sequence order: the detection
// engine (internal/engine.Engine) in the daemon. Add reports whether the
// reading came too late for its profile (the caller then stores it again
// flagged QCLate).
type ReadingSink interface {
	Add(r Reading) (late bool)
}

// DerivedPoint is one spooled derived point in line protocol. The writer
// stores it only once every reading up to After is stored (so that a
// re-flagged reading overwrites the original, never the reverse).
type DerivedPoint struct {
	Seq   uint64
	After uint64
	Line  []byte
}

// Dead-letter kinds.
const (
	DeadMessage = "message" // an MQTT message that could not be decoded
	DeadPoint   = "point"   // a point the database rejected (HTTP 4xx)
)

// DeadLetter is a message or point that will never be stored. Payload holds at
// most DeadLetterPayloadMax bytes of the original.
type DeadLetter struct {
	Seq     uint64    // assigned by the spool
	Time    time.Time // when it was rejected (UTC)
	Kind    string    // DeadMessage or DeadPoint
	Topic   string    // MQTT topic (message) or measurement (point)
	Reason  string    // counter label, e.g. bad_json, unknown_topic, influx_400
	Detail  string    // human-readable error
	Payload []byte
}

// SpoolOptions configure OpenSpool.
type SpoolOptions struct {
	// MaxBytes is the back-pressure threshold on the spool's logical size
	// (encoded readings and derived points); <= 0 means DefaultSpoolMaxBytes.
	MaxBytes int64
	// DeadLetterMax bounds the dead-letter bucket; <= 0 means DefaultDeadLetterMax.
	DeadLetterMax int
	// NoSync skips fsync (benchmarks only: a crash may lose committed data).
	NoSync bool
	// Metrics receives the dead-letter counters (nil: none).
	Metrics *Metrics
}

// spoolMeta is the persistent bookkeeping of the spool.
type spoolMeta struct {
	nextSeq     uint64 // next reading sequence number
	written     uint64 // writer cursor: every reading <= written is in the database
	nextDerived uint64 // next derived sequence number
	dWritten    uint64 // every derived point <= dWritten is in the database
	nextDead    uint64 // next dead-letter sequence number
	bytes       int64  // logical size of r and d values
	readings    int64  // readings present in r
	derived     int64  // points present in d
	dead        int64  // dead letters present
	deadDropped uint64 // dead letters dropped because the bucket was full
}

const spoolMetaSize = 1 + 10*8

func (m *spoolMeta) encode() []byte {
	b := make([]byte, spoolMetaSize)
	b[0] = spoolMetaVersion
	for i, v := range [...]uint64{m.nextSeq, m.written, m.nextDerived, m.dWritten, m.nextDead,
		uint64(m.bytes), uint64(m.readings), uint64(m.derived), uint64(m.dead), m.deadDropped} {
		binary.BigEndian.PutUint64(b[1+8*i:], v)
	}
	return b
}

func (m *spoolMeta) decode(b []byte) error {
	if len(b) != spoolMetaSize || b[0] != spoolMetaVersion {
		return fmt.Errorf("spool: meta record of %d bytes, version %d: not written by this version", len(b), firstByte(b))
	}
	u := func(i int) uint64 { return binary.BigEndian.Uint64(b[1+8*i:]) }
	m.nextSeq, m.written, m.nextDerived, m.dWritten, m.nextDead = u(0), u(1), u(2), u(3), u(4)
	m.bytes, m.readings, m.derived, m.dead, m.deadDropped = int64(u(5)), int64(u(6)), int64(u(7)), int64(u(8)), u(9)
	return nil
}

func firstByte(b []byte) int {
	if len(b) == 0 {
		return -1
	}
	return int(b[0])
}

// Spool is the durable reading queue. Its methods are safe for concurrent use;
// bbolt serialises the write transactions.
type Spool struct {
	db       *bolt.DB
	path     string
	maxBytes int64
	deadMax  int
	metrics  *Metrics

	wmu     sync.Mutex // serialises update: a transaction and the installation of its meta
	mu      sync.Mutex
	meta    spoolMeta
	ckpt    uint64 // detection checkpoint: readings <= ckpt are in the engine's saved state
	closed  bool
	freed   chan struct{} // closed and replaced whenever bytes shrink
	enc     blockEncoder  // used by Commit under wmu
	scratch []byte
}

// OpenSpool opens (creating if needed) the spool file at path.
func OpenSpool(path string, o SpoolOptions) (*Spool, error) {
	if o.MaxBytes <= 0 {
		o.MaxBytes = DefaultSpoolMaxBytes
	}
	if o.DeadLetterMax <= 0 {
		o.DeadLetterMax = DefaultDeadLetterMax
	}
	if err := os.MkdirAll(filepath.Dir(path), 0o750); err != nil {
		return nil, fmt.Errorf("spool: create directory: %w", err)
	}
	db, err := bolt.Open(path, 0o640, &bolt.Options{
		Timeout:      2 * time.Second, // another process holds the file lock
		FreelistType: bolt.FreelistMapType,
		NoSync:       o.NoSync,
		// Address space only: a large initial mapping spares the remaps (and
		// their copies of every open node) while the file grows.
		InitialMmapSize: spoolInitialMmap,
	})
	if err != nil {
		return nil, fmt.Errorf("spool: open %s: %w", path, err)
	}
	s := &Spool{db: db, path: path, maxBytes: o.MaxBytes, deadMax: o.DeadLetterMax, metrics: o.Metrics, freed: make(chan struct{})}
	err = db.Update(func(tx *bolt.Tx) error {
		for _, name := range [][]byte{bktReadings, bktDerived, bktDead, bktMeta} {
			if _, err := tx.CreateBucketIfNotExists(name); err != nil {
				return err
			}
		}
		if v := tx.Bucket(bktMeta).Get(keyMeta); v != nil {
			return s.meta.decode(v)
		}
		s.meta = spoolMeta{nextSeq: 1, nextDerived: 1, nextDead: 1}
		return tx.Bucket(bktMeta).Put(keyMeta, s.meta.encode())
	})
	if err != nil {
		db.Close()
		return nil, fmt.Errorf("spool: initialise %s: %w", path, err)
	}
	return s, nil
}

// Path returns the spool file's path.
func (s *Spool) Path() string { return s.path }

// MaxBytes returns the back-pressure threshold.
func (s *Spool) MaxBytes() int64 { return s.maxBytes }

// Close closes the file. Further calls return ErrSpoolClosed.
func (s *Spool) Close() error {
	s.mu.Lock()
	if s.closed {
		s.mu.Unlock()
		return nil
	}
	s.closed = true
	s.mu.Unlock()
	if err := s.db.Close(); err != nil {
		return fmt.Errorf("spool: close: %w", err)
	}
	return nil
}

// Room returns how many more bytes the spool accepts before back-pressure
// (negative when over the limit).
func (s *Spool) Room() int64 {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.maxBytes - s.meta.bytes
}

// Empty reports whether no readings or derived points are stored.
func (s *Spool) Empty() bool {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.meta.bytes == 0
}

// Freed returns a channel closed the next time space is released.
func (s *Spool) Freed() <-chan struct{} {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.freed
}

// update runs fn in a write transaction with a copy of the meta, stores the
// meta, and installs it in memory when the transaction commits.
func (s *Spool) update(fn func(tx *bolt.Tx, m *spoolMeta) error) error {
	s.mu.Lock()
	if s.closed {
		s.mu.Unlock()
		return ErrSpoolClosed
	}
	s.mu.Unlock()
	s.wmu.Lock()
	defer s.wmu.Unlock()
	var next spoolMeta
	err := s.db.Update(func(tx *bolt.Tx) error {
		s.mu.Lock()
		next = s.meta
		s.mu.Unlock()
		if err := fn(tx, &next); err != nil {
			return err
		}
		return tx.Bucket(bktMeta).Put(keyMeta, next.encode())
	})
	if err != nil {
		return err
	}
	s.mu.Lock()
	shrank := next.bytes < s.meta.bytes
	s.meta = next
	if shrank {
		close(s.freed)
		s.freed = make(chan struct{})
	}
	s.mu.Unlock()
	return nil
}

// Commit durably appends entries (assigning their Seq in order) and dead
// letters in one transaction (one fsync). It does not enforce the size limit:
// the caller checks Room first (see Committer). It returns the last sequence
// number assigned (0 when entries is empty).
func (s *Spool) Commit(entries []Entry, dead []DeadLetter) (last uint64, err error) {
	if len(entries) == 0 && len(dead) == 0 {
		return 0, nil
	}
	var dropped uint64
	err = s.update(func(tx *bolt.Tx, m *spoolMeta) error {
		if len(entries) > 0 {
			b := tx.Bucket(bktReadings)
			b.FillPercent = 1 // keys only ever grow: pack pages full
			seq := m.nextSeq
			for i := range entries {
				entries[i].Seq = seq + uint64(i)
			}
			var key [8]byte
			for off := 0; off < len(entries); off += spoolBlockMax {
				blk := entries[off:min(off+spoolBlockMax, len(entries))]
				v := s.enc.encode(blk, time.Now())
				binary.BigEndian.PutUint64(key[:], blk[0].Seq)
				// bbolt keeps a reference to the value until commit: copy it.
				if err := b.Put(append([]byte(nil), key[:]...), append([]byte(nil), v...)); err != nil {
					return fmt.Errorf("put block %d: %w", blk[0].Seq, err)
				}
				m.bytes += int64(len(v))
			}
			m.nextSeq = seq + uint64(len(entries))
			m.readings += int64(len(entries))
		}
		if len(dead) > 0 {
			n, err := s.putDead(tx, m, dead)
			if err != nil {
				return err
			}
			dropped = n
		}
		return nil
	})
	if err != nil {
		return 0, fmt.Errorf("spool: commit %d readings, %d dead letters: %w", len(entries), len(dead), err)
	}
	s.countDropped(dropped)
	if len(entries) > 0 {
		last = entries[len(entries)-1].Seq
	}
	return last, nil
}

func (s *Spool) countDropped(n uint64) {
	if n > 0 && s.metrics != nil {
		s.metrics.DeadLettersDropped.Add(float64(n))
	}
}

// putDead appends dead letters and drops the oldest beyond the bound.
func (s *Spool) putDead(tx *bolt.Tx, m *spoolMeta, dead []DeadLetter) (dropped uint64, err error) {
	b := tx.Bucket(bktDead)
	b.FillPercent = 1
	for i := range dead {
		d := &dead[i]
		d.Seq = m.nextDead
		m.nextDead++
		if len(d.Payload) > DeadLetterPayloadMax {
			d.Payload = d.Payload[:DeadLetterPayloadMax]
		}
		if err := b.Put(u64key(d.Seq), encodeDead(d)); err != nil {
			return 0, fmt.Errorf("put dead letter: %w", err)
		}
		m.dead++
	}
	c := b.Cursor()
	for m.dead > int64(s.deadMax) {
		k, _ := c.First()
		if k == nil {
			m.dead = 0
			break
		}
		if err := c.Delete(); err != nil {
			return 0, fmt.Errorf("drop oldest dead letter: %w", err)
		}
		m.dead--
		m.deadDropped++
		dropped++
	}
	return dropped, nil
}

// AddDeadLetters durably stores dead letters (the writer's rejected points).
func (s *Spool) AddDeadLetters(dead []DeadLetter) error {
	if len(dead) == 0 {
		return nil
	}
	var dropped uint64
	err := s.update(func(tx *bolt.Tx, m *spoolMeta) error {
		n, err := s.putDead(tx, m, dead)
		dropped = n
		return err
	})
	if err != nil {
		return fmt.Errorf("spool: add %d dead letters: %w", len(dead), err)
	}
	s.countDropped(dropped)
	return nil
}

// DeadLetters returns up to max dead letters, oldest first, with Seq > after.
func (s *Spool) DeadLetters(after uint64, max int) ([]DeadLetter, error) {
	var out []DeadLetter
	err := s.db.View(func(tx *bolt.Tx) error {
		c := tx.Bucket(bktDead).Cursor()
		for k, v := c.Seek(u64key(after + 1)); k != nil && len(out) < max; k, v = c.Next() {
			d, err := decodeDead(v)
			if err != nil {
				return fmt.Errorf("dead letter %d: %w", binary.BigEndian.Uint64(k), err)
			}
			d.Seq = binary.BigEndian.Uint64(k)
			out = append(out, d)
		}
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("spool: read dead letters: %w", err)
	}
	return out, nil
}

// ReadReadings appends to dst up to max entries with Seq > after, in sequence
// order, and returns it.
func (s *Spool) ReadReadings(after uint64, max int, dst []Entry) ([]Entry, error) {
	if max <= 0 {
		return dst, nil
	}
	err := s.db.View(func(tx *bolt.Tx) error {
		c := tx.Bucket(bktReadings).Cursor()
		k, v := c.Seek(u64key(after + 1))
		if k == nil || binary.BigEndian.Uint64(k) > after+1 {
			// The block holding after+1 may start before it.
			if pk, pv := c.Prev(); pk != nil {
				k, v = pk, pv
			} else {
				k, v = c.First()
			}
		}
		want := max
		var dec blockDecoder
		for ; k != nil && want > 0; k, v = c.Next() {
			first := binary.BigEndian.Uint64(k)
			n, err := blockLen(v)
			if err != nil {
				return fmt.Errorf("block %d: %w", first, err)
			}
			if first+uint64(n)-1 <= after {
				continue
			}
			skip := 0
			if after >= first {
				skip = int(after - first + 1)
			}
			before := len(dst)
			dst, err = dec.decode(v, first, skip, want, dst)
			if err != nil {
				return fmt.Errorf("block %d: %w", first, err)
			}
			want -= len(dst) - before
		}
		return nil
	})
	if err != nil {
		return dst, fmt.Errorf("spool: read readings after %d: %w", after, err)
	}
	return dst, nil
}

// AppendPoints durably spools derived points (e.g. the engine's water_column
// and lake_event series) for the writer. They are never refused for size: the
// back-pressure threshold stops the readings that produce them.
func (s *Spool) AppendPoints(points []*write.Point) error { return s.AppendPointsAfter(0, points) }

// AppendPointsAfter is AppendPoints for points the writer must store only
// after every reading up to seq.
func (s *Spool) AppendPointsAfter(seq uint64, points []*write.Point) error {
	if len(points) == 0 {
		return nil
	}
	lines := make([][]byte, 0, len(points))
	for _, p := range points {
		l := bytes.TrimRight([]byte(write.PointToLineProtocol(p, time.Nanosecond)), "\n")
		if len(l) == 0 {
			return fmt.Errorf("spool: point %q has no fields", p.Name())
		}
		lines = append(lines, l)
	}
	return s.AppendLinesAfter(seq, lines)
}

// AppendLinesAfter durably spools derived points already in line protocol
// (one point per element, without a trailing newline) that the writer must
// store only after every reading up to seq (0: no constraint).
func (s *Spool) AppendLinesAfter(seq uint64, lines [][]byte) error {
	if len(lines) == 0 {
		return nil
	}
	err := s.update(func(tx *bolt.Tx, m *spoolMeta) error {
		b := tx.Bucket(bktDerived)
		b.FillPercent = 1
		for _, l := range lines {
			if len(l) == 0 || bytes.IndexByte(l, '\n') >= 0 {
				return fmt.Errorf("line %q is empty or holds a newline", clip(string(l)))
			}
			v := make([]byte, 8+len(l))
			binary.BigEndian.PutUint64(v, seq)
			copy(v[8:], l)
			if err := b.Put(u64key(m.nextDerived), v); err != nil {
				return err
			}
			m.nextDerived++
			m.derived++
			m.bytes += int64(len(v))
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("spool: append %d derived points: %w", len(lines), err)
	}
	return nil
}

// ReadDerived returns up to max derived points with Seq > after, in order,
// stopping before the first that must wait for a reading after written
// (DerivedPoint.After > written).
func (s *Spool) ReadDerived(after, written uint64, max int, dst []DerivedPoint) ([]DerivedPoint, error) {
	err := s.db.View(func(tx *bolt.Tx) error {
		c := tx.Bucket(bktDerived).Cursor()
		for k, v := c.Seek(u64key(after + 1)); k != nil && max > 0; k, v = c.Next() {
			if len(v) < 9 {
				return fmt.Errorf("derived point %d: truncated", binary.BigEndian.Uint64(k))
			}
			dep := binary.BigEndian.Uint64(v)
			if dep > written {
				break
			}
			dst = append(dst, DerivedPoint{Seq: binary.BigEndian.Uint64(k), After: dep, Line: append([]byte(nil), v[8:]...)})
			max--
		}
		return nil
	})
	if err != nil {
		return dst, fmt.Errorf("spool: read derived points after %d: %w", after, err)
	}
	return dst, nil
}

// MarkWritten records that every reading up to seq is in the database and
// deletes the blocks no longer needed.
func (s *Spool) MarkWritten(seq uint64) error {
	err := s.update(func(tx *bolt.Tx, m *spoolMeta) error {
		if seq > m.written {
			m.written = min(seq, m.nextSeq-1)
		}
		return s.trimReadings(tx, m)
	})
	if err != nil {
		return fmt.Errorf("spool: mark readings written up to %d: %w", seq, err)
	}
	return nil
}

// MarkDerivedWritten records that every derived point up to seq is in the
// database and deletes them.
func (s *Spool) MarkDerivedWritten(seq uint64) error {
	err := s.update(func(tx *bolt.Tx, m *spoolMeta) error {
		if seq > m.dWritten {
			m.dWritten = min(seq, m.nextDerived-1)
		}
		c := tx.Bucket(bktDerived).Cursor()
		for k, v := c.First(); k != nil && binary.BigEndian.Uint64(k) <= m.dWritten; k, v = c.First() {
			m.bytes -= int64(len(v))
			m.derived--
			if err := c.Delete(); err != nil {
				return err
			}
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("spool: mark derived points written up to %d: %w", seq, err)
	}
	return nil
}

// SetCheckpoint records that the detection engine's saved state includes
// every reading up to seq (the daemon calls it after state.db committed) and
// deletes the blocks no longer needed. Until the first call no reading is
// deleted.
func (s *Spool) SetCheckpoint(seq uint64) error {
	s.mu.Lock()
	if seq <= s.ckpt {
		s.mu.Unlock()
		return nil
	}
	s.ckpt = seq
	s.mu.Unlock()
	err := s.update(func(tx *bolt.Tx, m *spoolMeta) error { return s.trimReadings(tx, m) })
	if err != nil {
		return fmt.Errorf("spool: checkpoint %d: %w", seq, err)
	}
	return nil
}

// trimReadings deletes the blocks wholly at or below min(written, checkpoint).
func (s *Spool) trimReadings(tx *bolt.Tx, m *spoolMeta) error {
	s.mu.Lock()
	bound := min(m.written, s.ckpt)
	s.mu.Unlock()
	if bound == 0 {
		return nil
	}
	c := tx.Bucket(bktReadings).Cursor()
	for k, v := c.First(); k != nil; k, v = c.First() {
		n, err := blockLen(v)
		if err != nil {
			return fmt.Errorf("block %d: %w", binary.BigEndian.Uint64(k), err)
		}
		if binary.BigEndian.Uint64(k)+uint64(n)-1 > bound {
			break
		}
		m.bytes -= int64(len(v))
		m.readings -= int64(n)
		if err := c.Delete(); err != nil {
			return err
		}
	}
	return nil
}

// TrimResident drops the pages of the spool file the process has mapped
// from its resident set (they stay in the page cache); see mmtrim.
func (s *Spool) TrimResident() error { return mmtrim.Trim(s.db) }

// SpoolStats is a snapshot of the spool's bookkeeping.
type SpoolStats struct {
	LastSeq       uint64        // last reading sequence number committed (0: none yet)
	Written       uint64        // writer cursor
	Checkpoint    uint64        // detection checkpoint known to the spool
	Pending       int64         // readings committed but not yet in the database
	Stored        int64         // readings present in the file (pending + kept for detection)
	Derived       int64         // derived points waiting for the database
	Bytes         int64         // logical size (readings + derived points)
	MaxBytes      int64         // back-pressure threshold
	DeadLetters   int64         // dead letters kept
	DeadDropped   uint64        // dead letters dropped because the bucket was full
	OldestPending time.Duration // age of the oldest reading not yet in the database (commit time), 0 when none
}

// Stats returns the spool's bookkeeping; OldestPending needs a short read.
func (s *Spool) Stats() (SpoolStats, error) {
	s.mu.Lock()
	m, ckpt, closed := s.meta, s.ckpt, s.closed
	s.mu.Unlock()
	st := SpoolStats{
		LastSeq: m.nextSeq - 1, Written: m.written, Checkpoint: ckpt,
		Pending: int64(m.nextSeq - 1 - m.written), Stored: m.readings, Derived: m.derived,
		Bytes: m.bytes, MaxBytes: s.maxBytes, DeadLetters: m.dead, DeadDropped: m.deadDropped,
	}
	if st.Pending == 0 || closed {
		return st, nil
	}
	err := s.db.View(func(tx *bolt.Tx) error {
		c := tx.Bucket(bktReadings).Cursor()
		k, v := c.Seek(u64key(m.written + 1))
		if k == nil || binary.BigEndian.Uint64(k) > m.written+1 {
			if pk, pv := c.Prev(); pk != nil {
				k, v = pk, pv
			}
		}
		if k == nil {
			return nil
		}
		t, err := blockTime(v)
		if err != nil {
			return err
		}
		st.OldestPending = max(0, time.Since(t))
		return nil
	})
	if err != nil {
		return st, fmt.Errorf("spool: stats: %w", err)
	}
	return st, nil
}

// Writable reports whether a write transaction succeeds now (for readiness):
// it rewrites the meta record.
func (s *Spool) Writable() error {
	return s.update(func(*bolt.Tx, *spoolMeta) error { return nil })
}

func u64key(v uint64) []byte {
	var k [8]byte
	binary.BigEndian.PutUint64(k[:], v)
	return k[:]
}
