// Package mmtrim keeps the memory-mapped bbolt files (spool, detector state,
// alert outbox) out of the daemon's resident set.
//
// bbolt reads its file through a read-only shared mapping. Every page a
// reader touches stays mapped, and so counts in the process's resident set
// size (RssFile in /proc/PID/status), until the kernel reclaims it or bbolt
// remaps a grown file. A spool that buffers a database outage or a backlog
// touches tens of megabytes this way. Trim drops those mappings with
// madvise(MADV_DONTNEED): for a shared file mapping the pages stay in the
// kernel's page cache (clean, shared, reclaimable) and the next access maps
// them again with a minor fault (madvise(2), Linux man-pages); nothing is
// lost and nothing is read from disk again while the page cache keeps them.
package mmtrim

import (
	"errors"
	"fmt"

	bolt "go.etcd.io/bbolt"
	berrors "go.etcd.io/bbolt/errors"
)

// Trim drops the resident pages of db's mapping from the process's page
// tables. It holds a read transaction meanwhile, which keeps bbolt from
// remapping the file under it (bbolt remaps only when no read transaction
// is open), and covers the pages in use (the transaction's Size). A closed
// database is no error.
func Trim(db *bolt.DB) error {
	tx, err := db.Begin(false)
	if errors.Is(err, berrors.ErrDatabaseNotOpen) {
		return nil // closed meanwhile (a reload reopens the outbox): nothing mapped
	}
	if err != nil {
		return fmt.Errorf("mmtrim: %w", err)
	}
	defer func() { _ = tx.Rollback() }()
	if err := dontNeed(db.Info().Data, tx.Size()); err != nil {
		return fmt.Errorf("mmtrim: %s: %w", db.Path(), err)
	}
	return nil
}
