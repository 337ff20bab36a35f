package main

import (
	"context"
	"fmt"
	"os"
	"path/filepath"

	"github.com/influxdata/influxdb-client-go/v2/api/write"

	"holomix/config"
	"holomix/detect"
	"holomix/ingest"
	"holomix/internal/engine"
)

// backfillBatch is the number of readings spooled between two database flushes.
const backfillBatch = 50000

// backfill writes replayed readings and derived points through the same spool
// and writer the daemon uses (same line protocol, same handling of refused
// points), with a throw-away spool in a temporary directory: the recorded
// files are the durable copy.
type backfill struct {
	ctx     context.Context
	dir     string
	spool   *ingest.Spool
	writer  *ingest.Writer
	entries []ingest.Entry
	points  []*write.Point
	err     error
	closed  bool

	nReadings, nDerived int64
}

func newBackfill(ctx context.Context, cfg *config.Config) (*backfill, error) {
	dir, err := os.MkdirTemp("", "holomix-replay-")
	if err != nil {
		return nil, fmt.Errorf("temporary spool: %w", err)
	}
	sp, err := ingest.OpenSpool(filepath.Join(dir, "spool.db"), ingest.SpoolOptions{NoSync: true})
	if err != nil {
		os.RemoveAll(dir)
		return nil, err
	}
	tlsCfg, err := cfg.Influx.TLS.ClientConfig()
	if err != nil {
		sp.Close()
		os.RemoveAll(dir)
		return nil, fmt.Errorf("influx TLS: %w", err)
	}
	w, err := ingest.NewWriter(ingest.WriterOptions{
		Spool: sp, URL: cfg.Influx.URL, Org: cfg.Influx.Org, Bucket: cfg.Influx.Bucket, Token: cfg.Influx.Token.Get(),
		TLS: tlsCfg, Timeout: cfg.Influx.Timeout.D(), BatchSize: cfg.Influx.BatchSize, InFlight: cfg.Influx.WritesInFlight,
	})
	if err != nil {
		sp.Close()
		os.RemoveAll(dir)
		return nil, err
	}
	return &backfill{ctx: ctx, dir: dir, spool: sp, writer: w, entries: make([]ingest.Entry, 0, backfillBatch)}, nil
}

// reading queues one reading (flags included); every backfillBatch readings
// the queue goes to the database.
func (b *backfill) reading(r ingest.Reading) error {
	if b.err != nil {
		return b.err
	}
	b.entries = append(b.entries, ingest.Entry{Recv: r.Time, Reading: r})
	if len(b.entries) >= backfillBatch {
		return b.flush()
	}
	return nil
}

// derived queues the point of a column or an event (engine.ColumnPoint,
// engine.EventPoint).
func (b *backfill) derived(c *detect.Column, ev *detect.Event) {
	switch {
	case c != nil:
		b.points = append(b.points, engine.ColumnPoint(*c))
	case ev != nil:
		b.points = append(b.points, engine.EventPoint(*ev))
	}
}

func (b *backfill) flush() error {
	if b.err != nil {
		return b.err
	}
	if len(b.entries) > 0 {
		last, err := b.spool.Commit(b.entries, nil)
		if err != nil {
			b.err = err
			return err
		}
		// Detection state is not kept by a replay: the spool may drop the
		// readings as soon as the database has them.
		if err := b.spool.SetCheckpoint(last); err != nil {
			b.err = err
			return err
		}
		b.nReadings += int64(len(b.entries))
		clear(b.entries)
		b.entries = b.entries[:0]
	}
	if len(b.points) > 0 {
		if err := b.spool.AppendPoints(b.points); err != nil {
			b.err = err
			return err
		}
		b.nDerived += int64(len(b.points))
		clear(b.points)
		b.points = b.points[:0]
	}
	if err := b.writer.Flush(b.ctx); err != nil {
		b.err = fmt.Errorf("write to %s: %w", "InfluxDB", err)
		return b.err
	}
	return nil
}

// close writes what is left and removes the temporary spool.
func (b *backfill) close() error {
	if b.closed {
		return b.err
	}
	err := b.flush()
	b.discard()
	return err
}

// discard releases the writer and removes the temporary spool without
// writing what is still queued (after a failure). It is safe to call twice.
func (b *backfill) discard() {
	if b.closed {
		return
	}
	b.closed = true
	b.writer.Close()
	_ = b.spool.Close()
	_ = os.RemoveAll(b.dir)
}
