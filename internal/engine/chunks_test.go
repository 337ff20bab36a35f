package engine

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"maps"
	"slices"
	"strings"
	"testing"
	"time"

	"holomix/ingest"
)

// chunkStore keeps the latest chunk per site, as state.db does.
type chunkStore struct {
	head   []byte
	chunks map[string][]byte
	wrote  []string // sites written by the last save
}

func (c *chunkStore) save(t *testing.T, e *Engine, all bool) {
	t.Helper()
	if c.chunks == nil {
		c.chunks = map[string][]byte{}
	}
	c.wrote = nil
	head, err := e.WriteStateChunks(all, func(site string, chunk []byte) error {
		c.chunks[site] = bytes.Clone(chunk)
		c.wrote = append(c.wrote, site)
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	c.head = head
}

// TestEngine_ChunkedCheckpointsSameEvents: checkpoints that write only the
// sites changed since the previous one, restored at any of them, give the
// same state and the same events as an uninterrupted run. Data: the Trout
// Bog hourly record (NTL-LTER open data, shared/data/ntl/SOURCES.md) at its
// own site, and its first 2,000 readings again at a second site that then
// falls silent, so that its chunk is saved once and must still be restored.
func TestEngine_ChunkedCheckpointsSameEvents(t *testing.T) {
	rs := ntlReadings(t)
	second := func(r ingest.Reading) ingest.Reading { r.Site = "quiet-copy"; return r }
	feed := func(e *Engine, from, to int) {
		for i := from; i < to; i++ {
			e.Add(rs[i])
			if i < 2000 {
				e.Add(second(rs[i]))
			}
		}
	}
	var whole recSink
	ref, _ := New(nil, &whole)
	feed(ref, 0, len(rs))
	ref.Flush()
	want := strings.Join(eventsJSON(t, whole.events), "\n")
	if want == "" {
		t.Fatal("no events from Trout Bog")
	}

	var parts recSink
	e, _ := New(nil, &parts)
	var store chunkStore
	cuts := []int{0, 500, 2500, len(rs) / 3, len(rs)/3 + 1, len(rs) * 2 / 3}
	prev := 0
	for i, cut := range cuts {
		feed(e, prev, cut)
		prev = cut
		store.save(t, e, false)
		switch {
		case i == 0 && len(store.wrote) != 0:
			t.Fatalf("nothing fed yet, but wrote %v", store.wrote)
		case cut > 2000 && i > 2 && slices.Contains(store.wrote, "quiet-copy"):
			t.Fatalf("cut %d: the silent site was written again", cut)
		case cut == len(rs)/3+1 && len(store.wrote) != 1:
			t.Fatalf("one reading of one site changed, wrote %v", store.wrote)
		}
		var again chunkStore
		again.save(t, e, false)
		if len(again.wrote) != 0 {
			t.Fatalf("cut %d: nothing changed, wrote %v", cut, again.wrote)
		}
		// A restore from what is saved equals the engine it was saved from.
		var sink recSink
		r, _ := New(nil, &sink)
		if err := r.RestoreChunks(store.head, maps.All(store.chunks)); err != nil {
			t.Fatalf("cut %d: %v", cut, err)
		}
		got, err := r.Snapshot()
		if err != nil {
			t.Fatal(err)
		}
		exp, err := e.Snapshot()
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(got, exp) {
			t.Fatalf("cut %d: restored state differs from the saved engine's", cut)
		}
	}
	// Continue from the last checkpoint in a restored engine.
	e2, _ := New(nil, &parts)
	if err := e2.RestoreChunks(store.head, maps.All(store.chunks)); err != nil {
		t.Fatal(err)
	}
	feed(e2, prev, len(rs))
	e2.Flush()
	if got := strings.Join(eventsJSON(t, parts.events), "\n"); got != want {
		t.Errorf("%d events with chunked checkpoints, %d uninterrupted", len(parts.events), len(whole.events))
	}
	if parts.columns != whole.columns {
		t.Errorf("%d columns, uninterrupted %d", parts.columns, whole.columns)
	}

	// Damaged input is refused and leaves the state alone.
	before, _ := e2.Snapshot()
	bad := map[string][]byte{"trout": {chunkVersion, chunkHasDet, 0, 0, 0, 0, 0, 0, 0, 0, 200}}
	if err := e2.RestoreChunks(store.head, maps.All(bad)); err == nil {
		t.Error("truncated chunk accepted")
	}
	if err := e2.RestoreChunks([]byte(`{"version":1}`), maps.All(store.chunks)); err == nil {
		t.Error("head of another version accepted")
	}
	if after, _ := e2.Snapshot(); !bytes.Equal(before, after) {
		t.Error("a refused restore changed the state")
	}
}

// BenchmarkWriteStateChunks: the full checkpoint of 1,000 sites of 30
// sensors (synthetic profiles, 13 intervals each, the last one open).
func BenchmarkWriteStateChunks(b *testing.B) {
	var sink recSink
	e, _ := New(nil, &sink)
	t0 := time.Date(2025, 7, 1, 0, 0, 0, 0, time.UTC)
	for step := 0; step < 13; step++ {
		for s := 0; s < 1000; s++ {
			for k := 0; k < 30; k++ {
				e.Add(ingest.Reading{Site: fmt.Sprintf("lake%04d", s), Depth: 0.5 + float64(k),
					Time: t0.Add(time.Duration(step) * 10 * time.Minute), TempC: 20 - 0.5*float64(k) + 0.01*float64(step%7)})
			}
		}
	}
	var det, total int
	b.ResetTimer()
	for range b.N {
		total = 0
		head, err := e.WriteStateChunks(true, func(_ string, c []byte) error {
			total += len(c)
			n, k := binary.Uvarint(c[10:])
			det = int(n) + k
			return nil
		})
		if err != nil {
			b.Fatal(err)
		}
		total += len(head)
	}
	b.ReportMetric(float64(total)/1e6, "MB/checkpoint")
	b.ReportMetric(float64(det), "detector-bytes/site")
}
