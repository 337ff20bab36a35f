package ingest

import (
	"bytes"
	"context"
	"maps"
	"path/filepath"
	"slices"
	"testing"
	"time"
)

// chunkMap keeps the latest chunk per site, as the daemon's state.db does.
type chunkMap struct {
	chunks map[string][]byte
	wrote  []string
}

func (c *chunkMap) put(site string, chunk []byte) error {
	if c.chunks == nil {
		c.chunks = map[string][]byte{}
	}
	c.chunks[site] = bytes.Clone(chunk)
	c.wrote = append(c.wrote, site)
	return nil
}

// TestQCChunksRestore: per-site chunks that are written only for the sites
// that changed, restored after any reading, give the same memory (State) and
// the same flags as one uninterrupted run; the chunks are far smaller than
// the JSON document.
func TestQCChunksRestore(t *testing.T) {
	var rs []Reading
	rs = append(rs, series(5, 0, 12, 12.1, 11.9, 12, 20, 20.1, 19.9, 20.0, 12.1, 20, 20)...)
	for h := 0; h < 30; h++ {
		rs = append(rs, rd(20, time.Duration(h)*time.Hour, 4))
		if h < 5 {
			r := rd(1, time.Duration(h)*time.Hour, 15)
			r.Site = "quiet-pond"
			rs = append(rs, r)
		}
	}
	rs = append(rs, rd(5, 0, 12)) // duplicate of the first reading
	cfg := QCConfig{StuckAfter: 12 * time.Hour, DuplicateWindow: 16}
	ref := feed(NewQualityControl(cfg), append([]Reading(nil), rs...))

	q := NewQualityControl(cfg)
	var store chunkMap
	var got []QC
	prev := 0
	for cut := 1; cut <= len(rs); cut += 3 {
		got = append(got, feed(q, append([]Reading(nil), rs[prev:cut]...))...)
		prev = cut
		store.wrote = nil
		if err := q.WriteStateChunks(false, store.put); err != nil {
			t.Fatal(err)
		}
		if cut > 25 && slices.Contains(store.wrote, "quiet-pond") {
			t.Fatalf("cut %d: unchanged site written again", cut)
		}
		var again chunkMap
		if err := q.WriteStateChunks(false, again.put); err != nil || len(again.wrote) != 0 {
			t.Fatalf("cut %d: nothing changed, wrote %v (%v)", cut, again.wrote, err)
		}
		q2 := NewQualityControl(cfg)
		if err := q2.RestoreChunks(maps.All(store.chunks)); err != nil {
			t.Fatalf("cut %d: %v", cut, err)
		}
		want, _ := q.State()
		have, _ := q2.State()
		if !bytes.Equal(want, have) {
			t.Fatalf("cut %d: restored memory differs\n%s\n%s", cut, have, want)
		}
		// The restored memory flags the rest as the uninterrupted run does.
		rest := feed(q2, append([]Reading(nil), rs[cut:]...))
		for i, f := range append(slices.Clone(got), rest...) {
			if f != ref[i] {
				t.Errorf("cut %d, reading %d: %q, want %q", cut, i, qcString(f), qcString(ref[i]))
			}
		}
	}
	doc, _ := q.State()
	n := 0
	for _, c := range store.chunks {
		n += len(c)
	}
	if n*2 > len(doc) {
		t.Errorf("chunks take %d bytes, the JSON document %d", n, len(doc))
	}
	t.Logf("%d sensors: chunks %d bytes, JSON %d bytes", q.Sensors(), n, len(doc))
}

func TestQCChunksRestoreErrors(t *testing.T) {
	q := NewQualityControl(QCConfig{})
	feed(q, series(5, 0, 12, 12.1, 11.9))
	var store chunkMap
	if err := q.WriteStateChunks(true, store.put); err != nil {
		t.Fatal(err)
	}
	good := store.chunks["calder-mere"]
	before, _ := q.State()
	for name, chunks := range map[string]map[string][]byte{
		"truncated":     {"calder-mere": good[:len(good)-3]},
		"trailing":      {"calder-mere": append(slices.Clone(good), 0)},
		"version":       {"calder-mere": append([]byte{9}, good[1:]...)},
		"empty":         {"calder-mere": {}},
		"bad site id":   {"": good},
		"count too big": {"calder-mere": {qcChunkVersion, 0xff, 0xff, 0x03}},
	} {
		if err := q.RestoreChunks(maps.All(chunks)); err == nil {
			t.Errorf("%s: accepted", name)
		}
	}
	if after, _ := q.State(); !bytes.Equal(before, after) {
		t.Error("a refused restore changed the memory")
	}
	small := NewQualityControl(QCConfig{})
	small.limit = 0
	if err := small.RestoreChunks(maps.All(store.chunks)); err == nil {
		t.Error("more sensors than the limit accepted")
	}
}

// TestCommitterChunksRecogniseRedelivery is TestCommitterRestoreRecognisesRedelivery
// with the per-site form of the memory (WriteState/RestoreChunks).
func TestCommitterChunksRecogniseRedelivery(t *testing.T) {
	path := filepath.Join(t.TempDir(), "spool.db")
	recv := spT0.Add(time.Hour)
	s, _ := OpenSpool(path, SpoolOptions{})
	c := NewCommitter(CommitterOptions{Spool: s, DuplicateWindow: 16})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- c.Run(ctx) }()
	rec := &spRecorder{}
	add := func(c *Committer, rec *spRecorder, site string, i int, v float64, tag string) {
		c.Enqueue(ctx, &Message{Recv: recv, Readings: []Reading{spReading(site, 5, spT0.Add(time.Duration(i)*time.Minute), v)}, Ack: rec.ack(tag)})
	}
	for i := 0; i < 10; i++ {
		add(c, rec, "mere", i, 4+float64(i)/10, "x")
		add(c, rec, "tarn", i, 9, "x")
	}
	spWaitFor(t, "20 acks", 5*time.Second, func() bool { return len(rec.list()) == 20 })
	var qc, dups chunkMap
	seq, err := c.WriteState(false, qc.put, dups.put) // first save: everything
	if err != nil || seq != 20 || len(qc.chunks) != 2 || len(dups.chunks) != 2 {
		t.Fatalf("write state: seq %d, qc %v, dups %v, %v", seq, qc.wrote, dups.wrote, err)
	}
	// Five more of one site after the checkpoint, then a "crash".
	for i := 10; i < 15; i++ {
		add(c, rec, "mere", i, 4+float64(i)/10, "x")
	}
	spWaitFor(t, "25 acks", 5*time.Second, func() bool { return len(rec.list()) == 25 })
	qc.wrote, dups.wrote = nil, nil
	seq2, err := c.WriteState(false, qc.put, dups.put)
	if err != nil || seq2 != 25 || !slices.Equal(qc.wrote, []string{"mere"}) || !slices.Equal(dups.wrote, []string{"mere"}) {
		t.Fatalf("second save: seq %d, qc %v, dups %v, %v", seq2, qc.wrote, dups.wrote, err)
	}
	cancel()
	<-done
	s.Close()

	// The second save's chunks over the first's restore the memory at 25.
	var rt, rtDups chunkMap
	s, _ = OpenSpool(path, SpoolOptions{})
	defer s.Close()
	c0 := NewCommitter(CommitterOptions{Spool: s, DuplicateWindow: 16})
	if _, err := c0.RestoreChunks(maps.All(qc.chunks), maps.All(dups.chunks), 25); err != nil {
		t.Fatal(err)
	}
	if _, err := c0.WriteState(true, rt.put, rtDups.put); err != nil {
		t.Fatal(err)
	}
	for site := range qc.chunks {
		if !bytes.Equal(rt.chunks[site], qc.chunks[site]) || !bytes.Equal(rtDups.chunks[site], dups.chunks[site]) {
			t.Fatalf("site %s: restored memory differs from the saved one", site)
		}
	}
	m := NewMetrics(nil)
	c = NewCommitter(CommitterOptions{Spool: s, Metrics: m, DuplicateWindow: 16})
	n, err := c.RestoreChunks(maps.All(qc.chunks), maps.All(dups.chunks), 25)
	if err != nil || n != 0 {
		t.Fatalf("restore replayed %d readings (%v), want 0", n, err)
	}
	ctx, cancel = context.WithCancel(context.Background())
	defer cancel()
	go func() { done <- c.Run(ctx) }()
	rec2 := &spRecorder{}
	// Redeliveries: "mere" from the second save's chunk, "tarn" from the
	// first save's (not rewritten since).
	add(c, rec2, "mere", 3, 4+float64(3)/10, "dup")
	add(c, rec2, "mere", 12, 4+float64(12)/10, "dup")
	add(c, rec2, "tarn", 4, 9, "dup")
	add(c, rec2, "mere", 13, 7, "changed")
	spWaitFor(t, "4 acks", 5*time.Second, func() bool { return len(rec2.list()) == 4 })
	if v := spValue(m.ReadingsDuplicate); v != 3 {
		t.Fatalf("duplicates after restore: %v, want 3", v)
	}
	es, _ := s.ReadReadings(25, 10, nil)
	if len(es) != 1 || es[0].QC&QCDuplicate == 0 || es[0].TempC != 7 {
		t.Fatalf("after restore: %+v", es)
	}
}

// TestAssemblerSiteStates: the per-site form restores the same state as the
// whole document, and refuses another profile interval or a site saved
// under another id.
func TestAssemblerSiteStates(t *testing.T) {
	rs := asmStream()
	exp := map[string][]float64{"x": {0.5, 2, 6}}
	a := NewAssembler(10*time.Minute, 15*time.Minute, exp)
	var col asmCollector
	asmRunStream(a, rs[:len(rs)/2], &col)
	states := map[string][]byte{}
	for _, id := range a.Sites() {
		b, ok, err := a.AppendSiteState(nil, id)
		if err != nil || !ok {
			t.Fatalf("site %s: %v %v", id, ok, err)
		}
		states[id] = b
	}
	if _, ok, _ := a.AppendSiteState(nil, "no-such-site"); ok {
		t.Error("state of an unknown site")
	}
	a2 := NewAssembler(10*time.Minute, 15*time.Minute, exp)
	if err := a2.RestoreSites(int64(10*time.Minute), states); err != nil {
		t.Fatal(err)
	}
	want, _ := a.State()
	got, _ := a2.State()
	if !bytes.Equal(want, got) {
		t.Fatalf("per-site restore differs:\n%s\n%s", got, want)
	}
	if err := a2.RestoreSites(int64(5*time.Minute), states); err == nil {
		t.Error("another profile interval accepted")
	}
	for id, b := range states {
		if err := a2.RestoreSites(int64(10*time.Minute), map[string][]byte{id + "-other": b}); err == nil {
			t.Error("a site saved under another id accepted")
		}
		break
	}
	if after, _ := a2.State(); !bytes.Equal(want, after) {
		t.Error("a refused restore changed the state")
	}
}
