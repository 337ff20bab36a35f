package ingest

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/influxdata/influxdb-client-go/v2/api/write"
	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"
)

var spT0 = time.Date(2026, 3, 14, 6, 0, 0, 0, time.UTC)

func spOpen(t testing.TB, o SpoolOptions) *Spool {
	t.Helper()
	s, err := OpenSpool(filepath.Join(t.TempDir(), "spool.db"), o)
	if err != nil {
		t.Fatalf("open spool: %v", err)
	}
	t.Cleanup(func() { s.Close() })
	return s
}

// spEntries returns n entries over 7 sites and 24 depths, with a few odd values.
func spEntries(n int) []Entry {
	es := make([]Entry, n)
	for i := range es {
		site := fmt.Sprintf("tarn-%d", i%7)
		sensor := ""
		if i%3 == 0 {
			sensor = "chain-" + strconv.Itoa(i%24)
		}
		es[i] = Entry{
			Recv:        spT0.Add(time.Duration(i) * time.Millisecond),
			PreQC:       QC(i%2) * QCNoTime,
			Redelivered: i%5 == 1,
			Reading: Reading{
				Site: site, Sensor: sensor, Depth: 0.5 * float64(i%24),
				Time:  spT0.Add(time.Duration(i) * time.Second),
				TempC: 4 + math.Sin(float64(i))*3.0001, QC: QC(i % 5),
			},
		}
	}
	if n < 5 {
		return es
	}
	es[1].TempC = math.Copysign(0, -1) // the sign bit must survive
	es[2].Depth = 1.0 / 3
	es[3].Time = time.Date(1901, 1, 1, 0, 0, 0, 1, time.UTC) // far from the commit time
	es[4].TempC = 1e300
	return es
}

func spSameEntry(a, b Entry) bool {
	return a.Seq == b.Seq && a.Recv.Equal(b.Recv) && a.PreQC == b.PreQC && a.Redelivered == b.Redelivered && a.Site == b.Site &&
		a.Sensor == b.Sensor && math.Float64bits(a.Depth) == math.Float64bits(b.Depth) &&
		a.Time.Equal(b.Time) && math.Float64bits(a.TempC) == math.Float64bits(b.TempC) && a.QC == b.QC
}

func TestSpoolCommitAndReadBack(t *testing.T) {
	s := spOpen(t, SpoolOptions{})
	es := spEntries(2500) // three blocks
	last, err := s.Commit(es, nil)
	if err != nil {
		t.Fatal(err)
	}
	if last != 2500 || es[0].Seq != 1 || es[2499].Seq != 2500 {
		t.Fatalf("sequence numbers: last %d, first entry %d, last entry %d; want 2500, 1, 2500", last, es[0].Seq, es[2499].Seq)
	}
	got, err := s.ReadReadings(0, 10000, nil)
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != len(es) {
		t.Fatalf("read %d entries, want %d", len(got), len(es))
	}
	for i := range es {
		if !spSameEntry(got[i], es[i]) {
			t.Fatalf("entry %d: got %+v, want %+v", i, got[i], es[i])
		}
		if got[i].Time.Location() != time.UTC || got[i].Recv.Location() != time.UTC {
			t.Fatalf("entry %d: times not UTC", i)
		}
	}
	// Reads starting inside a block, spanning blocks, bounded by max.
	for _, c := range []struct{ after, max, want int }{{0, 1, 1}, {1023, 3, 3}, {1020, 10, 10}, {2047, 5000, 453}, {2499, 10, 1}, {2500, 10, 0}} {
		got, err := s.ReadReadings(uint64(c.after), c.max, nil)
		if err != nil {
			t.Fatal(err)
		}
		if len(got) != c.want {
			t.Fatalf("after %d max %d: %d entries, want %d", c.after, c.max, len(got), c.want)
		}
		for j, e := range got {
			if e.Seq != uint64(c.after+1+j) || !spSameEntry(e, es[c.after+j]) {
				t.Fatalf("after %d: entry %d is seq %d", c.after, j, e.Seq)
			}
		}
	}
	// A second commit continues the sequence.
	more := spEntries(3)
	if last, err := s.Commit(more, nil); err != nil || last != 2503 {
		t.Fatalf("second commit: last %d, %v; want 2503", last, err)
	}
}

func TestSpoolDeletesOnlyBelowWriterAndCheckpoint(t *testing.T) {
	s := spOpen(t, SpoolOptions{})
	if _, err := s.Commit(spEntries(3000), nil); err != nil { // blocks 1..1024, 1025..2048, 2049..3000
		t.Fatal(err)
	}
	st0, _ := s.Stats()
	if err := s.MarkWritten(2500); err != nil {
		t.Fatal(err)
	}
	st, _ := s.Stats()
	if st.Stored != 3000 || st.Pending != 500 || st.Bytes != st0.Bytes {
		t.Fatalf("without a checkpoint nothing may be deleted: %+v", st)
	}
	if err := s.SetCheckpoint(1500); err != nil {
		t.Fatal(err)
	}
	st, _ = s.Stats()
	if st.Stored != 3000-1024 {
		t.Fatalf("checkpoint 1500, written 2500: kept %d readings, want %d (first block deleted)", st.Stored, 3000-1024)
	}
	// Readings after the checkpoint are still readable (the engine replays them).
	got, _ := s.ReadReadings(1500, 10, nil)
	if len(got) != 10 || got[0].Seq != 1501 {
		t.Fatalf("replay after checkpoint: %d entries starting %v", len(got), got)
	}
	if err := s.SetCheckpoint(3000); err != nil {
		t.Fatal(err)
	}
	st, _ = s.Stats()
	if st.Stored != 3000-2048 {
		t.Fatalf("checkpoint 3000, written 2500: kept %d, want %d", st.Stored, 3000-2048)
	}
	freed := s.Freed()
	if err := s.MarkWritten(3000); err != nil {
		t.Fatal(err)
	}
	select {
	case <-freed:
	default:
		t.Fatal("Freed channel not closed after space was released")
	}
	st, _ = s.Stats()
	if st.Stored != 0 || st.Bytes != 0 || st.Pending != 0 || !s.Empty() {
		t.Fatalf("everything written and checkpointed: %+v", st)
	}
	// Sequence numbers are never reused.
	if last, _ := s.Commit(spEntries(1), nil); last != 3001 {
		t.Fatalf("next sequence %d, want 3001", last)
	}
}

func TestSpoolSizeAndStats(t *testing.T) {
	s := spOpen(t, SpoolOptions{MaxBytes: 100 << 10})
	if s.Room() != 100<<10 {
		t.Fatalf("empty spool room %d", s.Room())
	}
	es := spEntries(1000)
	var bound int64
	for i := range es {
		bound += entrySize(&es[i].Reading)
	}
	if _, err := s.Commit(es, nil); err != nil {
		t.Fatal(err)
	}
	st, _ := s.Stats()
	if st.Bytes <= 0 || st.Bytes > bound {
		t.Fatalf("logical size %d, want within (0, %d] (the per-entry bound used for admission)", st.Bytes, bound)
	}
	t.Logf("1000 readings: %d bytes (%.1f B/reading)", st.Bytes, float64(st.Bytes)/1000)
	if s.Room() != 100<<10-st.Bytes {
		t.Fatalf("room %d, want %d", s.Room(), 100<<10-st.Bytes)
	}
	if st.OldestPending <= 0 || st.OldestPending > time.Minute {
		t.Fatalf("oldest pending age %v", st.OldestPending)
	}
}

func TestSpoolReopenKeepsEverything(t *testing.T) {
	path := filepath.Join(t.TempDir(), "spool.db")
	s, err := OpenSpool(path, SpoolOptions{})
	if err != nil {
		t.Fatal(err)
	}
	es := spEntries(1500)
	if _, err := s.Commit(es, []DeadLetter{{Time: spT0, Kind: DeadMessage, Topic: "a/b", Reason: "bad_json", Payload: []byte("{")}}); err != nil {
		t.Fatal(err)
	}
	if err := s.MarkWritten(700); err != nil {
		t.Fatal(err)
	}
	if err := s.AppendLinesAfter(0, [][]byte{[]byte("water_column,site=a schmidt=1 1")}); err != nil {
		t.Fatal(err)
	}
	if err := s.Writable(); err != nil {
		t.Fatalf("Writable: %v", err)
	}
	before, _ := s.Stats()
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	if _, err := s.Commit(es[:1], nil); !errors.Is(err, ErrSpoolClosed) {
		t.Fatalf("commit after close: %v, want ErrSpoolClosed", err)
	}
	if err := s.Writable(); !errors.Is(err, ErrSpoolClosed) {
		t.Fatalf("Writable after close: %v", err)
	}
	s, err = OpenSpool(path, SpoolOptions{})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	after, _ := s.Stats()
	before.OldestPending, after.OldestPending = 0, 0
	if before != after {
		t.Fatalf("stats changed across reopen:\n before %+v\n after  %+v", before, after)
	}
	got, _ := s.ReadReadings(700, 5000, nil)
	if len(got) != 800 || !spSameEntry(got[0], es[700]) {
		t.Fatalf("after reopen: %d pending entries", len(got))
	}
	dl, _ := s.DeadLetters(0, 10)
	if len(dl) != 1 || dl[0].Reason != "bad_json" || string(dl[0].Payload) != "{" {
		t.Fatalf("dead letters after reopen: %+v", dl)
	}
}

func TestSpoolDeadLettersBounded(t *testing.T) {
	m := NewMetrics(nil)
	s := spOpen(t, SpoolOptions{DeadLetterMax: 5, Metrics: m})
	long := make([]byte, 2000)
	for i := range long {
		long[i] = 'a' + byte(i%26)
	}
	for i := 0; i < 8; i++ {
		d := DeadLetter{Time: spT0.Add(time.Duration(i) * time.Second), Kind: DeadMessage, Topic: "buoys/x/" + strconv.Itoa(i), Reason: ReasonBadJSON, Detail: "boom", Payload: long}
		if err := s.AddDeadLetters([]DeadLetter{d}); err != nil {
			t.Fatal(err)
		}
	}
	dl, err := s.DeadLetters(0, 100)
	if err != nil {
		t.Fatal(err)
	}
	if len(dl) != 5 || dl[0].Topic != "buoys/x/3" || dl[4].Topic != "buoys/x/7" {
		t.Fatalf("kept %d dead letters from %q: want the newest 5 (3..7)", len(dl), dl[0].Topic)
	}
	if len(dl[0].Payload) != DeadLetterPayloadMax || string(dl[0].Payload[:3]) != "abc" || dl[0].Detail != "boom" || !dl[0].Time.Equal(spT0.Add(3*time.Second)) {
		t.Fatalf("dead letter content: %d payload bytes, %+v", len(dl[0].Payload), dl[0])
	}
	st, _ := s.Stats()
	if st.DeadLetters != 5 || st.DeadDropped != 3 || spValue(m.DeadLettersDropped) != 3 {
		t.Fatalf("dead letters kept %d, dropped %d (counter %v); want 5, 3", st.DeadLetters, st.DeadDropped, spValue(m.DeadLettersDropped))
	}
}

func TestSpoolDerivedPoints(t *testing.T) {
	s := spOpen(t, SpoolOptions{})
	p := write.NewPoint("water_column", map[string]string{"site": "loch vale"}, map[string]any{"schmidt_j_m2": 120.5, "state": "stratified"}, spT0)
	if err := s.AppendPoints([]*write.Point{p, p}); err != nil {
		t.Fatal(err)
	}
	got, err := s.ReadDerived(0, 1<<62, 10, nil)
	if err != nil {
		t.Fatal(err)
	}
	want := `water_column,site=loch\ vale schmidt_j_m2=120.5,state="stratified" ` + strconv.FormatInt(spT0.UnixNano(), 10)
	if len(got) != 2 || string(got[0].Line) != want || got[1].Seq != 2 {
		t.Fatalf("derived points: %v, want two of %q", got, want)
	}
	if err := s.MarkDerivedWritten(1); err != nil {
		t.Fatal(err)
	}
	got, _ = s.ReadDerived(0, 1<<62, 10, nil)
	st, _ := s.Stats()
	if len(got) != 1 || got[0].Seq != 2 || st.Derived != 1 {
		t.Fatalf("after marking 1 written: %d left (stats %d)", len(got), st.Derived)
	}
	if err := s.AppendLinesAfter(7, [][]byte{[]byte("a b=1\nc d=2")}); err == nil {
		t.Fatal("a line holding a newline must be refused")
	}
	if err := s.AppendLinesAfter(7, [][]byte{[]byte("a b=1")}); err != nil {
		t.Fatal(err)
	}
	got, _ = s.ReadDerived(2, 1<<62, 10, nil)
	if len(got) != 1 || got[0].After != 7 || string(got[0].Line) != "a b=1" {
		t.Fatalf("derived point with a dependency: %+v", got)
	}
	if got, _ = s.ReadDerived(2, 6, 10, nil); len(got) != 0 {
		t.Fatalf("a point to follow reading 7 returned with readings written up to 6: %+v", got)
	}
}

// TestSpoolSurvivesKill runs a child process that commits batches and reports
// each committed sequence number, kills it with SIGKILL mid-stream, and checks
// that every reported spReading is in the reopened spool, intact.
func TestSpoolSurvivesKill(t *testing.T) {
	if path := os.Getenv("HOLOMIX_SPOOL_CHILD"); path != "" {
		spKillChild(path) // the child process: commit until killed
	}
	dir := t.TempDir()
	path := filepath.Join(dir, "spool.db")
	cmd := exec.Command(os.Args[0], "-test.run=^TestSpoolSurvivesKill$", "-test.count=1")
	cmd.Env = append(os.Environ(), "HOLOMIX_SPOOL_CHILD="+path)
	out, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	// Read the child's reports in the background, so that it is busy
	// committing (not blocked on a full pipe) when it is killed.
	var mu sync.Mutex
	var acked uint64
	readDone := make(chan struct{})
	go func() {
		defer close(readDone)
		sc := bufio.NewScanner(out)
		for sc.Scan() {
			if v, ok := strings.CutPrefix(sc.Text(), "committed "); ok {
				n, _ := strconv.ParseUint(v, 10, 64)
				mu.Lock()
				acked = n
				mu.Unlock()
			}
		}
	}()
	spWaitFor(t, "30,000 committed readings", 60*time.Second, func() bool {
		mu.Lock()
		defer mu.Unlock()
		return acked >= 30000
	})
	time.Sleep(7 * time.Millisecond) // land the kill at an arbitrary point of a commit
	cmd.Process.Kill()
	cmd.Wait()
	<-readDone
	mu.Lock()
	defer mu.Unlock()
	s, err := OpenSpool(path, SpoolOptions{})
	if err != nil {
		t.Fatalf("reopen after kill -9: %v", err)
	}
	defer s.Close()
	got, err := s.ReadReadings(0, 1<<30, nil)
	if err != nil {
		t.Fatal(err)
	}
	if uint64(len(got)) < acked {
		t.Fatalf("after kill -9: %d readings in the spool, %d were reported committed", len(got), acked)
	}
	for i, e := range got {
		if e.Seq != uint64(i+1) || e.Site != fmt.Sprintf("tarn-%d", i%7) {
			t.Fatalf("spReading %d after kill -9: %+v", i, e)
		}
	}
	st, _ := s.Stats()
	if st.LastSeq != uint64(len(got)) || st.Stored != int64(len(got)) {
		t.Fatalf("meta after kill -9 disagrees with the data: %+v, %d readings", st, len(got))
	}
	t.Logf("killed after %d reported commits; %d readings in the reopened spool", acked, len(got))
}

// spKillChild is the child process of TestSpoolSurvivesKill: it commits
// batches of 100 readings and prints each last sequence number, forever.
func spKillChild(path string) {
	s, err := OpenSpool(path, SpoolOptions{})
	if err != nil {
		fmt.Println("error", err)
		os.Exit(1)
	}
	all := spEntries(1000)
	for n := 0; ; n++ {
		batch := make([]Entry, 100)
		for i := range batch {
			batch[i] = all[(n*100+i)%1000]
			batch[i].Site = fmt.Sprintf("tarn-%d", (n*100+i)%7)
		}
		last, err := s.Commit(batch, nil)
		if err != nil {
			fmt.Println("error", err)
			os.Exit(1)
		}
		fmt.Printf("committed %d\n", last)
	}
}

// spRecorder collects acknowledgements in order.
type spRecorder struct {
	mu   sync.Mutex
	acks []string
}

func (r *spRecorder) ack(id string) func() {
	return func() {
		r.mu.Lock()
		r.acks = append(r.acks, id)
		r.mu.Unlock()
	}
}

func (r *spRecorder) list() []string {
	r.mu.Lock()
	defer r.mu.Unlock()
	return append([]string(nil), r.acks...)
}

func spWaitFor(t *testing.T, what string, d time.Duration, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(d)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out after %v waiting for %s", d, what)
		}
		time.Sleep(5 * time.Millisecond)
	}
}

func spReading(site string, depth float64, ts time.Time, temp float64) Reading {
	return Reading{Site: site, Depth: depth, Time: ts, TempC: temp}
}

func TestCommitterQCDuplicatesAndAcks(t *testing.T) {
	s := spOpen(t, SpoolOptions{})
	reg := prometheus.NewRegistry()
	m := NewMetrics(reg)
	var commits []uint64
	var cmu sync.Mutex
	c := NewCommitter(CommitterOptions{Spool: s, Metrics: m, OnCommit: func(last uint64) {
		cmu.Lock()
		commits = append(commits, last)
		cmu.Unlock()
	}})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- c.Run(ctx) }()
	rec := &spRecorder{}
	recv := spT0.Add(time.Hour)
	msgs := []*Message{
		{Topic: "m1", Recv: recv, Readings: []Reading{spReading("fen", 1, spT0, 4.5), spReading("fen", 2, spT0, 4.4)}, Ack: rec.ack("m1")},
		{Topic: "m2", Recv: recv, Readings: []Reading{spReading("fen", 1, spT0, 4.5)}, Ack: rec.ack("m2")},                       // exact duplicate (a redelivery)
		{Topic: "m3", Recv: recv, Readings: []Reading{spReading("fen", 2, spT0, 9.9)}, Ack: rec.ack("m3")},                       // same key, other value
		{Topic: "m4", Recv: recv, Readings: []Reading{spReading("fen", 3, spT0, 99)}, Ack: rec.ack("m4")},                        // out of range
		{Topic: "bad/topic", Recv: recv, Payload: []byte("{oops"), Err: &DecodeError{Reason: ReasonBadJSON}, Ack: rec.ack("m5")}, // dead letter
		{Topic: "m6", Recv: recv, Readings: []Reading{spReading("fen", 1, spT0.Add(time.Minute), 4.5)}, Ack: rec.ack("m6")},
	}
	for _, msg := range msgs {
		if err := c.Enqueue(ctx, msg); err != nil {
			t.Fatal(err)
		}
	}
	// OnCommit is called after the batch's acknowledgements: wait for both.
	spWaitFor(t, "six acknowledgements and the commit reported", 5*time.Second, func() bool {
		cmu.Lock()
		defer cmu.Unlock()
		return len(rec.list()) == 6 && len(commits) > 0 && commits[len(commits)-1] >= 5
	})
	if got := strings.Join(rec.list(), ","); got != "m1,m2,m3,m4,m5,m6" {
		t.Fatalf("acknowledgement order %s", got)
	}
	es, _ := s.ReadReadings(0, 100, nil)
	if len(es) != 5 {
		t.Fatalf("spooled %d readings, want 5 (the exact duplicate dropped): %+v", len(es), es)
	}
	if es[2].TempC != 9.9 || es[2].QC&QCDuplicate == 0 {
		t.Fatalf("same key with another value must be stored flagged QCDuplicate: %+v", es[2])
	}
	if es[3].QC&QCRange == 0 || es[0].QC != 0 || es[4].QC != 0 {
		t.Fatalf("QC flags: %v %v %v", es[0].QC, es[3].QC, es[4].QC)
	}
	if v := spValue(m.ReadingsDuplicate); v != 1 {
		t.Fatalf("holomix_readings_duplicate_total = %v, want 1", v)
	}
	if v := spValue(m.MessagesRejected.WithLabelValues(ReasonBadJSON)); v != 1 {
		t.Fatalf("rejected{bad_json} = %v, want 1", v)
	}
	dl, _ := s.DeadLetters(0, 10)
	if len(dl) != 1 || dl[0].Topic != "bad/topic" || string(dl[0].Payload) != "{oops" || dl[0].Reason != ReasonBadJSON {
		t.Fatalf("dead letters: %+v", dl)
	}
	cmu.Lock()
	lastCommit := commits[len(commits)-1]
	cmu.Unlock()
	if lastCommit != 5 {
		t.Fatalf("OnCommit last sequence %d, want 5", lastCommit)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	if err := c.Enqueue(context.Background(), msgs[0]); !errors.Is(err, ErrCommitterClosed) {
		t.Fatalf("enqueue after drain: %v", err)
	}
}

// TestCommitterRestoreRecognisesRedelivery: after a crash between commit and
// acknowledgement the broker redelivers; the restored and replayed memory
// must drop the exact duplicate.
func TestCommitterRestoreRecognisesRedelivery(t *testing.T) {
	path := filepath.Join(t.TempDir(), "spool.db")
	recv := spT0.Add(time.Hour) // later than every reading: none is flagged QCFuture
	s, _ := OpenSpool(path, SpoolOptions{})
	c := NewCommitter(CommitterOptions{Spool: s})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- c.Run(ctx) }()
	rec := &spRecorder{}
	for i := 0; i < 10; i++ {
		c.Enqueue(ctx, &Message{Recv: recv, Readings: []Reading{spReading("mere", 5, spT0.Add(time.Duration(i)*time.Minute), 4+float64(i)/10)}, Ack: rec.ack("x")})
	}
	spWaitFor(t, "10 acks", 5*time.Second, func() bool { return len(rec.list()) == 10 })
	qc, dups, seq, err := c.Snapshot() // checkpoint after the 5th... taken after all 10 here
	if err != nil || seq != 10 {
		t.Fatalf("snapshot: seq %d, %v", seq, err)
	}
	// Five more after the checkpoint, then a "crash".
	for i := 10; i < 15; i++ {
		c.Enqueue(ctx, &Message{Recv: recv, Readings: []Reading{spReading("mere", 5, spT0.Add(time.Duration(i)*time.Minute), 4+float64(i)/10)}, Ack: rec.ack("x")})
	}
	spWaitFor(t, "15 acks", 5*time.Second, func() bool { return len(rec.list()) == 15 })
	cancel()
	<-done
	s.Close()

	s, _ = OpenSpool(path, SpoolOptions{})
	defer s.Close()
	m := NewMetrics(nil)
	c = NewCommitter(CommitterOptions{Spool: s, Metrics: m})
	n, err := c.Restore(qc, dups, seq)
	if err != nil || n != 5 {
		t.Fatalf("restore replayed %d readings (%v), want 5", n, err)
	}
	ctx, cancel = context.WithCancel(context.Background())
	defer cancel()
	go func() { done <- c.Run(ctx) }()
	rec2 := &spRecorder{}
	// Redelivery of readings 3 (before the checkpoint) and 12 (after it), plus
	// a changed value at minute 13 and a new one at minute 20.
	for _, i := range []int{3, 12} {
		c.Enqueue(ctx, &Message{Recv: recv, Readings: []Reading{spReading("mere", 5, spT0.Add(time.Duration(i)*time.Minute), 4+float64(i)/10)}, Ack: rec2.ack("dup")})
	}
	c.Enqueue(ctx, &Message{Recv: recv, Readings: []Reading{spReading("mere", 5, spT0.Add(13*time.Minute), 7)}, Ack: rec2.ack("changed")})
	c.Enqueue(ctx, &Message{Recv: recv, Readings: []Reading{spReading("mere", 5, spT0.Add(20*time.Minute), 6)}, Ack: rec2.ack("new")})
	spWaitFor(t, "4 acks", 5*time.Second, func() bool { return len(rec2.list()) == 4 })
	if v := spValue(m.ReadingsDuplicate); v != 2 {
		t.Fatalf("duplicates after restore: %v, want 2", v)
	}
	es, _ := s.ReadReadings(15, 10, nil)
	if len(es) != 2 || es[0].QC&QCDuplicate == 0 || es[0].TempC != 7 || es[1].QC != 0 {
		t.Fatalf("after restore: %+v", es)
	}
}

func TestCommitterBackPressure(t *testing.T) {
	s := spOpen(t, SpoolOptions{MaxBytes: 2000})
	m := NewMetrics(nil)
	var logs spLogBuf
	c := NewCommitter(CommitterOptions{Spool: s, Metrics: m, Logger: spLogger(&logs)})
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	go c.Run(ctx)
	rec := &spRecorder{}
	for i := 0; i < 200; i++ {
		c.Enqueue(ctx, &Message{Recv: spT0, Readings: []Reading{spReading("pond", 1, spT0.Add(time.Duration(i)*time.Minute), 5)}, Ack: rec.ack(strconv.Itoa(i))})
	}
	spWaitFor(t, "back-pressure", 5*time.Second, func() bool { return c.BackPressure() })
	// The room check uses an upper bound of the encoded size, so a few more
	// commits may fit before acknowledgements stop for good.
	acked := -1
	spWaitFor(t, "acknowledgements to stop", 10*time.Second, func() bool {
		n := len(rec.list())
		if n == acked {
			return true
		}
		acked = n
		time.Sleep(200 * time.Millisecond)
		return false
	})
	if acked == 0 || acked >= 200 {
		t.Fatalf("with a 2000-byte spool, %d of 200 messages acknowledged", acked)
	}
	time.Sleep(200 * time.Millisecond)
	if n := len(rec.list()); n != acked {
		t.Fatalf("acknowledgements continued under back-pressure: %d → %d", acked, n)
	}
	if spValue(m.BackPressure) != 1 || !strings.Contains(logs.String(), "spool full") {
		t.Fatalf("back-pressure not reported: gauge %v, log %q", spValue(m.BackPressure), logs.String())
	}
	if strings.Count(logs.String(), "spool full") != 1 {
		t.Fatalf("the back-pressure error is logged once per minute, got:\n%s", logs.String())
	}
	// Drain the spool as the writer and checkpoint would.
	go func() {
		for ctx.Err() == nil {
			st, _ := s.Stats()
			s.MarkWritten(st.LastSeq)
			s.SetCheckpoint(st.LastSeq)
			time.Sleep(2 * time.Millisecond)
		}
	}()
	spWaitFor(t, "all acknowledgements", 10*time.Second, func() bool { return len(rec.list()) == 200 })
	spWaitFor(t, "back-pressure off", 5*time.Second, func() bool { return !c.BackPressure() })
	st, _ := s.Stats()
	if st.LastSeq != 200 {
		t.Fatalf("%d readings committed, want 200", st.LastSeq)
	}
	if spValue(m.BackPressure) != 0 {
		t.Fatal("gauge still 1")
	}
}

func TestDupMemoryStateRoundTrip(t *testing.T) {
	d := newDupMemory(4)
	for i := 0; i < 10; i++ {
		r := spReading("a", float64(i%3), spT0.Add(time.Duration(i)*time.Second), float64(i))
		d.remember(&r)
	}
	e := newDupMemory(4)
	if err := e.restore(d.state()); err != nil {
		t.Fatal(err)
	}
	for i := 0; i < 10; i++ {
		r := spReading("a", float64(i%3), spT0.Add(time.Duration(i)*time.Second), float64(i))
		if d.seen(&r) != e.seen(&r) {
			t.Fatalf("spReading %d: seen %v before, %v after restore", i, d.seen(&r), e.seen(&r))
		}
	}
	r := spReading("a", 0, spT0, 0)
	if !e.seen(&r) {
		t.Fatal("a remembered spReading was forgotten")
	}
	r.TempC = 0.5
	if e.seen(&r) {
		t.Fatal("another value at the same time must not count as an exact duplicate")
	}
	if err := e.restore([]byte{1, 5}); err == nil {
		t.Fatal("a truncated state must be refused")
	}
}

// BenchmarkSpoolAppend measures one group commit (encode, bbolt put, fsync)
// per iteration and reports the cost per reading. Like the daemon, it frees
// the written blocks every 5,000 readings, so the file stops growing and pages
// are reused.
func BenchmarkSpoolAppend(b *testing.B) {
	for _, batch := range []int{1, 100, 1000} {
		b.Run(fmt.Sprintf("batch=%d", batch), func(b *testing.B) {
			s := spOpen(b, SpoolOptions{})
			es := spEntries(batch)
			b.ReportAllocs()
			b.ResetTimer()
			var sinceTrim int
			for i := 0; i < b.N; i++ {
				last, err := s.Commit(es, nil)
				if err != nil {
					b.Fatal(err)
				}
				if sinceTrim += batch; sinceTrim >= 5000 {
					sinceTrim = 0
					if err := s.MarkWritten(last); err != nil {
						b.Fatal(err)
					}
					if err := s.SetCheckpoint(last); err != nil {
						b.Fatal(err)
					}
				}
			}
			b.StopTimer()
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*batch), "ns/reading")
			b.ReportMetric(float64(b.N*batch)/b.Elapsed().Seconds(), "readings/s")
		})
	}
}

// spLogBuf is a goroutine-safe log sink.
type spLogBuf struct {
	mu sync.Mutex
	b  strings.Builder
}

func (l *spLogBuf) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *spLogBuf) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

func spLogger(w io.Writer) *slog.Logger {
	return slog.New(slog.NewTextHandler(w, &slog.HandlerOptions{Level: slog.LevelInfo}))
}

// spValue reads the value of a counter or gauge.
func spValue(m prometheus.Metric) float64 {
	var d dto.Metric
	if err := m.Write(&d); err != nil {
		panic(err)
	}
	switch {
	case d.Counter != nil:
		return d.Counter.GetValue()
	case d.Gauge != nil:
		return d.Gauge.GetValue()
	}
	panic("spValue: not a counter or gauge")
}

// BenchmarkCommitterWindow models a broker that enforces its in-flight window
// strictly (max_inflight_messages W): at most W one-reading messages are
// unacknowledged at any time, and each acknowledgement releases exactly one
// more. Throughput is then bounded by W ÷ (commit time), which this measures
// with the real spool (fsync included).
func BenchmarkCommitterWindow(b *testing.B) {
	for _, w := range []int{20, 100, 1000} {
		b.Run(fmt.Sprintf("window=%d", w), func(b *testing.B) {
			s := spOpen(b, SpoolOptions{})
			m := NewMetrics(nil)
			c := NewCommitter(CommitterOptions{Spool: s, Metrics: m, OnCommit: func(last uint64) {
				if last%5000 < 1000 {
					s.MarkWritten(last)
					s.SetCheckpoint(last)
				}
			}})
			ctx, cancel := context.WithCancel(context.Background())
			defer cancel()
			go c.Run(ctx)
			slots := make(chan struct{}, w)
			for i := 0; i < w; i++ {
				slots <- struct{}{}
			}
			recv := time.Now().UTC()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				<-slots
				r := spReading(fmt.Sprintf("tarn-%d", i%10), float64(i%20), spT0.Add(time.Duration(i)*time.Second), 4)
				c.Enqueue(ctx, &Message{Recv: recv, Readings: []Reading{r}, Ack: func() { slots <- struct{}{} }})
			}
			for i := 0; i < w; i++ {
				<-slots
			}
			b.StopTimer()
			b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "readings/s")
			var d dto.Metric
			m.CommitDuration.Write(&d)
			h := d.GetHistogram()
			b.ReportMetric(h.GetSampleSum()/float64(h.GetSampleCount())*1e3, "ms/commit")
			b.ReportMetric(float64(b.N)/float64(h.GetSampleCount()), "readings/commit")
		})
	}
}

// TestCommitterDrainReleasesBlockedEnqueue: under back-pressure with a full
// queue, an Enqueue waiting for room returns once the committer drains, so a
// shutdown never hangs on the broker connection's handler.
func TestCommitterDrainReleasesBlockedEnqueue(t *testing.T) {
	s := spOpen(t, SpoolOptions{MaxBytes: 200})
	c := NewCommitter(CommitterOptions{Spool: s, QueueMax: 3})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- c.Run(ctx) }()
	i := 0
	spWaitFor(t, "back-pressure", 5*time.Second, func() bool {
		if c.Pending() < 3 {
			i++
			c.Enqueue(context.Background(), &Message{Recv: spT0, Readings: []Reading{spReading("pond", 1, spT0.Add(time.Duration(i)*time.Minute), 5)}})
		}
		return c.BackPressure() && c.Pending() == 3
	})
	blocked := make(chan error, 1)
	go func() {
		blocked <- c.Enqueue(context.Background(), &Message{Recv: spT0, Readings: []Reading{spReading("pond", 2, spT0, 5)}})
	}()
	select {
	case err := <-blocked:
		t.Fatalf("Enqueue did not block on a full queue: %v", err)
	case <-time.After(100 * time.Millisecond):
	}
	cancel()
	select {
	case err := <-blocked:
		if !errors.Is(err, ErrCommitterClosed) {
			t.Fatalf("blocked Enqueue returned %v, want ErrCommitterClosed", err)
		}
	case <-time.After(5 * time.Second):
		t.Fatal("blocked Enqueue still waiting after the drain")
	}
	if err := <-done; err != nil {
		t.Fatal(err)
	}
}
