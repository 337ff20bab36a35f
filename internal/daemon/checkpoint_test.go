package daemon

import (
	"bytes"
	"path/filepath"
	"runtime/debug"
	"testing"
	"time"

	bolt "go.etcd.io/bbolt"

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
	d2, err := open(Options{Config: cfg})
	if err != nil {
		t.Fatal(err)
	}
	defer d2.closeAll()
	if got, _ := d2.eng.Snapshot(); !bytes.Equal(got, engDoc) {
		t.Fatal("detection state differs after the per-site round trip")
	}
	if got, _, _, _ := d2.com.Snapshot(); !bytes.Equal(got, wantQC) {
		t.Fatal("quality-control memory differs after the per-site round trip")
	}
	if d2.saved.eng != 0 || d2.saved.qc != 1 {
		t.Fatalf("sequences %d/%d, want 0/1", d2.saved.eng, d2.saved.qc)
	}
}

// TestApplyMemoryLimit: storage.memory_limit becomes the runtime's soft
// limit unless GOMEMLIMIT is set; the previous limit comes back afterwards.
func TestApplyMemoryLimit(t *testing.T) {
	before := debug.SetMemoryLimit(-1)
	t.Setenv("GOMEMLIMIT", "")
	restore := applyMemoryLimit(300<<20, nil)
	if got := debug.SetMemoryLimit(-1); got != 300<<20 {
		t.Errorf("limit %d, want %d", got, 300<<20)
	}
	restore()
	if got := debug.SetMemoryLimit(-1); got != before {
		t.Errorf("limit %d after restore, want %d", got, before)
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
