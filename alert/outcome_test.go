package alert

import (
	"net/http"
	"sync"
	"testing"
	"time"

	"holomix/config"
	"holomix/detect"
)

// OnOutcome hears every delivery that ended, with its receiver and result:
// the status page's alert log is built from it.
func TestOnOutcomeReportsDeliveredAndFailed(t *testing.T) {
	ok := newSink(t, nil, nil)
	bad := newSink(t, nil, func(_ int, w http.ResponseWriter, _ *http.Request) {
		http.Error(w, "no such hook", http.StatusNotFound)
	})
	var mu sync.Mutex
	got := map[string]Outcome{}
	d, _ := testOpen(t, Options{
		Receivers: []config.Receiver{webhook("ok", ok.URL(), testSecret), webhook("bad", bad.URL(), testSecret), logReceiver("log")},
		OnOutcome: func(o Outcome) { mu.Lock(); got[o.Receiver] = o; mu.Unlock() },
	})
	run(t, d)
	if err := d.Submit(event("orrin", detect.KindOverturn, detect.StatusFiring, t0, "warning")); err != nil {
		t.Fatal(err)
	}
	waitFor(t, 5*time.Second, "three outcomes", func() bool { mu.Lock(); defer mu.Unlock(); return len(got) == 3 })
	mu.Lock()
	defer mu.Unlock()
	for name, want := range map[string]string{"ok": StateDelivered, "log": StateDelivered, "bad": StateFailed} {
		o := got[name]
		if o.State != want || o.SiteID != "orrin" || o.Kind != string(detect.KindOverturn) || !o.EventTime.Equal(t0) {
			t.Errorf("%s: outcome %+v, want state %s for the orrin overturn", name, o, want)
		}
	}
	if got["bad"].Error == "" {
		t.Errorf("failed outcome carries no error text")
	}
}
