package ingest

import (
	"bufio"
	"bytes"
	"compress/flate"
	"compress/gzip"
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"
	"unicode/utf8"
)

// ErrBadFile marks a recorded file that cannot be read as a whole: no usable
// header, a column named by an option that does not exist, a corrupt gzip
// stream, a line longer than MaxFileLine. Errors of ReadFile and ReadStream
// that wrap it are bad input; others are I/O or the callback's errors.
var ErrBadFile = errors.New("unreadable recorded file")

// Recorded file formats (FileStats.Format).
const (
	FileCSVLong      = "csv-long"      // one reading per row: time, depth, temperature[, site]
	FileCSVWide      = "csv-wide"      // one row per instant: time[, site], one column per depth
	FileLineProtocol = "line-protocol" // InfluxDB line protocol, measurement water_temperature
)

// File reading limits and defaults.
const (
	// MaxFileLine is the longest line accepted in a recorded file (bytes).
	MaxFileLine = 4 << 20
	// DefaultFileExamples is how many bad-row examples FileStats keeps.
	DefaultFileExamples = 5
	// LineProtocolMeasurement is the measurement of stored readings (tags site,
	// depth_m, optional sensor; field temp_c).
	LineProtocolMeasurement = "water_temperature"
	maxInternedSites        = 4096
)

// Column names recognised in CSV headers (compared case-insensitively, after
// trimming spaces and quotes). FileOptions overrides them.
var (
	fileTimeCols  = [...]string{"time", "datetime_utc", "datetime", "timestamp", "date_time", "time_utc", "timestamp_utc"}
	fileDepthCols = [...]string{"depth", "depth_m"}
	fileTempCols  = [...]string{"temp", "temp_c", "temperature", "wtemp", "temperature_c", "water_temp", "water_temp_c"}
	fileSiteCols  = [...]string{"site", "lake", "site_id", "lake_id"}
	// Prefixes of wide-format depth columns: "temp_0.5", "wtr_0.5", "0.5", "temp_c_0.5m".
	fileWidePrefixes = [...]string{"temp_c", "tempc", "temperature", "temp", "wtemp", "water_temp", "wtr", "tc", "t", ""}
	// Cells read as a missing value, not as an error.
	fileMissing = [...]string{"", "na", "nan", "null", "none", "n/a", "-"}
)

// FileOptions tune ReadFile and ReadStream.
type FileOptions struct {
	// Site names the site of every reading of a file without a site column;
	// empty means the file name without its extensions.
	Site string
	// TimeCol, DepthCol, TempCol and SiteCol name CSV columns, overriding the
	// recognised names (case-insensitive). A named column must exist.
	TimeCol, DepthCol, TempCol, SiteCol string
	// MaxExamples bounds FileStats.Examples (0: DefaultFileExamples).
	MaxExamples int
}

// FileStats reports what a file held.
type FileStats struct {
	Name     string `json:"name"`
	Format   string `json:"format"`   // FileCSVLong | FileCSVWide | FileLineProtocol
	Lines    int64  `json:"lines"`    // lines read, header and blank lines included
	Readings int64  `json:"readings"` // readings passed to the callback
	Missing  int64  `json:"missing"`  // empty or NA temperature cells (not errors)
	Skipped  int64  `json:"skipped"`  // comment lines and line-protocol lines of other measurements
	Bad      int64  `json:"bad"`      // rows (wide CSV: cells) that could not be read
	// Examples holds the first few bad rows as "line N: reason".
	Examples []string `json:"examples,omitempty"`
	// Ignored lists the columns of a CSV file that were not used.
	Ignored []string `json:"ignored_columns,omitempty"`
}

// ReadFile streams the readings of a recorded file to fn, in file order, with
// constant memory: CSV (long or wide, with a header line, comma, semicolon or
// tab separated) or InfluxDB line protocol, each optionally gzip-compressed
// (recognised by its magic bytes, not its name). "-" reads standard input is
// NOT handled here; use ReadStream.
//
// CSV headers are matched against common names: time (time, datetime_utc,
// datetime, timestamp), depth (depth, depth_m), temperature (temp, temp_c,
// temperature, wtemp), site (site, lake). A header with depth and temperature
// columns is long format; one without is wide format, where every column named
// like "0.5", "temp_0.5", "wtr_0.5" or "temp_0.5m" holds the temperature at
// that depth (m) and other columns are ignored (listed in FileStats.Ignored).
//
// Times are RFC 3339 (any offset, converted to UTC), "2006-01-02 15:04:05" or
// "2006-01-02T15:04:05" without a zone (taken as UTC; fractional seconds and a
// missing seconds field allowed), or epoch seconds, milliseconds, microseconds
// or nanoseconds told apart by magnitude. Temperatures are °C, depths metres
// below the surface.
//
// A row that cannot be read is counted in FileStats.Bad with its line number
// (the first few in Examples) and skipped; it never stops the file. A
// temperature cell that is empty, NA or NaN is counted as Missing. An error
// from fn stops reading and is returned as is (wrapped with the file name).
func ReadFile(ctx context.Context, path string, o FileOptions, fn func(Reading) error) (FileStats, error) {
	f, err := os.Open(path)
	if err != nil {
		return FileStats{Name: path}, fmt.Errorf("open recorded file: %w", err)
	}
	defer f.Close()
	if o.Site == "" {
		o.Site = SiteFromFileName(path)
	}
	return ReadStream(ctx, f, path, o, fn)
}

// SiteFromFileName returns the base name of path without ".gz" and one more
// extension: "data/Lake_X.csv.gz" → "Lake_X".
func SiteFromFileName(path string) string {
	b := filepath.Base(path)
	b = strings.TrimSuffix(b, ".gz")
	if ext := filepath.Ext(b); ext != "" && len(ext) < len(b) {
		b = strings.TrimSuffix(b, ext)
	}
	return b
}

// ReadStream is ReadFile over an open stream; name labels errors and stats
// and, when o.Site is empty, gives the site (SiteFromFileName).
func ReadStream(ctx context.Context, r io.Reader, name string, o FileOptions, fn func(Reading) error) (FileStats, error) {
	if o.Site == "" {
		o.Site = SiteFromFileName(name)
	}
	if o.MaxExamples <= 0 {
		o.MaxExamples = DefaultFileExamples
	}
	fr := &fileReader{opts: o, fn: fn, ctx: ctx, stats: FileStats{Name: name}, sites: make(map[string]string)}
	err := fr.run(r)
	if err != nil {
		err = fmt.Errorf("%s: %w", name, err)
	}
	return fr.stats, err
}

// fileReader is the state of one ReadStream.
type fileReader struct {
	opts  FileOptions
	fn    func(Reading) error
	ctx   context.Context
	stats FileStats

	br       *bufio.Reader
	long     []byte // a line longer than the buffer, assembled
	line     int64
	fields   [][]byte
	quoted   []byte // unquoted field bytes of a line with quotes
	sep      byte
	sites    map[string]string // interned site names
	lastSite string            // the site of the previous row
	lastTB   []byte            // text of the previous time cell
	lastT    time.Time
	lastErr  error

	// CSV columns (-1 when absent).
	timeCol, depthCol, tempCol, siteCol int
	wideCols                            []int     // wide: column index of each depth
	wideDepths                          []float64 // wide: depth of each such column
	ncols                               int       // columns a row must have at least
}

func (fr *fileReader) run(r io.Reader) error {
	br := bufio.NewReaderSize(r, 256<<10)
	if magic, _ := br.Peek(2); len(magic) == 2 && magic[0] == 0x1f && magic[1] == 0x8b {
		zr, err := gzip.NewReader(br)
		if err != nil {
			return fmt.Errorf("%w: gzip header: %v", ErrBadFile, err)
		}
		defer zr.Close()
		br = bufio.NewReaderSize(zr, 256<<10)
	}
	fr.br = br
	// The first line that is neither blank nor a comment decides the format.
	for {
		ln, err := fr.next()
		if ln == nil && err != nil {
			if errors.Is(err, io.EOF) {
				return fmt.Errorf("%w: no header or data line", ErrBadFile)
			}
			return err
		}
		if fr.line == 1 {
			ln = bytes.TrimPrefix(ln, []byte("\xef\xbb\xbf"))
		}
		t := bytes.TrimSpace(ln)
		if len(t) == 0 {
			continue
		}
		if t[0] == '#' {
			fr.stats.Skipped++
			continue
		}
		if looksLineProtocol(t) {
			fr.stats.Format = FileLineProtocol
			if err := fr.lpLine(t); err != nil {
				return err
			}
			return fr.loop(fr.lpLine)
		}
		if err := fr.header(t); err != nil {
			return err
		}
		if fr.stats.Format == FileCSVLong {
			return fr.loop(fr.longRow)
		}
		return fr.loop(fr.wideRow)
	}
}

// next returns the next line without its line end. The slice is valid until
// the following call.
func (fr *fileReader) next() ([]byte, error) {
	ln, err := fr.br.ReadSlice('\n')
	if errors.Is(err, bufio.ErrBufferFull) {
		fr.long = append(fr.long[:0], ln...)
		for errors.Is(err, bufio.ErrBufferFull) {
			ln, err = fr.br.ReadSlice('\n')
			if len(fr.long)+len(ln) > MaxFileLine {
				return nil, fmt.Errorf("%w: line %d longer than %d bytes", ErrBadFile, fr.line+1, MaxFileLine)
			}
			fr.long = append(fr.long, ln...)
		}
		ln = fr.long
	}
	if len(ln) == 0 && err != nil {
		if errors.Is(err, io.EOF) {
			return nil, io.EOF
		}
		return nil, fr.readErr(err)
	}
	if err != nil && !errors.Is(err, io.EOF) {
		return nil, fr.readErr(err)
	}
	fr.line++
	fr.stats.Lines++
	if n := len(ln); n > 0 && ln[n-1] == '\n' {
		ln = ln[:n-1]
	}
	if n := len(ln); n > 0 && ln[n-1] == '\r' {
		ln = ln[:n-1]
	}
	return ln, nil
}

func (fr *fileReader) readErr(err error) error {
	var corrupt flate.CorruptInputError
	if errors.Is(err, gzip.ErrChecksum) || errors.Is(err, gzip.ErrHeader) || errors.Is(err, io.ErrUnexpectedEOF) || errors.As(err, &corrupt) {
		return fmt.Errorf("%w: after line %d: %v", ErrBadFile, fr.line, err)
	}
	return fmt.Errorf("read after line %d: %w", fr.line, err)
}

// loop feeds every following line to row.
func (fr *fileReader) loop(row func([]byte) error) error {
	for {
		ln, err := fr.next()
		if err != nil {
			if errors.Is(err, io.EOF) {
				return nil
			}
			return err
		}
		if fr.line&4095 == 0 {
			if err := fr.ctx.Err(); err != nil {
				return err
			}
		}
		if len(ln) == 0 {
			continue
		}
		if ln[0] == '#' {
			fr.stats.Skipped++
			continue
		}
		if err := row(ln); err != nil {
			return err
		}
	}
}

// bad counts an unreadable row or cell.
func (fr *fileReader) bad(format string, args ...any) {
	fr.stats.Bad++
	if len(fr.stats.Examples) < fr.opts.MaxExamples {
		fr.stats.Examples = append(fr.stats.Examples, fmt.Sprintf("line %d: ", fr.line)+fmt.Sprintf(format, args...))
	}
}

func (fr *fileReader) emit(r Reading) error {
	fr.stats.Readings++
	if err := fr.fn(r); err != nil {
		return fmt.Errorf("line %d: %w", fr.line, err)
	}
	return nil
}

// looksLineProtocol tells a line-protocol line from a CSV header: a space
// after a key=value pair, e.g. "water_temperature,site=a,depth_m=1 temp_c=4 …".
func looksLineProtocol(ln []byte) bool {
	sp := bytes.IndexByte(ln, ' ')
	eq := bytes.IndexByte(ln, '=')
	return sp > 0 && eq > 0 && bytes.IndexByte(ln[sp:], '=') > 0 && !bytes.ContainsAny(ln[:sp], ";\t\"")
}

// ---- CSV -------------------------------------------------------------------

// split cuts a CSV line into fr.fields. Fields may be quoted ("a,b", "say
// ""hi""") but may not span lines. ok is false for an unterminated quote.
func (fr *fileReader) split(ln []byte) bool {
	fr.fields = fr.fields[:0]
	if bytes.IndexByte(ln, '"') < 0 {
		for {
			i := bytes.IndexByte(ln, fr.sep)
			if i < 0 {
				fr.fields = append(fr.fields, trimSpace(ln))
				return true
			}
			fr.fields = append(fr.fields, trimSpace(ln[:i]))
			ln = ln[i+1:]
		}
	}
	// Slow path: quoted fields are unquoted into fr.quoted; fields are
	// sub-slices of it, so it must not be reallocated while splitting.
	if cap(fr.quoted) < len(ln) {
		fr.quoted = make([]byte, 0, 2*len(ln))
	}
	buf := fr.quoted[:0]
	i := 0
	for {
		for i < len(ln) && (ln[i] == ' ' || ln[i] == '\t' && fr.sep != '\t') {
			i++
		}
		start := len(buf)
		if i < len(ln) && ln[i] == '"' {
			i++
			closed := false
			for i < len(ln) {
				if ln[i] == '"' {
					if i+1 < len(ln) && ln[i+1] == '"' {
						buf = append(buf, '"')
						i += 2
						continue
					}
					i++
					closed = true
					break
				}
				buf = append(buf, ln[i])
				i++
			}
			if !closed {
				return false
			}
			for i < len(ln) && ln[i] != fr.sep {
				i++ // text after the closing quote is dropped
			}
		} else {
			j := bytes.IndexByte(ln[i:], fr.sep)
			if j < 0 {
				j = len(ln) - i
			}
			buf = append(buf, trimSpace(ln[i:i+j])...)
			i += j
		}
		fr.fields = append(fr.fields, buf[start:len(buf):len(buf)])
		if i >= len(ln) {
			fr.quoted = buf
			return true
		}
		i++ // the separator
	}
}

// header reads the CSV header and decides long or wide format.
func (fr *fileReader) header(ln []byte) error {
	fr.sep = ','
	best := bytes.Count(ln, []byte{','})
	for _, c := range []byte{';', '\t'} {
		if n := bytes.Count(ln, []byte{c}); n > best {
			fr.sep, best = c, n
		}
	}
	if !fr.split(ln) {
		return fmt.Errorf("%w: line %d: unterminated quote in the header", ErrBadFile, fr.line)
	}
	names := make([]string, len(fr.fields))
	for i, f := range fr.fields {
		names[i] = strings.ToLower(strings.TrimSpace(string(f)))
	}
	find := func(opt, what string, common []string) (int, error) {
		if opt != "" {
			for i, n := range names {
				if strings.EqualFold(n, strings.TrimSpace(opt)) {
					return i, nil
				}
			}
			return -1, fmt.Errorf("%w: no %s column %q in the header (columns: %s)", ErrBadFile, what, opt, strings.Join(names, ", "))
		}
		for _, c := range common {
			for i, n := range names {
				if n == c {
					return i, nil
				}
			}
		}
		return -1, nil
	}
	var err error
	if fr.timeCol, err = find(fr.opts.TimeCol, "time", fileTimeCols[:]); err != nil {
		return err
	}
	if fr.depthCol, err = find(fr.opts.DepthCol, "depth", fileDepthCols[:]); err != nil {
		return err
	}
	if fr.tempCol, err = find(fr.opts.TempCol, "temperature", fileTempCols[:]); err != nil {
		return err
	}
	if fr.siteCol, err = find(fr.opts.SiteCol, "site", fileSiteCols[:]); err != nil {
		return err
	}
	if fr.timeCol < 0 {
		return fmt.Errorf("%w: line %d: no time column (looked for %s; name one with the time-column option); header: %s",
			ErrBadFile, fr.line, strings.Join(fileTimeCols[:], ", "), strings.Join(names, ", "))
	}
	used := map[int]bool{fr.timeCol: true, fr.siteCol: true, fr.depthCol: true, fr.tempCol: true}
	switch {
	case fr.depthCol >= 0 && fr.tempCol >= 0:
		fr.stats.Format = FileCSVLong
		fr.ncols = max(fr.timeCol, fr.depthCol, fr.tempCol, fr.siteCol) + 1
	case fr.depthCol >= 0 || fr.tempCol >= 0:
		return fmt.Errorf("%w: line %d: a depth column needs a temperature column and vice versa; header: %s",
			ErrBadFile, fr.line, strings.Join(names, ", "))
	default:
		fr.stats.Format = FileCSVWide
		for i, n := range names {
			if used[i] {
				continue
			}
			if d, ok := wideDepth(n); ok {
				fr.wideCols = append(fr.wideCols, i)
				fr.wideDepths = append(fr.wideDepths, d)
				used[i] = true
			}
		}
		if len(fr.wideCols) == 0 {
			return fmt.Errorf("%w: line %d: neither depth and temperature columns (long format) nor depth columns like temp_0.5 (wide format); header: %s",
				ErrBadFile, fr.line, strings.Join(names, ", "))
		}
		fr.ncols = max(fr.timeCol, fr.siteCol) + 1
	}
	for i, n := range names {
		if !used[i] {
			fr.stats.Ignored = append(fr.stats.Ignored, n)
		}
	}
	return nil
}

// wideDepth reads the depth (m) of a wide-format column name such as "0.5",
// "temp_0.5", "wtr_0.5", "temp_c_0.5m" or "t 0.5 m".
func wideDepth(name string) (float64, bool) {
	for _, p := range fileWidePrefixes {
		rest, ok := strings.CutPrefix(name, p)
		if !ok {
			continue
		}
		if p != "" {
			if rest == "" {
				continue
			}
			switch rest[0] {
			case '_', '-', '.', ' ', '@':
				rest = rest[1:]
			default:
				if rest[0] < '0' || rest[0] > '9' {
					continue
				}
			}
		}
		rest = strings.TrimSpace(rest)
		rest = strings.TrimSuffix(rest, "m")
		rest = strings.TrimRight(rest, "_ ")
		if rest == "" || rest[0] < '0' || rest[0] > '9' {
			continue
		}
		d, err := strconv.ParseFloat(rest, 64)
		if err != nil || checkDepth(d) != nil {
			continue
		}
		return d, true
	}
	return 0, false
}

// site returns the interned site of the current row.
func (fr *fileReader) site() (string, bool) {
	if fr.siteCol < 0 {
		return fr.opts.Site, true
	}
	b := fr.fields[fr.siteCol]
	if fr.lastSite != "" && string(b) == fr.lastSite {
		return fr.lastSite, true
	}
	if s, ok := fr.sites[string(b)]; ok {
		fr.lastSite = s
		return s, true
	}
	if len(b) == 0 {
		fr.bad("empty site")
		return "", false
	}
	if e := checkID(b); e != "" {
		fr.bad("site %s: %s", snippet(b), e)
		return "", false
	}
	s := string(b)
	if len(fr.sites) < maxInternedSites {
		fr.sites[s] = s
	}
	fr.lastSite = s
	return s, true
}

// rowTime parses the time cell, reusing the previous result for equal text.
func (fr *fileReader) rowTime(b []byte) (time.Time, bool) {
	if fr.lastTB != nil && bytes.Equal(b, fr.lastTB) {
		if fr.lastErr != nil {
			fr.bad("%v", fr.lastErr)
			return time.Time{}, false
		}
		return fr.lastT, true
	}
	t, err := ParseFileTime(b)
	fr.lastTB = append(fr.lastTB[:0], b...)
	fr.lastT, fr.lastErr = t, err
	if err != nil {
		fr.bad("%v", err)
		return time.Time{}, false
	}
	return t, true
}

func isMissing(b []byte) bool {
	if len(b) > 4 {
		return false
	}
	for _, m := range fileMissing {
		if len(b) == len(m) && strings.EqualFold(string(b), m) {
			return true
		}
	}
	return false
}

// parseTempCell reads a temperature (°C); missing is true for an empty or NA cell.
func parseTempCell(b []byte) (v float64, missing bool, err error) {
	if isMissing(b) {
		return 0, true, nil
	}
	v, err = parseNum(b)
	if err != nil {
		return 0, false, fmt.Errorf("temperature %s is not a number", snippet(b))
	}
	if math.IsNaN(v) {
		return 0, true, nil
	}
	if math.IsInf(v, 0) {
		return 0, false, fmt.Errorf("temperature %s is not finite", snippet(b))
	}
	return v, false, nil
}

func (fr *fileReader) longRow(ln []byte) error {
	if !fr.split(ln) {
		fr.bad("unterminated quote")
		return nil
	}
	if len(fr.fields) < fr.ncols {
		fr.bad("%d fields, want at least %d", len(fr.fields), fr.ncols)
		return nil
	}
	t, ok := fr.rowTime(fr.fields[fr.timeCol])
	if !ok {
		return nil
	}
	db := fr.fields[fr.depthCol]
	d, err := parseNum(db)
	if err != nil {
		fr.bad("depth %s is not a number", snippet(db))
		return nil
	}
	if err := checkDepth(d); err != nil {
		fr.bad("%v", err)
		return nil
	}
	v, missing, err := parseTempCell(fr.fields[fr.tempCol])
	if err != nil {
		fr.bad("%v", err)
		return nil
	}
	if missing {
		fr.stats.Missing++
		return nil
	}
	site, ok := fr.site()
	if !ok {
		return nil
	}
	return fr.emit(Reading{Site: site, Depth: d, Time: t, TempC: v})
}

func (fr *fileReader) wideRow(ln []byte) error {
	if !fr.split(ln) {
		fr.bad("unterminated quote")
		return nil
	}
	if len(fr.fields) < fr.ncols {
		fr.bad("%d fields, want at least %d", len(fr.fields), fr.ncols)
		return nil
	}
	t, ok := fr.rowTime(fr.fields[fr.timeCol])
	if !ok {
		return nil
	}
	site, ok := fr.site()
	if !ok {
		return nil
	}
	for j, c := range fr.wideCols {
		if c >= len(fr.fields) {
			fr.stats.Missing++
			continue
		}
		v, missing, err := parseTempCell(fr.fields[c])
		if err != nil {
			fr.bad("column %d (%g m): %v", c+1, fr.wideDepths[j], err)
			continue
		}
		if missing {
			fr.stats.Missing++
			continue
		}
		if err := fr.emit(Reading{Site: site, Depth: fr.wideDepths[j], Time: t, TempC: v}); err != nil {
			return err
		}
	}
	return nil
}

// ParseFileTime reads a recorded file's time cell: RFC 3339 with any offset
// ("2017-11-10T14:00:00Z", "…+01:00"), the same with a space for the T, without
// a zone (taken as UTC), with or without seconds and fractional seconds, or
// epoch seconds/milliseconds/microseconds/nanoseconds told apart by magnitude.
// The result is UTC, within the years 1900..2199.
func ParseFileTime(b []byte) (time.Time, error) {
	b = trimSpace(b)
	if len(b) == 0 {
		return time.Time{}, errors.New("empty time")
	}
	if isNumberText(b) {
		t, err := epochText(b)
		if err != nil {
			return time.Time{}, fmt.Errorf("time %s: %v", snippet(b), err)
		}
		return t, nil
	}
	t, ok := fastTime(b)
	if !ok {
		return time.Time{}, fmt.Errorf("time %s is neither RFC 3339, \"2006-01-02 15:04:05\" nor an epoch number", snippet(b))
	}
	if err := checkTime(t); err != nil {
		return time.Time{}, fmt.Errorf("time %s: %v", snippet(b), err)
	}
	return t, nil
}

// fastTime parses YYYY-MM-DD[T| ]HH:MM[:SS[.fffffffff]][Z|±HH:MM|±HHMM| UTC].
func fastTime(b []byte) (time.Time, bool) {
	num := func(s []byte) (int, bool) {
		n := 0
		for _, c := range s {
			if c < '0' || c > '9' {
				return 0, false
			}
			n = n*10 + int(c-'0')
		}
		return n, true
	}
	if len(b) < 16 || b[4] != '-' || b[7] != '-' || (b[10] != 'T' && b[10] != ' ' && b[10] != 't') || b[13] != ':' {
		return time.Time{}, false
	}
	y, ok1 := num(b[0:4])
	mo, ok2 := num(b[5:7])
	d, ok3 := num(b[8:10])
	h, ok4 := num(b[11:13])
	mi, ok5 := num(b[14:16])
	if !(ok1 && ok2 && ok3 && ok4 && ok5) || mo < 1 || mo > 12 || d < 1 || d > 31 || h > 24 || mi > 59 {
		return time.Time{}, false
	}
	rest := b[16:]
	sec, nsec := 0, 0
	if len(rest) >= 3 && rest[0] == ':' {
		s, ok := num(rest[1:3])
		if !ok || s > 60 {
			return time.Time{}, false
		}
		sec = s
		rest = rest[3:]
		if len(rest) > 0 && (rest[0] == '.' || rest[0] == ',') {
			i := 1
			scale := 100000000
			for i < len(rest) && rest[i] >= '0' && rest[i] <= '9' {
				nsec += int(rest[i]-'0') * scale
				scale /= 10
				i++
			}
			if i == 1 {
				return time.Time{}, false
			}
			rest = rest[i:]
		}
	}
	if len(rest) > 0 && rest[0] == ' ' {
		rest = rest[1:]
	}
	off := 0
	switch {
	case len(rest) == 0, len(rest) == 1 && (rest[0] == 'Z' || rest[0] == 'z'), string(rest) == "UTC":
	case rest[0] == '+' || rest[0] == '-':
		z := rest[1:]
		var oh, om int
		var ok bool
		switch {
		case len(z) == 5 && z[2] == ':':
			oh, ok = num(z[0:2])
			if ok {
				om, ok = num(z[3:5])
			}
		case len(z) == 4:
			oh, ok = num(z[0:2])
			if ok {
				om, ok = num(z[2:4])
			}
		case len(z) == 2:
			oh, ok = num(z)
		}
		if !ok || oh > 23 || om > 59 {
			return time.Time{}, false
		}
		off = oh*3600 + om*60
		if rest[0] == '-' {
			off = -off
		}
	default:
		return time.Time{}, false
	}
	if d > daysIn(time.Month(mo), y) {
		return time.Time{}, false
	}
	t := time.Date(y, time.Month(mo), d, h, mi, sec, nsec, time.UTC)
	if off != 0 {
		t = t.Add(-time.Duration(off) * time.Second)
	}
	return t, true
}

func daysIn(m time.Month, y int) int {
	return time.Date(y, m+1, 0, 0, 0, 0, 0, time.UTC).Day()
}

// ---- line protocol ------------------------------------------------------------

// lpLine reads one line of InfluxDB line protocol:
// water_temperature,site=S,depth_m=D[,sensor=X] temp_c=T[,…] TIMESTAMP.
// Lines of other measurements are skipped (counted); the timestamp is an
// integer, its unit told by magnitude (see ParseFileTime).
func (fr *fileReader) lpLine(ln []byte) error {
	keyEnd := lpIndex(ln, ' ', false)
	if keyEnd < 0 {
		fr.bad("line protocol: no field set")
		return nil
	}
	key, rest := ln[:keyEnd], ln[keyEnd+1:]
	mEnd := lpIndex(key, ',', false)
	meas := key
	tags := []byte(nil)
	if mEnd >= 0 {
		meas, tags = key[:mEnd], key[mEnd+1:]
	}
	if string(meas) != LineProtocolMeasurement {
		fr.stats.Skipped++
		return nil
	}
	fieldEnd := lpIndex(rest, ' ', true)
	fields, ts := rest, []byte(nil)
	if fieldEnd >= 0 {
		fields, ts = rest[:fieldEnd], trimSpace(rest[fieldEnd+1:])
	}
	var siteB, sensorB []byte
	depth := math.NaN()
	for len(tags) > 0 {
		i := lpIndex(tags, ',', false)
		var kv []byte
		if i < 0 {
			kv, tags = tags, nil
		} else {
			kv, tags = tags[:i], tags[i+1:]
		}
		eq := lpIndex(kv, '=', false)
		if eq < 0 {
			fr.bad("line protocol: tag %s without '='", snippet(kv))
			return nil
		}
		k, v := kv[:eq], kv[eq+1:]
		switch string(k) {
		case "site":
			siteB = v
		case "sensor":
			sensorB = v
		case "depth_m":
			d, err := parseNum(lpUnescape(v))
			if err != nil {
				fr.bad("line protocol: depth_m %s is not a number", snippet(v))
				return nil
			}
			if err := checkDepth(d); err != nil {
				fr.bad("line protocol: %v", err)
				return nil
			}
			depth = d
		}
	}
	if siteB == nil && fr.opts.Site == "" {
		fr.bad("line protocol: no site tag")
		return nil
	}
	if math.IsNaN(depth) {
		fr.bad("line protocol: no depth_m tag")
		return nil
	}
	temp, found := 0.0, false
	for len(fields) > 0 {
		i := lpIndex(fields, ',', true)
		var kv []byte
		if i < 0 {
			kv, fields = fields, nil
		} else {
			kv, fields = fields[:i], fields[i+1:]
		}
		eq := lpIndex(kv, '=', false)
		if eq < 0 {
			fr.bad("line protocol: field %s without '='", snippet(kv))
			return nil
		}
		if string(kv[:eq]) != "temp_c" {
			continue
		}
		v := kv[eq+1:]
		if n := len(v); n > 0 && (v[n-1] == 'i' || v[n-1] == 'u') {
			v = v[:n-1]
		}
		f, err := parseNum(v)
		if err != nil || math.IsInf(f, 0) || math.IsNaN(f) {
			fr.bad("line protocol: temp_c %s is not a finite number", snippet(kv[eq+1:]))
			return nil
		}
		temp, found = f, true
	}
	if !found {
		fr.bad("line protocol: no temp_c field")
		return nil
	}
	if len(ts) == 0 {
		fr.bad("line protocol: no timestamp")
		return nil
	}
	n, err := strconv.ParseInt(string(ts), 10, 64)
	if err != nil {
		fr.bad("line protocol: timestamp %s is not an integer", snippet(ts))
		return nil
	}
	t, err := epochInt(n)
	if err != nil {
		fr.bad("line protocol: %v", err)
		return nil
	}
	site := fr.opts.Site
	if siteB != nil {
		siteB = lpUnescape(siteB)
		if s, ok := fr.sites[string(siteB)]; ok {
			site = s
		} else {
			if e := checkID(siteB); e != "" || len(siteB) == 0 {
				fr.bad("line protocol: site %s: %s", snippet(siteB), e)
				return nil
			}
			site = string(siteB)
			if len(fr.sites) < maxInternedSites {
				fr.sites[site] = site
			}
		}
	}
	r := Reading{Site: site, Depth: depth, Time: t, TempC: temp}
	if sensorB != nil {
		sensorB = lpUnescape(sensorB)
		if utf8.Valid(sensorB) && checkID(sensorB) == "" {
			r.Sensor = string(sensorB)
		}
	}
	return fr.emit(r)
}

// lpIndex returns the index of the first c in b not escaped by a backslash
// (and, when quotes is set, not inside a double-quoted string), or -1.
func lpIndex(b []byte, c byte, quotes bool) int {
	in := false
	for i := 0; i < len(b); i++ {
		switch b[i] {
		case '\\':
			i++
		case '"':
			if quotes {
				in = !in
			}
		case c:
			if !in {
				return i
			}
		}
	}
	return -1
}

// lpUnescape removes the line-protocol escapes of a tag value (in place):
// "\,", "\=" and "\ " stand for the character; any other backslash is
// literal, as in InfluxDB.
func lpUnescape(b []byte) []byte {
	if bytes.IndexByte(b, '\\') < 0 {
		return b
	}
	out := b[:0]
	for i := 0; i < len(b); i++ {
		if b[i] == '\\' && i+1 < len(b) && (b[i+1] == ',' || b[i+1] == '=' || b[i+1] == ' ') {
			i++
		}
		out = append(out, b[i])
	}
	return out
}

// filePow10 are the powers of ten exactly representable in a float64.
var filePow10 = [...]float64{1, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11, 1e12, 1e13, 1e14, 1e15}

// parseNum parses a decimal number. Plain decimals of at most 15 significant
// digits ("-12.345", "0.5", "7") take a fast path: the digits as an integer,
// exact in a float64, divided by an exact power of ten, which IEEE 754
// division rounds correctly, so the result equals strconv.ParseFloat's (the
// same exact fast path strconv itself uses). Anything else goes to
// strconv.ParseFloat.
func parseNum(b []byte) (float64, error) {
	i, neg := 0, false
	if len(b) > 0 && (b[0] == '-' || b[0] == '+') {
		neg = b[0] == '-'
		i = 1
	}
	var mant uint64
	nd, sig, frac, dot := 0, 0, 0, false
	for ; i < len(b); i++ {
		c := b[i]
		switch {
		case c >= '0' && c <= '9':
			nd++
			if sig > 0 || c != '0' {
				sig++
			}
			mant = mant*10 + uint64(c-'0')
			if dot {
				frac++
			}
		case c == '.' && !dot:
			dot = true
		default:
			return strconv.ParseFloat(string(b), 64)
		}
	}
	if nd == 0 || sig > 15 || frac >= len(filePow10) {
		return strconv.ParseFloat(string(b), 64)
	}
	f := float64(mant) / filePow10[frac]
	if neg {
		f = -f
	}
	return f, nil
}
