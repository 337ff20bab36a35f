package ingest

import (
	"fmt"
	"math"
	"slices"
	"testing"
	"time"

	"holomix/detect"
)

var asmT0 = time.Date(2021, 7, 1, 0, 0, 0, 0, time.UTC)

// asmCollector keeps copies of emitted profiles (the Assembler reuses its buffers).
type asmCollector struct{ got []detect.Profile }

func (c *asmCollector) emit(p detect.Profile) {
	p.Depths = slices.Clone(p.Depths)
	p.Temps = slices.Clone(p.Temps)
	p.Expected = slices.Clone(p.Expected)
	c.got = append(c.got, p)
}

func asmRd(site string, min float64, depth, temp float64) Reading {
	return Reading{Site: site, Depth: depth, TempC: temp, Time: asmT0.Add(time.Duration(min * float64(time.Minute)))}
}

func TestAssembler_CompleteProfileEmittedAtOnce(t *testing.T) {
	a := NewAssembler(10*time.Minute, 30*time.Minute, map[string][]float64{"a": {1, 2, 3}})
	var c asmCollector
	// A logger sampling once per interval. The first interval closes when the
	// sensors report the next one (their step is not known yet).
	for _, d := range []float64{1, 2, 3} {
		a.Add(asmRd("a", 0, d, 10+d), c.emit)
	}
	if len(c.got) != 0 {
		t.Fatalf("emitted %d profiles before the step is known", len(c.got))
	}
	for i, d := range []float64{1, 2, 3} {
		a.Add(asmRd("a", 10, d, 20+d), c.emit)
		if i < 2 && len(c.got) != 0 {
			t.Fatalf("profile emitted before all depths settled (after depth %g)", d)
		}
	}
	// The third reading settles the first interval, and completes the second
	// at once: every sensor's next sample is due after its end.
	if len(c.got) != 2 {
		t.Fatalf("got %d profiles, want 2", len(c.got))
	}
	for i, p := range c.got {
		if !p.Time.Equal(asmT0.Add(time.Duration(i) * 10 * time.Minute)) {
			t.Errorf("profile %d time %v", i, p.Time)
		}
		if !slices.Equal(p.Depths, []float64{1, 2, 3}) || !slices.Equal(p.Expected, []float64{1, 2, 3}) {
			t.Errorf("profile %d depths %v expected %v", i, p.Depths, p.Expected)
		}
	}
	if !slices.Equal(c.got[1].Temps, []float64{21, 22, 23}) {
		t.Errorf("temps %v", c.got[1].Temps)
	}
	// From now on each interval is emitted on its last depth.
	a.Add(asmRd("a", 20, 3, 1), c.emit)
	a.Add(asmRd("a", 20, 1, 1), c.emit)
	if len(c.got) != 2 {
		t.Fatalf("profile emitted with depth 2 missing")
	}
	a.Add(asmRd("a", 20, 2, 1), c.emit)
	if len(c.got) != 3 {
		t.Fatalf("complete profile not emitted at once")
	}
}

func TestAssembler_AveragesFastLogger(t *testing.T) {
	a := NewAssembler(10*time.Minute, 30*time.Minute, map[string][]float64{"a": {0.5, 5}})
	var c asmCollector
	// 1-minute samples: the interval closes on its last sample (minute 9).
	for m := 0; m < 10; m++ {
		a.Add(asmRd("a", float64(m), 0.5, float64(m)), c.emit)
		a.Add(asmRd("a", float64(m), 5, 4), c.emit)
	}
	// The step is known from minute 1; minute 9 + 1 min reaches the end.
	if len(c.got) != 1 {
		t.Fatalf("got %d profiles after the last sample of the interval, want 1", len(c.got))
	}
	p := c.got[0]
	if !slices.Equal(p.Depths, []float64{0.5, 5}) || p.Temps[0] != 4.5 || p.Temps[1] != 4 {
		t.Fatalf("profile %v %v, want the mean 4.5 at 0.5 m and 4 at 5 m", p.Depths, p.Temps)
	}
}

func TestAssembler_WatermarkEmitsIncomplete(t *testing.T) {
	a := NewAssembler(10*time.Minute, 30*time.Minute, map[string][]float64{"a": {1, 2, 3}})
	var c asmCollector
	// Depth 3 never reports: intervals close only when the watermark passes.
	for m := 0; m <= 40; m += 10 {
		a.Add(asmRd("a", float64(m), 1, 1), c.emit)
		a.Add(asmRd("a", float64(m), 2, 2), c.emit)
	}
	// Latest time 40 min, watermark 30 min: [0,10) closes (end 10 ≤ 10).
	if len(c.got) != 1 || !c.got[0].Time.Equal(asmT0) {
		t.Fatalf("got %d profiles, want only the first (watermark 10 min)", len(c.got))
	}
	if !slices.Equal(c.got[0].Depths, []float64{1, 2}) {
		t.Fatalf("depths %v", c.got[0].Depths)
	}
	a.Add(asmRd("a", 55, 1, 1), c.emit) // watermark 25 min: [10,20) closes
	if len(c.got) != 2 {
		t.Fatalf("got %d profiles, want 2", len(c.got))
	}
	a.Flush(c.emit)
	if len(c.got) != 6 {
		t.Fatalf("after Flush %d profiles, want 6 (0 to 50 min)", len(c.got))
	}
	for i := 1; i < len(c.got); i++ {
		if !c.got[i].Time.After(c.got[i-1].Time) {
			t.Fatalf("profiles out of order: %v after %v", c.got[i].Time, c.got[i-1].Time)
		}
	}
}

func TestAssembler_LateReadings(t *testing.T) {
	a := NewAssembler(10*time.Minute, 30*time.Minute, map[string][]float64{"a": {1, 2}})
	var c asmCollector
	for m := 0; m <= 20; m += 10 {
		a.Add(asmRd("a", float64(m), 1, 1), c.emit)
		a.Add(asmRd("a", float64(m), 2, 2), c.emit)
	}
	// Once the sampling step is known, each interval closes on its last depth.
	if len(c.got) != 3 {
		t.Fatalf("got %d profiles, want 3", len(c.got))
	}
	if late := a.Add(asmRd("a", 5, 1, 99), c.emit); !late {
		t.Fatal("reading for an emitted interval not reported late")
	}
	// Behind the watermark without an open interval: late as well.
	for m := 30; m <= 90; m += 10 {
		a.Add(asmRd("a", float64(m), 1, 1), c.emit)
		a.Add(asmRd("a", float64(m), 2, 2), c.emit)
	}
	n := len(c.got)
	if late := a.Add(asmRd("a", 45, 2, 99), c.emit); !late {
		t.Fatal("reading far behind the watermark not reported late")
	}
	a.Flush(c.emit)
	for _, p := range c.got {
		for _, v := range p.Temps {
			if v == 99 {
				t.Fatalf("a late reading entered profile %v", p.Time)
			}
		}
	}
	if len(c.got) != n || n != 10 {
		t.Fatalf("%d profiles (%d before Flush), want 10: every interval 0..90 min once", len(c.got), n)
	}
}

func TestAssembler_OutOfOrderWithinWatermark(t *testing.T) {
	a := NewAssembler(10*time.Minute, 30*time.Minute, map[string][]float64{"a": {1, 2}})
	var c asmCollector
	a.Add(asmRd("a", 0, 1, 1), c.emit)
	a.Add(asmRd("a", 0, 2, 2), c.emit)
	a.Add(asmRd("a", 10, 1, 1), c.emit) // opens [10,20) while [0,10) waits for depth 2
	if len(c.got) != 0 {
		t.Fatalf("[0,10) emitted while depth 2 had not moved on")
	}
	if late := a.Add(asmRd("a", 5, 2, 4), c.emit); late {
		t.Fatal("a reading for an open interval reported late")
	}
	if len(c.got) != 1 {
		t.Fatalf("got %d profiles, want [0,10) complete", len(c.got))
	}
	if p := c.got[0]; !p.Time.Equal(asmT0) || !slices.Equal(p.Temps, []float64{1, 3}) {
		t.Fatalf("profile %v %v, want depth 2 averaged to 3", p.Time, p.Temps)
	}
}

func TestAssembler_UnusableIgnored(t *testing.T) {
	a := NewAssembler(10*time.Minute, 0, nil)
	var c asmCollector
	r := asmRd("a", 0, 1, 50)
	r.QC = QCRange
	if a.Add(r, c.emit) {
		t.Fatal("unusable reading reported late")
	}
	r = asmRd("a", 100, 1, 50)
	r.QC = QCFuture
	a.Add(r, c.emit)
	a.Flush(c.emit)
	if len(c.got) != 0 {
		t.Fatalf("unusable readings made %d profiles", len(c.got))
	}
	// QCNoTime and QCLate do not exclude.
	r = asmRd("a", 0, 1, 5)
	r.QC = QCNoTime
	a.Add(r, c.emit)
	a.Flush(c.emit)
	if len(c.got) != 1 {
		t.Fatalf("QCNoTime reading not assembled")
	}
}

func TestAssembler_SitesInterleavedAndDepthsFromData(t *testing.T) {
	a := NewAssembler(10*time.Minute, 0, map[string][]float64{"north": {1, 3}})
	var c asmCollector
	for m := 0; m < 30; m += 10 {
		// "south" is not configured: its depths come from the data, in any order.
		a.Add(asmRd("south", float64(m), 4, 14), c.emit)
		a.Add(asmRd("north", float64(m), 3, 13), c.emit)
		a.Add(asmRd("south", float64(m), 0.5, 10.5), c.emit)
		a.Add(asmRd("north", float64(m), 1, 11), c.emit)
		a.Add(asmRd("south", float64(m)+1, 2, 12), c.emit)
	}
	a.Flush(c.emit)
	by := map[string][]detect.Profile{}
	for _, p := range c.got {
		by[p.Site] = append(by[p.Site], p)
	}
	if len(by["north"]) != 3 || len(by["south"]) != 3 {
		t.Fatalf("profiles per site: north %d south %d, want 3 each", len(by["north"]), len(by["south"]))
	}
	for _, p := range by["north"] {
		if !slices.Equal(p.Depths, []float64{1, 3}) || !slices.Equal(p.Temps, []float64{11, 13}) {
			t.Errorf("north %v: %v %v", p.Time, p.Depths, p.Temps)
		}
	}
	for _, p := range by["south"] {
		if !slices.Equal(p.Depths, []float64{0.5, 2, 4}) || !slices.Equal(p.Temps, []float64{10.5, 12, 14}) {
			t.Errorf("south %v: %v %v", p.Time, p.Depths, p.Temps)
		}
		if p.Expected != nil {
			t.Errorf("south has no configured depths but Expected = %v", p.Expected)
		}
	}
	if got := a.Depths("south"); !slices.Equal(got, []float64{0.5, 2, 4}) {
		t.Errorf("Depths(south) = %v", got)
	}
}

func TestAssembler_DepthTolerance(t *testing.T) {
	a := NewAssembler(10*time.Minute, 0, map[string][]float64{"a": {0.5, 1}})
	var c asmCollector
	a.Add(asmRd("a", 0, 0.504, 4), c.emit)
	a.Add(asmRd("a", 1, 0.5, 6), c.emit)
	a.Add(asmRd("a", 0, 1, 7), c.emit)
	a.Flush(c.emit)
	if len(c.got) != 1 || !slices.Equal(c.got[0].Depths, []float64{0.5, 1}) || c.got[0].Temps[0] != 5 {
		t.Fatalf("got %+v, want 0.504 m snapped to the configured 0.5 m and averaged", c.got)
	}
}

// stream is a deterministic mixed stream: two sites, a 2-minute logger with
// one depth missing now and then, and a few out-of-order readings.
func asmStream() []Reading {
	var rs []Reading
	for m := 0; m < 600; m += 2 {
		for i, d := range []float64{0.5, 2, 6} {
			if (m/2+i)%37 == 0 {
				continue
			}
			rs = append(rs, asmRd("x", float64(m), d, 10+float64(i)+float64(m%7)/10))
		}
		if m%10 == 0 {
			rs = append(rs, asmRd("y", float64(m), 1, 4), asmRd("y", float64(m), 3, 5))
		}
		if m%50 == 8 && m > 20 {
			rs = append(rs, asmRd("x", float64(m-13), 2, 30)) // out of order
		}
	}
	return rs
}

func asmRunStream(a *Assembler, rs []Reading, c *asmCollector) (lates int) {
	for _, r := range rs {
		if a.Add(r, c.emit) {
			lates++
		}
	}
	return lates
}

func TestAssembler_StateRestore(t *testing.T) {
	rs := asmStream()
	exp := map[string][]float64{"x": {0.5, 2, 6}}
	var whole asmCollector
	a := NewAssembler(10*time.Minute, 15*time.Minute, exp)
	lates := asmRunStream(a, rs, &whole)
	a.Flush(whole.emit)

	for _, cut := range []int{1, 100, len(rs) / 2, len(rs) - 3} {
		var parts asmCollector
		a1 := NewAssembler(10*time.Minute, 15*time.Minute, exp)
		l1 := asmRunStream(a1, rs[:cut], &parts)
		st, err := a1.State()
		if err != nil {
			t.Fatal(err)
		}
		a2 := NewAssembler(10*time.Minute, 15*time.Minute, exp)
		if err := a2.Restore(st); err != nil {
			t.Fatalf("restore at %d: %v", cut, err)
		}
		st2, err := a2.State()
		if err != nil {
			t.Fatal(err)
		}
		if string(st) != string(st2) {
			t.Fatalf("state changed by a round trip at %d:\n%s\n%s", cut, st, st2)
		}
		l2 := asmRunStream(a2, rs[cut:], &parts)
		a2.Flush(parts.emit)
		if l1+l2 != lates {
			t.Errorf("cut %d: %d late readings, uninterrupted %d", cut, l1+l2, lates)
		}
		if fmt.Sprint(parts.got) != fmt.Sprint(whole.got) {
			t.Errorf("cut %d: restored run emitted other profiles (%d vs %d)", cut, len(parts.got), len(whole.got))
		}
	}
	if lates == 0 {
		t.Fatal("the stream should contain late readings")
	}
	if err := NewAssembler(5*time.Minute, 0, nil).Restore([]byte(`{"version":1,"interval_ns":600000000000,"sites":[]}`)); err == nil {
		t.Fatal("state of another interval accepted")
	}
	if err := NewAssembler(0, 0, nil).Restore([]byte(`{`)); err == nil {
		t.Fatal("malformed state accepted")
	}
}

func TestAssembler_NoAllocationsSteadyState(t *testing.T) {
	a := NewAssembler(10*time.Minute, 30*time.Minute, map[string][]float64{"a": {1, 2, 3, 4}})
	sum := 0.0
	emit := func(p detect.Profile) { sum += p.Temps[0] }
	m := 0
	add := func() {
		for _, d := range []float64{1, 2, 3, 4} {
			a.Add(Reading{Site: "a", Depth: d, TempC: 4 + d, Time: asmT0.Add(time.Duration(m) * time.Minute)}, emit)
		}
		m++
	}
	for i := 0; i < 100; i++ {
		add()
	}
	if n := testing.AllocsPerRun(1000, add); n != 0 {
		t.Fatalf("%.2f allocations per 4 readings in steady state, want 0", n)
	}
	if sum == 0 || math.IsNaN(sum) {
		t.Fatal("no profiles emitted")
	}
}

func BenchmarkAssemblerAdd(b *testing.B) {
	depths := make([]float64, 24)
	for i := range depths {
		depths[i] = 0.5 + float64(i)
	}
	a := NewAssembler(10*time.Minute, 30*time.Minute, map[string][]float64{"a": depths})
	n := 0
	emit := func(p detect.Profile) { n++ }
	b.ReportAllocs()
	for i := 0; b.Loop(); i++ {
		a.Add(Reading{Site: "a", Depth: depths[i%24], TempC: 10, Time: asmT0.Add(time.Duration(i/24) * time.Minute)}, emit)
	}
}
