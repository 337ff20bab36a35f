package status

import (
	"math"
	"testing"
	"time"

	"holomix/detect"
)

func TestStore_HistoryBoundedAndThinned(t *testing.T) {
	st := NewStore([]SiteMeta{{ID: "a", MaxDepth: 10}}, 3)
	// 10 days of one profile per minute.
	for i := 0; i < 10*24*60; i++ {
		at := t0.Add(time.Duration(i) * time.Minute)
		st.ObserveColumn(detect.Column{Site: "a", Time: at, State: "mixed"}, detect.Profile{Site: "a", Time: at, Depths: []float64{1, 9}, Temps: []float64{5, 4}})
	}
	v, _, _, ok := st.siteSnapshot("a")
	if !ok {
		t.Fatal("no site")
	}
	if n, max := len(v.Hist), 3*histPerDay+1; n > max || n < max-2 {
		t.Errorf("%d history points, want about %d (3 days at 5 min)", n, max)
	}
	newest := v.Hist[len(v.Hist)-1].t
	if !newest.Equal(t0.Add((10*24*60 - 1) * time.Minute)) {
		t.Errorf("newest %v", newest)
	}
	if newest.Sub(v.Hist[0].t) > 3*24*time.Hour {
		t.Errorf("history spans %v", newest.Sub(v.Hist[0].t))
	}
	for i := 1; i < len(v.Hist); i++ {
		if !v.Hist[i].t.After(v.Hist[i-1].t) {
			t.Fatal("history not ascending")
		}
	}
	if c := st.Counters(); c.Columns != 10*24*60 {
		t.Errorf("counters %+v", c)
	}
}

func TestStore_LateProfileInsertedInOrder(t *testing.T) {
	st := NewStore([]SiteMeta{{ID: "a"}}, 1)
	for _, m := range []int{0, 20, 10} {
		at := t0.Add(time.Duration(m) * time.Minute)
		st.ObserveColumn(detect.Column{Site: "a", Time: at, State: "mixed"}, detect.Profile{Depths: []float64{1}, Temps: []float64{float64(m)}})
	}
	v, _, _, _ := st.siteSnapshot("a")
	if len(v.Hist) != 3 || v.Hist[1].temps[0] != 10 {
		t.Fatalf("history %+v", v.Hist)
	}
	// The latest column stays the newest in data time.
	if !v.Col.Time.Equal(t0.Add(20 * time.Minute)) {
		t.Errorf("latest %v", v.Col.Time)
	}
	if v.MaxDepth != 1 {
		t.Errorf("max depth from data %v", v.MaxDepth)
	}
}

func TestStore_EventsAlertsAndEpisodes(t *testing.T) {
	st := NewStore([]SiteMeta{{ID: "a", Name: "A"}}, 1)
	for i := 0; i < 250; i++ {
		st.ObserveEvent(detect.Event{Time: t0.Add(time.Duration(i) * time.Minute), Site: "a", Kind: detect.KindDegreeDays, Status: detect.StatusFiring})
		st.ObserveAlert(AlertLine{Time: t0, Site: "a", Summary: "n"})
	}
	st.ObserveEvent(detect.Event{Time: t0, Site: "a", Kind: detect.KindFrazilRisk, Status: detect.StatusFiring, Subject: "surface"})
	st.ObserveEvent(detect.Event{Time: t0.Add(time.Hour), Site: "a", Kind: detect.KindFrazilRisk, Status: detect.StatusUpdate, Subject: "surface", Summary: "raised"})
	st.ObserveEvent(detect.Event{Time: t0, Site: "a", Kind: detect.KindSensorFault, Status: detect.StatusFiring, Subject: "5 m"})
	v, al, _, _ := st.siteSnapshot("a")
	if len(v.Events) != eventsPerSite || len(al) != alertLines {
		t.Errorf("events %d alerts %d, want %d and %d", len(v.Events), len(al), eventsPerSite, alertLines)
	}
	if len(v.Open) != 2 || v.Open[0].Kind != detect.KindFrazilRisk || v.Open[0].Summary != "raised" || !episodeStart(v.Open[0]).Equal(t0) {
		t.Fatalf("open episodes %+v", v.Open)
	}
	st.ObserveEvent(detect.Event{Time: t0.Add(2 * time.Hour), Site: "a", Kind: detect.KindFrazilRisk, Status: detect.StatusResolved, Subject: "surface"})
	v, _, _, _ = st.siteSnapshot("a")
	if len(v.Open) != 1 || v.Open[0].Kind != detect.KindSensorFault {
		t.Errorf("after resolve: %+v", v.Open)
	}
}

func TestStore_BadInputCounted(t *testing.T) {
	st := NewStore([]SiteMeta{{ID: "a"}, {ID: "a"}, {ID: ""}}, 0)
	if c := st.Counters(); c.Dropped != 2 {
		t.Errorf("duplicate and empty metas: %+v", c)
	}
	st.ObserveColumn(detect.Column{Site: "", State: "mixed"}, detect.Profile{})
	st.ObserveColumn(detect.Column{Site: "a"}, detect.Profile{})                                                            // ignored
	st.ObserveColumn(detect.Column{Site: "a", Rejected: true, State: "unknown", Reason: "rejected: bad"}, detect.Profile{}) // rejected
	st.ObserveEvent(detect.Event{Site: "new", Kind: detect.KindOverturn})
	c := st.Counters()
	if c.Dropped != 3 || c.Ignored != 1 || c.Rejected != 1 || c.UnknownSites != 1 || c.Events != 1 {
		t.Errorf("counters %+v", c)
	}
	if _, _, _, ok := st.siteSnapshot("new"); !ok {
		t.Error("site named by data not added")
	}
	v, _, _, _ := st.siteSnapshot("a")
	if v.Has || v.RejReason != "rejected: bad" {
		t.Errorf("rejected column stored as data: %+v", v)
	}
	if st.HistoryWindow() != DefaultHistoryDays*24*time.Hour {
		t.Errorf("default window %v", st.HistoryWindow())
	}
}

// The store keeps its own copies: the caller may reuse its buffers.
func TestStore_CopiesInput(t *testing.T) {
	st := NewStore([]SiteMeta{{ID: "a"}}, 1)
	d, tt := []float64{1, 2}, []float64{5, 6}
	st.ObserveColumn(detect.Column{Site: "a", Time: t0, State: "mixed"}, detect.Profile{Depths: d, Temps: tt})
	tt[0] = math.NaN()
	v, _, _, _ := st.siteSnapshot("a")
	if v.Prof.Temps[0] != 5 || v.Hist[0].temps[0] != 5 {
		t.Error("store shares the caller's slice")
	}
}
