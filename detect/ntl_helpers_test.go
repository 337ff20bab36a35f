package detect

import (
	"compress/gzip"
	"encoding/csv"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"testing"
	"time"
)

// Real data: NTL-LTER thermistor chains (see shared/data/ntl/SOURCES.md).
const (
	citeBogs    = "Lottig, N. 2022. High Frequency Under-Ice Water Temperature Buoy Data - Crystal Bog, Trout Bog, and Lake Mendota, Wisconsin, USA 2016-2020 ver 3. EDI knb-lter-ntl.390.3, doi:10.6073/pasta/ad192ce8fbe8175619d6a41aa2f72294 (harmonised in LakeBeD-US, McAfee et al. 2024)"
	citeMendota = "Magnuson, J.J., S.R. Carpenter, E.H. Stanley. North Temperate Lakes LTER: High Frequency Water Temperature Data - Lake Mendota Buoy 2006 - current. EDI knb-lter-ntl.130 (version 31) (harmonised in LakeBeD-US, McAfee et al. 2024)"
	citeIce     = "NTL-LTER, Ice Duration - Trout Lake Area, EDI knb-lter-ntl.33 (visual observation)"
)

// ntlDir finds shared/data/ntl by walking up from the working directory.
func ntlDir(t testing.TB) string {
	t.Helper()
	dir, err := os.Getwd()
	if err != nil {
		t.Fatalf("getwd: %v", err)
	}
	for {
		cand := filepath.Join(dir, "shared", "data", "ntl")
		if st, err := os.Stat(cand); err == nil && st.IsDir() {
			return cand
		}
		parent := filepath.Dir(dir)
		if parent == dir {
			t.Fatalf("shared/data/ntl not found above the working directory")
		}
		dir = parent
	}
}

// readGzipCSV returns the header and the rows of a gzip-compressed CSV file.
func readGzipCSV(t testing.TB, path string) (map[string]int, [][]string) {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatalf("open %s: %v", path, err)
	}
	defer f.Close()
	gz, err := gzip.NewReader(f)
	if err != nil {
		t.Fatalf("gzip %s: %v", path, err)
	}
	r := csv.NewReader(gz)
	r.ReuseRecord = false
	head, err := r.Read()
	if err != nil {
		t.Fatalf("header of %s: %v", path, err)
	}
	col := map[string]int{}
	for i, h := range head {
		col[h] = i
	}
	var rows [][]string
	for {
		rec, err := r.Read()
		if err == io.EOF {
			break
		}
		if err != nil {
			t.Fatalf("read %s: %v", path, err)
		}
		rows = append(rows, rec)
	}
	return col, rows
}

// profilesFromRows groups (time, depth, temp) rows into profiles sorted by time.
func profilesFromRows(t testing.TB, site string, rows [][]string, ti, di, vi int, keep func(rec []string, tm time.Time) bool) []Profile {
	t.Helper()
	type dv struct{ d, v float64 }
	by := map[time.Time][]dv{}
	for _, rec := range rows {
		tm, err := time.Parse(time.RFC3339, rec[ti])
		if err != nil {
			t.Fatalf("time %q: %v", rec[ti], err)
		}
		if keep != nil && !keep(rec, tm) {
			continue
		}
		d, err1 := strconv.ParseFloat(rec[di], 64)
		v, err2 := strconv.ParseFloat(rec[vi], 64)
		if err1 != nil || err2 != nil {
			continue // an empty cell is a missing reading
		}
		by[tm] = append(by[tm], dv{d, v})
	}
	times := make([]time.Time, 0, len(by))
	for tm := range by {
		times = append(times, tm)
	}
	sort.Slice(times, func(i, j int) bool { return times[i].Before(times[j]) })
	out := make([]Profile, 0, len(times))
	for _, tm := range times {
		xs := by[tm]
		sort.Slice(xs, func(i, j int) bool { return xs[i].d < xs[j].d })
		p := Profile{Site: site, Time: tm}
		for i, x := range xs {
			if i > 0 && x.d == xs[i-1].d {
				continue
			}
			p.Depths = append(p.Depths, x.d)
			p.Temps = append(p.Temps, x.v)
		}
		out = append(out, p)
	}
	return out
}

// bogWinters returns the hourly profiles of every bog winter, keyed by lake
// and the year the winter starts, read once from the bogs file.
func bogWinters(t testing.TB) map[string]map[int][]Profile {
	t.Helper()
	col, rows := readGzipCSV(t, filepath.Join(ntlDir(t), "bogs_underice_2016-2019_hourly.csv.gz"))
	li, ti := col["lake"], col["datetime_utc"]
	byLake := map[string][][]string{}
	for _, r := range rows {
		byLake[r[li]] = append(byLake[r[li]], r)
	}
	out := map[string]map[int][]Profile{}
	for lake, rs := range byLake {
		out[lake] = map[int][]Profile{}
		for _, p := range profilesFromRows(t, siteID(lake), rs, ti, col["depth_m"], col["temp_c"], nil) {
			y := p.Time.Year()
			if p.Time.Month() < time.August {
				y--
			}
			out[lake][y] = append(out[lake][y], p)
		}
	}
	return out
}

func siteID(lake string) string {
	switch lake {
	case "Trout Bog":
		return "trout-bog"
	case "Crystal Bog":
		return "crystal-bog"
	}
	return "mendota"
}

func eventLine(e Event) string {
	return fmt.Sprintf("%s %-24s %-8s %-14s %s | onset %s", e.Time.Format("2006-01-02 15:04"), e.Kind, e.Status, e.Subject, e.Summary, e.Details["onset"])
}
