// Package export streams stored series out of InfluxDB into tidy files for
// researchers: readings (measurement water_temperature), column records
// (water_column) and events (lake_event) of one site over a time range, as CSV
// or JSON Lines, in a long or a wide layout.
//
// Memory stays constant whatever the range: the range is cut into chunks (one
// day of readings, thirty days of column records), each chunk is one Flux query
// whose result is read record by record from the HTTP response, and every
// record is written out before the next is read. Only the current wide row is
// held. A year of one-minute data from twenty sensors is about 10 million
// readings; none of them is ever collected.
//
// Files:
//
//	readings, long:  time,site,depth_m,temp_c,qc                one row per stored reading
//	readings, wide:  time,site,temp_c_0.5m,temp_c_1m,...         one row per instant, one column per depth
//	columns,  long:  time,site,field,value                       one row per stored field
//	columns,  wide:  time,site,<field>,...                       one row per column record
//	events:          time,site,kind,status,severity,subject,season,from,to,confidence,summary,<metric>,...
//
// Times are RFC 3339 in UTC, depths metres below the surface, temperatures °C;
// the units of column fields and event metrics are in their names (e.g.
// schmidt_j_m2, density_diff_kg_m3). Rows are in time order, then depth order
// (readings) or field order (columns). Both reading layouts are files that
// `holomix replay` reads back (its CSV reader takes time, site, depth_m, temp_c
// and wide headers such as temp_c_0.5m; it ignores qc). The JSON format writes
// the same rows as one JSON object per line, empty cells left out.
//
// The sensor tag is not exported: two sensors at one depth give two long rows
// with the same time and depth, and the wide layout keeps the later of them.
package export

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"net/http"
	"sort"
	"strconv"
	"strings"
	"time"

	"github.com/influxdata/influxdb-client-go/v2/api"
	ihttp "github.com/influxdata/influxdb-client-go/v2/api/http"
	"github.com/influxdata/influxdb-client-go/v2/api/query"

	"holomix/ingest"
)

// Stored measurements of the derived series, as internal/engine writes them
// (measurementColumn and measurementEvent; a test checks they agree).
const (
	measurementColumn = "water_column"
	measurementEvent  = "lake_event"
)

// What is exported.
const (
	WhatReadings = "readings"
	WhatColumns  = "columns"
	WhatEvents   = "events"
)

// Formats and layouts.
const (
	FormatCSV  = "csv"
	FormatJSON = "json"
	LayoutLong = "long"
	LayoutWide = "wide"
)

// Default chunk lengths: one query covers at most this much time.
const (
	DefaultReadingsChunk = 24 * time.Hour
	DefaultColumnsChunk  = 30 * 24 * time.Hour
)

// ErrBadOptions marks an error in Options (a usage error, nothing was queried).
var ErrBadOptions = errors.New("export")

// Querier runs a Flux query and streams its result; influxdb-client-go's
// api.QueryAPI satisfies it.
type Querier interface {
	Query(ctx context.Context, flux string) (*api.QueryTableResult, error)
}

// Options say what to export.
type Options struct {
	Bucket string    // "database/retention" on InfluxDB 1.8, bucket name on 2.x
	Site   string    // site id
	From   time.Time // first instant included
	To     time.Time // first instant excluded
	What   string    // readings | columns | events (default readings)
	Format string    // csv | json (default csv)
	Layout string    // long | wide (default long; events have one layout)
	// UsableOnly leaves out readings whose QC flags keep them out of detection
	// (ingest.Excluding): long rows are dropped, wide cells left empty.
	UsableOnly bool
	// Chunk overrides the time covered by one query (0: the defaults above).
	Chunk time.Duration
}

// Stats say what was written.
type Stats struct {
	Rows    int64    // data rows written (header excluded)
	Queries int      // Flux queries run
	Columns []string // the header
}

func (o *Options) normalise() error {
	if o.What == "" {
		o.What = WhatReadings
	}
	if o.Format == "" {
		o.Format = FormatCSV
	}
	if o.Layout == "" {
		o.Layout = LayoutLong
	}
	var errs []string
	switch o.What {
	case WhatReadings, WhatColumns, WhatEvents:
	default:
		errs = append(errs, fmt.Sprintf("unknown --what %q (readings, columns or events)", o.What))
	}
	switch o.Format {
	case FormatCSV, FormatJSON:
	default:
		errs = append(errs, fmt.Sprintf("unknown --format %q (csv or json)", o.Format))
	}
	switch o.Layout {
	case LayoutLong:
	case LayoutWide:
		if o.What == WhatEvents {
			errs = append(errs, "events have one layout (one row per event): leave out --layout")
		}
	default:
		errs = append(errs, fmt.Sprintf("unknown --layout %q (long or wide)", o.Layout))
	}
	if o.Bucket == "" {
		errs = append(errs, "no bucket (influx.bucket in the configuration)")
	}
	if o.Site == "" {
		errs = append(errs, "no site (--site ID)")
	}
	if o.From.IsZero() || o.To.IsZero() {
		errs = append(errs, "--from and --to are both needed")
	} else if !o.From.Before(o.To) {
		errs = append(errs, fmt.Sprintf("--from %s is not before --to %s", rfc3339(o.From), rfc3339(o.To)))
	}
	if o.Chunk < 0 {
		errs = append(errs, "negative chunk length")
	}
	if len(errs) > 0 {
		return fmt.Errorf("%w: %s", ErrBadOptions, strings.Join(errs, "; "))
	}
	if o.Chunk == 0 {
		switch o.What {
		case WhatReadings:
			o.Chunk = DefaultReadingsChunk
		case WhatColumns:
			o.Chunk = DefaultColumnsChunk
		default:
			o.Chunk = o.To.Sub(o.From) // events are few: one query
		}
	}
	return nil
}

// Export writes the selected series to w and returns what it wrote. It stops
// at the first query or write error (the output is then incomplete: write to
// a temporary file and rename it on success, as `holomix export -o` does).
func Export(ctx context.Context, q Querier, o Options, w io.Writer) (Stats, error) {
	if err := o.normalise(); err != nil {
		return Stats{}, err
	}
	e := &exporter{ctx: ctx, q: q, o: o}
	var out sink
	if o.Format == FormatJSON {
		out = newJSONSink(w)
	} else {
		out = newCSVSink(w)
	}
	var err error
	switch o.What {
	case WhatReadings:
		if o.Layout == LayoutWide {
			err = e.readingsWide(out)
		} else {
			err = e.readingsLong(out)
		}
	case WhatColumns:
		err = e.columns(out)
	case WhatEvents:
		err = e.events(out)
	}
	if ferr := out.flush(); err == nil {
		err = ferr
	}
	return Stats{Rows: out.rows(), Queries: e.queries, Columns: e.header}, err
}

type exporter struct {
	ctx     context.Context
	q       Querier
	o       Options
	queries int
	header  []string
}

// fluxString quotes s as a Flux string literal.
func fluxString(s string) string {
	r := strings.NewReplacer(`\`, `\\`, `"`, `\"`, "${", `\${`, "\n", `\n`, "\r", `\r`, "\t", `\t`)
	return `"` + r.Replace(s) + `"`
}

func rfc3339(t time.Time) string { return t.UTC().Format(time.RFC3339Nano) }

// source is the common start of every query: bucket, range, measurement, site.
func (e *exporter) source(from, to time.Time, measurement string) string {
	// The explicit _time filter keeps stop exclusive everywhere: InfluxDB 1.8's
	// storage read returns points at exactly stop (2.x does not), which would
	// put a point on a chunk boundary in two chunks.
	return fmt.Sprintf("from(bucket: %s)\n  |> range(start: %s, stop: %s)\n  |> filter(fn: (r) => r._measurement == %s and r.site == %s and r._time < %s)",
		fluxString(e.o.Bucket), rfc3339(from), rfc3339(to), fluxString(measurement), fluxString(e.o.Site), rfc3339(to))
}

// each runs one query and calls fn for every record, streaming.
func (e *exporter) each(flux string, fn func(*query.FluxRecord) error) error {
	e.queries++
	res, err := e.q.Query(e.ctx, flux)
	if err != nil {
		return queryError(err)
	}
	defer res.Close()
	for res.Next() {
		if err := fn(res.Record()); err != nil {
			return err
		}
	}
	if err := res.Err(); err != nil {
		return fmt.Errorf("flux result: %w", err)
	}
	return nil
}

// queryError adds what to check to a refused query.
func queryError(err error) error {
	var he *ihttp.Error
	if errors.As(err, &he) {
		switch he.StatusCode {
		case http.StatusUnauthorized, http.StatusForbidden:
			return fmt.Errorf("flux query: InfluxDB refused the credentials (HTTP %d): check influx.token (InfluxDB 1.8: user:password with read access): %w", he.StatusCode, err)
		case http.StatusNotFound:
			return fmt.Errorf("flux query: not found (HTTP 404): check influx.url and influx.bucket (InfluxDB 1.8: database/retention): %w", err)
		}
	}
	return fmt.Errorf("flux query: %w", err)
}

// chunks calls fn for consecutive [from, to) windows covering the range.
func (e *exporter) chunks(fn func(from, to time.Time) error) error {
	for from := e.o.From; from.Before(e.o.To); {
		if err := e.ctx.Err(); err != nil {
			return err
		}
		to := from.Add(e.o.Chunk)
		if to.After(e.o.To) || to.Before(from) {
			to = e.o.To
		}
		if err := fn(from, to); err != nil {
			return err
		}
		from = to
	}
	return nil
}

// distinct returns the distinct values of a tag or of _field over the whole
// range (first record of each series, so the server returns one row per series).
func (e *exporter) distinct(measurement, field, column string) ([]string, error) {
	flux := e.source(e.o.From, e.o.To, measurement)
	if field != "" {
		flux += fmt.Sprintf("\n  |> filter(fn: (r) => r._field == %s)", fluxString(field))
	}
	flux += fmt.Sprintf("\n  |> first()\n  |> keep(columns: [%s])\n  |> group()\n  |> distinct(column: %s)", fluxString(column), fluxString(column))
	seen := map[string]bool{}
	var out []string
	err := e.each(flux, func(r *query.FluxRecord) error {
		if s, ok := r.Value().(string); ok && !seen[s] {
			seen[s] = true
			out = append(out, s)
		}
		return nil
	})
	return out, err
}

// readingsQuery returns one chunk's readings with temp_c and qc side by side,
// ordered by time then depth (numeric), as one table.
func (e *exporter) readingsQuery(from, to time.Time) string {
	return e.source(from, to, ingest.MeasurementReadings) + `
  |> filter(fn: (r) => r._field == "temp_c" or r._field == "qc")
  |> pivot(rowKey: ["_time"], columnKey: ["_field"], valueColumn: "_value")
  |> map(fn: (r) => ({r with depth: float(v: r.depth_m)}))
  |> keep(columns: ["_time", "site", "depth", "temp_c", "qc"])
  |> group(columns: ["site"])
  |> sort(columns: ["_time", "depth"])`
}

// reading is one row of readingsQuery.
type reading struct {
	t     time.Time
	depth float64
	temp  any // float64, or nil when the temp_c field is missing
	qc    any // int64, or nil for readings stored without QC flags
}

func (e *exporter) eachReading(fn func(reading) error) error {
	return e.chunks(func(from, to time.Time) error {
		return e.each(e.readingsQuery(from, to), func(r *query.FluxRecord) error {
			d, ok := r.ValueByKey("depth").(float64)
			if !ok {
				return fmt.Errorf("flux result: record without a numeric depth: %v", r.Values())
			}
			rd := reading{t: r.Time(), depth: d, temp: r.ValueByKey("temp_c"), qc: r.ValueByKey("qc")}
			if rd.temp == nil {
				return nil // a qc value without a temperature: nothing to export
			}
			if e.o.UsableOnly {
				if q, ok := rd.qc.(int64); ok && ingest.QC(q)&ingest.Excluding != 0 {
					return nil
				}
			}
			return fn(rd)
		})
	})
}

func (e *exporter) readingsLong(out sink) error {
	e.header = []string{"time", "site", "depth_m", "temp_c", "qc"}
	if err := out.begin(e.header); err != nil {
		return err
	}
	return e.eachReading(func(r reading) error {
		return out.row([]any{r.t, e.o.Site, r.depth, r.temp, r.qc})
	})
}

// WideColumn is the wide-layout column name of a depth: "temp_c_0.5m".
func WideColumn(depth float64) string {
	return "temp_c_" + strconv.FormatFloat(depth, 'f', -1, 64) + "m"
}

func (e *exporter) readingsWide(out sink) error {
	tags, err := e.distinct(ingest.MeasurementReadings, "temp_c", "depth_m")
	if err != nil {
		return err
	}
	var depths []float64
	seen := map[float64]bool{}
	for _, s := range tags {
		d, err := strconv.ParseFloat(s, 64)
		if err != nil || math.IsNaN(d) || math.IsInf(d, 0) {
			return fmt.Errorf("stored depth_m tag %q is not a number", s)
		}
		if !seen[d] {
			seen[d] = true
			depths = append(depths, d)
		}
	}
	sort.Float64s(depths)
	index := make(map[float64]int, len(depths))
	e.header = []string{"time", "site"}
	for i, d := range depths {
		index[d] = i + 2
		e.header = append(e.header, WideColumn(d))
	}
	if err := out.begin(e.header); err != nil {
		return err
	}
	row := make([]any, len(e.header))
	var cur time.Time
	filled := 0
	emit := func() error {
		if filled == 0 {
			return nil
		}
		row[0], row[1] = cur, e.o.Site
		err := out.row(row)
		clear(row)
		filled = 0
		return err
	}
	err = e.eachReading(func(r reading) error {
		if !r.t.Equal(cur) {
			if err := emit(); err != nil {
				return err
			}
			cur = r.t
		}
		i, ok := index[r.depth]
		if !ok {
			// A depth first stored after the discovery query ran: not in the header.
			return fmt.Errorf("depth %g m appeared during the export; run it again", r.depth)
		}
		if row[i] == nil {
			filled++
		}
		row[i] = r.temp
		return nil
	})
	if err != nil {
		return err
	}
	return emit()
}

// pivotQuery returns one chunk of a measurement with one row per time and one
// column per field, ordered by time (then by the given tag, e.g. kind).
func (e *exporter) pivotQuery(from, to time.Time, measurement string, thenBy ...string) string {
	sortCols := []string{`"_time"`}
	for _, c := range thenBy {
		sortCols = append(sortCols, fluxString(c))
	}
	return e.source(from, to, measurement) + `
  |> pivot(rowKey: ["_time"], columnKey: ["_field"], valueColumn: "_value")
  |> drop(columns: ["_start", "_stop", "_measurement"])
  |> group(columns: ["site"])
  |> sort(columns: [` + strings.Join(sortCols, ", ") + `])`
}

// columnFieldOrder are the fixed column-record columns, in the order
// engine.ColumnPoint documents them; projection fields follow sorted.
var columnFieldOrder = []string{
	"state", "seasonal", "reason", "surface_temp_c", "bottom_temp_c", "mean_temp_c", "density_diff_kg_m3",
	"tmd_c", "schmidt_j_m2", "thermocline_m", "max_n2_s2", "heat_to_tmd_j_m2", "sensors_used", "sensors_expected", "ice_inferred",
}

// eventFieldOrder are the fixed event columns (kind is a tag, the others
// fields); metric fields follow sorted.
var eventFieldOrder = []string{"kind", "status", "severity", "subject", "season", "from", "to", "confidence", "summary"}

// ordered returns the fixed columns (always, so files of different ranges
// share their first columns) followed by the other stored fields, sorted.
func ordered(fields []string, fixed []string) []string {
	known := map[string]bool{}
	for _, f := range fixed {
		known[f] = true
	}
	var rest []string
	for _, f := range fields {
		if !known[f] {
			known[f] = true
			rest = append(rest, f)
		}
	}
	sort.Strings(rest)
	return append(append([]string(nil), fixed...), rest...)
}

func (e *exporter) columns(out sink) error {
	fields, err := e.distinct(measurementColumn, "", "_field")
	if err != nil {
		return err
	}
	fields = ordered(fields, columnFieldOrder)
	if e.o.Layout == LayoutLong {
		e.header = []string{"time", "site", "field", "value"}
	} else {
		e.header = append([]string{"time", "site"}, fields...)
	}
	if err := out.begin(e.header); err != nil {
		return err
	}
	row := make([]any, len(e.header))
	return e.chunks(func(from, to time.Time) error {
		return e.each(e.pivotQuery(from, to, measurementColumn), func(r *query.FluxRecord) error {
			if e.o.Layout == LayoutLong {
				for _, f := range fields {
					if v := r.ValueByKey(f); v != nil {
						if err := out.row([]any{r.Time(), e.o.Site, f, v}); err != nil {
							return err
						}
					}
				}
				return nil
			}
			row[0], row[1] = r.Time(), e.o.Site
			for i, f := range fields {
				row[i+2] = r.ValueByKey(f)
			}
			return out.row(row)
		})
	})
}

func (e *exporter) events(out sink) error {
	fields, err := e.distinct(measurementEvent, "", "_field")
	if err != nil {
		return err
	}
	cols := ordered(fields, eventFieldOrder)
	e.header = append([]string{"time", "site"}, cols...)
	if err := out.begin(e.header); err != nil {
		return err
	}
	row := make([]any, len(e.header))
	return e.chunks(func(from, to time.Time) error {
		return e.each(e.pivotQuery(from, to, measurementEvent, "kind"), func(r *query.FluxRecord) error {
			row[0], row[1] = r.Time(), e.o.Site
			for i, f := range cols {
				row[i+2] = r.ValueByKey(f)
			}
			return out.row(row)
		})
	})
}
