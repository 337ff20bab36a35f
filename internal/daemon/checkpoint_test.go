package daemon

import (
	"bytes"
	"path/filepath"
	"runtime/debug"
	"testing"
	"time"

	bolt "go.etcd.io/bbolt"

	"holomix/config"
	"holomix/detect"
	"holomix/ingest"
	"holomix/internal/engine"
)

type nopSink struct{}

func (nopSink) Column(_ detect.Column, _ detect.Profile) {}
func (nopSink) Event(detect.Event)                       {}

// TestCheckpointMigratesSingleDocument: a state.db written by an earlier
// version (one JSON document each for detection and quality control) is
// read at start; the next checkpoint rewrites it per site and drops the old
// keys; a restart restores the same state from the per-site form.
func TestCheckpointMigratesSingleDocument(t *testing.T) {
	cfg := dtConfig(t, "tcp://127.0.0.1:1") // never connected
	t0 := time.Date(2025, 7, 1, 0, 0, 0, 0, time.UTC)
	var rs []ingest.Reading
	for step := 0; step < 5; step++ {
		for _, d := range []float64{1, 5, 10} {
			ts := t0.Add(time.Duration(step) * 10 * time.Minute)
			rs = append(rs, ingest.Reading{Site: "fen-water", Depth: d, Time: ts, TempC: 18 - d})
			rs = append(rs, ingest.Reading{Site: "reed-pool", Depth: d / 2, Time: ts, TempC: 15 - d/4}) // not configured
		}
	}
	// The earlier version's checkpoint.
	eng, err := engine.New(cfg, nopSink{})
	if err != nil {
		t.Fatal(err)
	}
	qcc := ingest.QCConfigFrom(cfg)
	qcc.DuplicateWindow = redeliveryWindow
	qc := ingest.NewQualityControl(qcc)
	for _, r := range rs {
		qc.Check(&r, r.Time.Add(time.Minute))
		eng.Add(r)
	}
	engDoc, err := eng.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	qcDoc, err := qc.State()
	if err != nil {
		t.Fatal(err)
	}
	// One reading spooled after that checkpoint (quality control replays it).
	sp, err := ingest.OpenSpool(filepath.Join(cfg.Storage.Dir, "spool.db"), ingest.SpoolOptions{})
	if err != nil {
		t.Fatal(err)
	}
	late := ingest.Reading{Site: "fen-water", Depth: 1, Time: t0.Add(time.Hour), TempC: 17}
	if _, err := sp.Commit([]ingest.Entry{{Recv: late.Time, Reading: late}}, nil); err != nil {
		t.Fatal(err)
	}
	sp.Close()
	db, err := bolt.Open(filepath.Join(cfg.Storage.Dir, "state.db"), 0o640, nil)
	if err != nil {
		t.Fatal(err)
	}
	err = db.Update(func(tx *bolt.Tx) error {
		b, err := tx.CreateBucket(bktCheckpoint)
		if err != nil {
			return err
		}
		for _, kv := range [][2][]byte{{keyEngine, engDoc}, {keyEngineSeq, be64(0)}, {keyQC, qcDoc}, {keyQCSeq, be64(0)}} {
			if err := b.Put(kv[0], kv[1]); err != nil {
				return err
			}
		}
		return nil
	})
	db.Close()
	if err != nil {
		t.Fatal(err)
	}

	// Start: the single documents are read.
	d, err := open(Options{Config: cfg})
	if err != nil {
		t.Fatal(err)
	}
	if got, _ := d.eng.Snapshot(); !bytes.Equal(got, engDoc) {
		t.Fatal("detection state differs from the single document")
	}
	qc.Check(&late, late.Time) // the replayed reading
	wantQC, _ := qc.State()
	if got, _, _, _ := d.com.Snapshot(); !bytes.Equal(got, wantQC) {
		t.Fatal("quality-control memory differs from the single document plus the replay")
	}
	if took := d.checkpoint(); took == 0 || d.saved.qc != 1 {
		t.Fatalf("no checkpoint written (qc seq %d)", d.saved.qc)
	}
	err = d.state.View(func(tx *bolt.Tx) error {
		b := tx.Bucket(bktCheckpoint)
		for _, k := range [][]byte{keyEngine, keyQC, keyDups} {
			if b.Get(k) != nil {
				t.Errorf("key %s still there", k)
			}
		}
		if u64(b.Get(keyFormat)) != checkpointFormat {
			t.Error("format not recorded")
		}
		if n := b.Bucket(bktEngineSites).Stats().KeyN; n != 2 {
			t.Errorf("%d engine site chunks, want 2", n)
		}
		if n := b.Bucket(bktQCSites).Stats().KeyN; n != 2 {
			t.Errorf("%d quality-control site chunks, want 2", n)
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	d.closeAll()

	// Restart: the per-site form restores the same state.
	d2 := reopenSame(t, cfg, engDoc, wantQC, "after the per-site round trip")
	if d2.saved.eng != 0 || d2.saved.qc != 1 {
		t.Fatalf("sequences %d/%d, want 0/1", d2.saved.eng, d2.saved.qc)
	}

	// The per-site form of the previous version (format 2: chunks stored
	// uncompressed) is read too, and the next checkpoint compresses it.
	err = d2.state.Update(func(tx *bolt.Tx) error {
		b := tx.Bucket(bktCheckpoint)
		for _, name := range ckBuckets {
			nb := b.Bucket(name)
			plain := map[string][]byte{}
			if err := nb.ForEach(func(k, v []byte) error {
				c, err := inflate(v)
				if err != nil {
					return err
				}
				if len(v) >= len(c) && len(c) > 200 {
					t.Errorf("chunk %s/%s stored in %d bytes, %d uncompressed", name, k, len(v), len(c))
				}
				plain[string(k)] = c
				return nil
			}); err != nil {
				return err
			}
			for k, v := range plain {
				if err := nb.Put([]byte(k), v); err != nil {
					return err
				}
			}
		}
		return b.Put(keyFormat, be64(checkpointFormatPlain))
	})
	if err != nil {
		t.Fatal(err)
	}
	d2.closeAll()
	d3 := reopenSame(t, cfg, engDoc, wantQC, "after reading the uncompressed per-site format")
	d3.fed++ // something to save
	if took := d3.checkpoint(); took == 0 {
		t.Fatal("no checkpoint written after the format-2 start")
	}
	_ = d3.state.View(func(tx *bolt.Tx) error {
		if f := u64(tx.Bucket(bktCheckpoint).Get(keyFormat)); f != checkpointFormat {
			t.Errorf("format %d after the rewrite, want %d", f, checkpointFormat)
		}
		return nil
	})
}

// reopenSame opens the daemon's storage again and fails unless detection
// state and quality-control memory are the ones given; the daemon is closed
// on cleanup.
func reopenSame(t *testing.T, cfg *config.Config, engDoc, wantQC []byte, when string) *daemon {
	t.Helper()
	d, err := open(Options{Config: cfg})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(d.closeAll)
	if got, _ := d.eng.Snapshot(); !bytes.Equal(got, engDoc) {
		t.Fatal("detection state differs " + when)
	}
	if got, _, _, _ := d.com.Snapshot(); !bytes.Equal(got, wantQC) {
		t.Fatal("quality-control memory differs " + when)
	}
	return d
}

// TestApplyMemoryLimit: storage.memory_limit becomes the runtime's soft
// limit unless GOMEMLIMIT is set, with the GC growth factor raised unless
// GOGC is set; the previous settings come back afterwards.
func TestApplyMemoryLimit(t *testing.T) {
	before := debug.SetMemoryLimit(-1)
	t.Setenv("GOMEMLIMIT", "")
	t.Setenv("GOGC", "")
	gcBefore := debug.SetGCPercent(100)
	debug.SetGCPercent(gcBefore)
	restore := applyMemoryLimit(300<<20, nil)
	if got := debug.SetMemoryLimit(-1); got != 300<<20 {
		t.Errorf("limit %d, want %d", got, 300<<20)
	}
	if got := debug.SetGCPercent(gcPercentUnderLimit); got != gcPercentUnderLimit {
		t.Errorf("GC percent %d under the limit, want %d", got, gcPercentUnderLimit)
	}
	restore()
	if got := debug.SetMemoryLimit(-1); got != before {
		t.Errorf("limit %d after restore, want %d", got, before)
	}
	if got := debug.SetGCPercent(gcBefore); got != gcBefore {
		t.Errorf("GC percent %d after restore, want %d", got, gcBefore)
	}
	t.Setenv("GOGC", "150") // an explicit GOGC wins
	applyMemoryLimit(300<<20, nil)()
	if got := debug.SetGCPercent(gcBefore); got != gcBefore {
		t.Errorf("GC percent %d with GOGC set, want it untouched (%d)", got, gcBefore)
	}
	applyMemoryLimit(0, nil)() // no limit configured: nothing changes
	if got := debug.SetMemoryLimit(-1); got != before {
		t.Errorf("limit %d with none configured, want %d", got, before)
	}
	t.Setenv("GOMEMLIMIT", "1GiB") // read by the runtime at start only; here it just takes precedence
	applyMemoryLimit(300<<20, nil)()
	if got := debug.SetMemoryLimit(-1); got != before {
		t.Errorf("limit %d with GOMEMLIMIT set, want %d", got, before)
	}
}
