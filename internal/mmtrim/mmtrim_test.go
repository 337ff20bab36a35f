package mmtrim

import (
	"bytes"
	"encoding/binary"
	"os"
	"path/filepath"
	"runtime"
	"strconv"
	"strings"
	"sync"
	"testing"

	bolt "go.etcd.io/bbolt"
)

// rssFileKiB reads RssFile (resident file-backed pages) of this process
// from /proc/self/status (proc(5)).
func rssFileKiB(t *testing.T) int {
	t.Helper()
	raw, err := os.ReadFile("/proc/self/status")
	if err != nil {
		t.Skipf("no /proc/self/status: %v", err)
	}
	for _, l := range strings.Split(string(raw), "\n") {
		if f := strings.Fields(l); len(f) >= 2 && f[0] == "RssFile:" {
			n, _ := strconv.Atoi(f[1])
			return n
		}
	}
	t.Skip("no RssFile line")
	return 0
}

func value(i int) []byte {
	v := bytes.Repeat([]byte{byte(i)}, 4000)
	binary.BigEndian.PutUint64(v, uint64(i))
	return v
}

func key(i int) []byte { return binary.BigEndian.AppendUint64(nil, uint64(i)) }

// readAll touches every value through the mapping and checks it.
func readAll(t *testing.T, db *bolt.DB, n int) {
	t.Helper()
	err := db.View(func(tx *bolt.Tx) error {
		b := tx.Bucket([]byte("b"))
		for i := 0; i < n; i++ {
			if v := b.Get(key(i)); !bytes.Equal(v, value(i)) {
				t.Fatalf("value %d differs after trimming", i)
			}
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
}

// TestTrimDropsResidentPagesKeepsData: after reading 20 MB through the
// mapping, Trim takes those pages out of the resident set (RssFile), and
// every value reads back unchanged.
func TestTrimDropsResidentPagesKeepsData(t *testing.T) {
	if runtime.GOOS != "linux" {
		t.Skip("madvise trimming is Linux only")
	}
	db, err := bolt.Open(filepath.Join(t.TempDir(), "t.db"), 0o600, &bolt.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	const n = 5000 // 4,000-byte values: 20 MB
	if err := db.Update(func(tx *bolt.Tx) error {
		b, err := tx.CreateBucket([]byte("b"))
		if err != nil {
			return err
		}
		for i := 0; i < n; i++ {
			if err := b.Put(key(i), value(i)); err != nil {
				return err
			}
		}
		return nil
	}); err != nil {
		t.Fatal(err)
	}
	readAll(t, db, n)
	before := rssFileKiB(t)
	if err := Trim(db); err != nil {
		t.Fatal(err)
	}
	after := rssFileKiB(t)
	t.Logf("RssFile %d KiB → %d KiB", before, after)
	if before-after < 15<<10 {
		t.Fatalf("RssFile fell by %d KiB after reading 20 MB through the mapping and trimming, want at least 15 MiB", before-after)
	}
	readAll(t, db, n)
}

// TestTrimWhileFileGrows: trimming in a loop while another goroutine grows
// the file (bbolt remaps) and a third reads: no fault, nothing changed.
func TestTrimWhileFileGrows(t *testing.T) {
	db, err := bolt.Open(filepath.Join(t.TempDir(), "t.db"), 0o600, &bolt.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	if err := db.Update(func(tx *bolt.Tx) error { _, err := tx.CreateBucket([]byte("b")); return err }); err != nil {
		t.Fatal(err)
	}
	stop := make(chan struct{})
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		for {
			select {
			case <-stop:
				return
			default:
			}
			if err := Trim(db); err != nil {
				t.Error(err)
				return
			}
		}
	}()
	const n = 6000
	for i := 0; i < n; i += 200 {
		if err := db.Update(func(tx *bolt.Tx) error {
			b := tx.Bucket([]byte("b"))
			for j := i; j < i+200; j++ {
				if err := b.Put(key(j), value(j)); err != nil {
					return err
				}
			}
			return nil
		}); err != nil {
			t.Fatal(err)
		}
		readAll(t, db, i+200)
	}
	close(stop)
	wg.Wait()
}

// TestTrimClosedDatabase: a database closed meanwhile (the daemon reopens
// its outbox on reload) is no error.
func TestTrimClosedDatabase(t *testing.T) {
	db, err := bolt.Open(filepath.Join(t.TempDir(), "t.db"), 0o600, nil)
	if err != nil {
		t.Fatal(err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	if err := Trim(db); err != nil {
		t.Fatalf("trim of a closed database: %v", err)
	}
}
