package export

import (
	"bufio"
	"encoding/csv"
	"encoding/json"
	"fmt"
	"io"
	"strconv"
	"time"
)

// sink writes rows of typed cells: time.Time, string, float64, int64, uint64,
// bool, or nil for an empty cell.
type sink interface {
	begin(header []string) error
	row(cells []any) error
	flush() error
	rows() int64
}

// formatCell renders a cell for CSV: times RFC 3339 UTC, numbers in the
// shortest form that reads back to the same float64, never an exponent.
func formatCell(v any) (string, error) {
	switch x := v.(type) {
	case nil:
		return "", nil
	case time.Time:
		return rfc3339(x), nil
	case string:
		return x, nil
	case float64:
		return strconv.FormatFloat(x, 'f', -1, 64), nil
	case int64:
		return strconv.FormatInt(x, 10), nil
	case uint64:
		return strconv.FormatUint(x, 10), nil
	case bool:
		return strconv.FormatBool(x), nil
	}
	return "", fmt.Errorf("export: unexpected %T value %v in the query result", v, v)
}

type csvSink struct {
	w    *csv.Writer
	n    int64
	line []string
}

func newCSVSink(w io.Writer) *csvSink { return &csvSink{w: csv.NewWriter(w)} }

func (s *csvSink) begin(header []string) error {
	s.line = make([]string, len(header))
	return s.w.Write(header)
}

func (s *csvSink) row(cells []any) error {
	for i, c := range cells {
		v, err := formatCell(c)
		if err != nil {
			return err
		}
		s.line[i] = v
	}
	s.n++
	return s.w.Write(s.line)
}

func (s *csvSink) flush() error {
	s.w.Flush()
	if err := s.w.Error(); err != nil {
		return fmt.Errorf("write csv: %w", err)
	}
	return nil
}

func (s *csvSink) rows() int64 { return s.n }

// jsonSink writes JSON Lines: one object per row, keys in header order, empty
// cells left out.
type jsonSink struct {
	w    *bufio.Writer
	keys [][]byte // pre-encoded `"key":`
	n    int64
	buf  []byte
}

func newJSONSink(w io.Writer) *jsonSink { return &jsonSink{w: bufio.NewWriterSize(w, 64<<10)} }

func (s *jsonSink) begin(header []string) error {
	s.keys = make([][]byte, len(header))
	for i, h := range header {
		k, err := json.Marshal(h)
		if err != nil {
			return err
		}
		s.keys[i] = append(k, ':')
	}
	return nil
}

func (s *jsonSink) row(cells []any) error {
	b := append(s.buf[:0], '{')
	first := true
	for i, c := range cells {
		if c == nil {
			continue
		}
		if !first {
			b = append(b, ',')
		}
		first = false
		b = append(b, s.keys[i]...)
		switch x := c.(type) {
		case string:
			enc, err := json.Marshal(x)
			if err != nil {
				return err
			}
			b = append(b, enc...)
		case time.Time:
			b = append(b, '"')
			b = append(b, rfc3339(x)...)
			b = append(b, '"')
		default:
			v, err := formatCell(c)
			if err != nil {
				return err
			}
			b = append(b, v...)
		}
	}
	b = append(b, '}', '\n')
	s.buf = b
	s.n++
	if _, err := s.w.Write(b); err != nil {
		return fmt.Errorf("write json: %w", err)
	}
	return nil
}

func (s *jsonSink) flush() error {
	if err := s.w.Flush(); err != nil {
		return fmt.Errorf("write json: %w", err)
	}
	return nil
}

func (s *jsonSink) rows() int64 { return s.n }
