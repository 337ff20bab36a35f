package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"time"

	"holomix/config"
	"holomix/internal/export"
)

const exportUsage = `usage: holomix export -c FILE --site ID --from T --to T
                      [--what readings|columns|events] [--format csv|json]
                      [--layout long|wide] [--usable-only] [-o FILE]

Write stored series of one site from the InfluxDB of the configuration's influx
section to a tidy file, streaming (constant memory for any range):

  readings, long   time,site,depth_m,temp_c,qc            one row per reading
  readings, wide   time,site,temp_c_0.5m,temp_c_1m,...    one row per instant, one column per depth
  columns,  long   time,site,field,value                  column records (state, Schmidt stability, ...)
  columns,  wide   time,site,state,seasonal,...           one row per column record
  events           time,site,kind,status,severity,...     one row per event

Times are RFC 3339 in UTC; --from is included, --to is not. A time without a
zone, or a date such as 2026-03-01, is UTC. Depths are metres below the surface,
temperatures °C; other units are in the column names. --format json writes one
JSON object per line with the same names. Both reading layouts can be fed back
to 'holomix replay'. qc holds the quality-control flags (0 = passed; see the
README); --usable-only drops readings whose flags keep them out of detection.
With -o the file appears only once the export is complete.

Exit codes: 0 ok, 1 database or write failure, 2 usage or configuration error.

options:`

func runExport(ctx context.Context, e *env, args []string) int {
	fs := flag.NewFlagSet("export", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	fs.Usage = func() {
		fmt.Fprintln(e.stderr, exportUsage)
		fs.PrintDefaults()
	}
	var cfgPath, from, to, outPath string
	var o export.Options
	fs.StringVar(&cfgPath, "c", "", "configuration file (its influx section says where to read)")
	fs.StringVar(&cfgPath, "config", "", "same as -c")
	fs.StringVar(&o.Site, "site", "", "site id")
	fs.StringVar(&from, "from", "", "first instant, included (RFC 3339 or YYYY-MM-DD, UTC)")
	fs.StringVar(&to, "to", "", "end instant, excluded (RFC 3339 or YYYY-MM-DD, UTC)")
	fs.StringVar(&o.What, "what", export.WhatReadings, "readings, columns or events")
	fs.StringVar(&o.Format, "format", export.FormatCSV, "csv or json (one object per line)")
	fs.StringVar(&o.Layout, "layout", export.LayoutLong, "long or wide (readings and columns)")
	fs.BoolVar(&o.UsableOnly, "usable-only", false, "leave out readings flagged by quality control")
	fs.DurationVar(&o.Chunk, "chunk", 0, "time covered by one query (default 24h for readings, 720h for columns)")
	fs.StringVar(&outPath, "o", "", "output file (default standard output)")
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return 0
		}
		return 2
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(e.stderr, "holomix export: unexpected argument %q\n", fs.Arg(0))
		return 2
	}
	if cfgPath == "" {
		fmt.Fprintln(e.stderr, "holomix export: -c FILE is needed (its influx section says where to read)")
		return 2
	}
	var err error
	if from != "" {
		if o.From, err = export.ParseTime(from); err != nil {
			fmt.Fprintf(e.stderr, "holomix export: --from: %v\n", err)
			return 2
		}
	}
	if to != "" {
		if o.To, err = export.ParseTime(to); err != nil {
			fmt.Fprintf(e.stderr, "holomix export: --to: %v\n", err)
			return 2
		}
	}
	cfg, ok := loadForCheck(e, cfgPath, config.Options{Getenv: e.getenv})
	if !ok {
		return 2
	}
	o.Bucket = cfg.Influx.Bucket
	if o.Site != "" && len(cfg.Sites) > 0 && !hasSite(cfg, o.Site) {
		fmt.Fprintf(e.stderr, "warning: site %q is not in %s; exporting what the database holds for it\n", o.Site, cfgPath)
	}
	q, closeQ, err := export.NewQuerier(cfg.Influx)
	if err != nil {
		fmt.Fprintf(e.stderr, "holomix export: %v\n", err)
		return 2
	}
	defer closeQ()

	var w io.Writer = e.stdout
	var tmp *os.File
	if outPath != "" && outPath != "-" {
		tmp, err = os.CreateTemp(filepath.Dir(outPath), "."+filepath.Base(outPath)+".partial-*")
		if err != nil {
			fmt.Fprintf(e.stderr, "holomix export: %v\n", err)
			return 1
		}
		defer os.Remove(tmp.Name()) // no-op after the rename
		w = tmp
	}
	start := time.Now()
	st, err := export.Export(ctx, q, o, w)
	if err != nil {
		if tmp != nil {
			tmp.Close()
		}
		fmt.Fprintf(e.stderr, "holomix export: %v\n", err)
		if errors.Is(err, export.ErrBadOptions) {
			return 2
		}
		return 1
	}
	if tmp != nil {
		if err := tmp.Chmod(0o644); err == nil {
			err = tmp.Sync()
		}
		if cerr := tmp.Close(); err == nil {
			err = cerr
		}
		if err == nil {
			err = os.Rename(tmp.Name(), outPath)
		}
		if err != nil {
			fmt.Fprintf(e.stderr, "holomix export: write %s: %v\n", outPath, err)
			return 1
		}
	}
	fmt.Fprintf(e.stderr, "exported %d %s row(s) of %s in %s (%d queries)\n", st.Rows, o.What, o.Site, time.Since(start).Round(time.Millisecond), st.Queries)
	return 0
}

func hasSite(cfg *config.Config, id string) bool {
	for _, s := range cfg.Sites {
		if s.ID == id {
			return true
		}
	}
	return false
}
