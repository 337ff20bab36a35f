package export

import (
	"bufio"
	"bytes"
	"context"
	"fmt"
	"io"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/influxdata/influxdb-client-go/v2/api"
)

// lineCounter counts the lines written to it.
type lineCounter struct{ n atomic.Int64 }

func (c *lineCounter) Write(p []byte) (int, error) {
	c.n.Add(int64(bytes.Count(p, []byte{'\n'})))
	return len(p), nil
}

// syntheticQuerier answers every query with rows of one-minute readings at
// two depths, in the annotated CSV InfluxDB sends, produced lazily. With a
// non-nil out it refuses to run more than slack rows ahead of what has been
// written there: an exporter that collected the result before writing it
// would stall and fail the test.
type syntheticQuerier struct {
	rows  int
	out   *lineCounter
	slack int64
	fail  chan error
}

func (s *syntheticQuerier) Query(ctx context.Context, flux string) (*api.QueryTableResult, error) {
	if !strings.Contains(flux, `pivot(rowKey: ["_time"], columnKey: ["_field"]`) {
		return nil, fmt.Errorf("unexpected query:\n%s", flux)
	}
	pr, pw := io.Pipe()
	go func() {
		w := bufio.NewWriter(pw)
		fmt.Fprint(w, "#datatype,string,long,dateTime:RFC3339,string,double,double,long\n#group,false,false,false,true,false,false,false\n#default,_result,,,,,,\n,result,table,_time,site,depth,temp_c,qc\n")
		t := time.Date(2025, 1, 1, 0, 0, 0, 0, time.UTC)
		for i := 0; i < s.rows; i++ {
			if s.out != nil && i%1000 == 0 {
				deadline := time.Now().Add(20 * time.Second)
				for int64(i)-s.out.n.Load() > s.slack {
					if time.Now().After(deadline) {
						err := fmt.Errorf("after %d rows produced only %d lines were written: the export is holding the result", i, s.out.n.Load())
						s.fail <- err
						pw.CloseWithError(err)
						return
					}
					time.Sleep(time.Millisecond)
				}
			}
			depth := 0.5 + 9.5*float64(i%2)
			fmt.Fprintf(w, ",,0,%s,fenwater,%g,%g,0\n", t.Add(time.Duration(i/2)*time.Minute).Format(time.RFC3339), depth, 4+float64(i%7)/10)
		}
		w.Flush()
		pw.Close()
	}()
	return api.NewQueryTableResult(pr), nil
}

// TestExportStreams: an export of 100,000 readings writes its rows while the
// result is still arriving, which is what keeps a year of one-minute data in
// constant memory.
func TestExportStreams(t *testing.T) {
	out := &lineCounter{}
	q := &syntheticQuerier{rows: 100000, out: out, slack: 20000, fail: make(chan error, 1)}
	o := Options{Bucket: "lake/autogen", Site: "fenwater", From: time.Date(2025, 1, 1, 0, 0, 0, 0, time.UTC), To: time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC), Chunk: 366 * 24 * time.Hour}
	st, err := Export(context.Background(), q, o, out)
	select {
	case ferr := <-q.fail:
		t.Fatal(ferr)
	default:
	}
	if err != nil {
		t.Fatal(err)
	}
	if st.Rows != 100000 || out.n.Load() != 100001 {
		t.Fatalf("wrote %d rows, %d lines", st.Rows, out.n.Load())
	}
}

// BenchmarkExportReadingsLong measures the client side of an export (parsing
// InfluxDB's annotated CSV and writing the tidy CSV), per reading.
func BenchmarkExportReadingsLong(b *testing.B) {
	const rows = 50000
	q := &syntheticQuerier{rows: rows}
	o := Options{Bucket: "lake/autogen", Site: "fenwater", From: time.Date(2025, 1, 1, 0, 0, 0, 0, time.UTC), To: time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC), Chunk: 366 * 24 * time.Hour}
	b.ReportAllocs()
	for b.Loop() {
		if _, err := Export(context.Background(), q, o, io.Discard); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*rows), "ns/reading")
}
