package status

import (
	"io"
	"net/http/httptest"
	"strings"
	"testing"
)

// TestOverviewDatabaseNotConfigured: with no database configured the overview
// says so and does not flag the database as unreachable.
func TestOverviewDatabaseNotConfigured(t *testing.T) {
	st := NewStore([]SiteMeta{{ID: "a", Name: "A"}}, 0)
	for _, c := range []struct {
		h        Health
		want     string
		flagged  bool
		scenario string
	}{
		{Health{DBNotConfigured: true}, "not configured (readings stay spooled)", false, "no database"},
		{Health{DBReachable: true}, "<dd>reachable</dd>", false, "reachable"},
		{Health{}, `<span class="flag">UNREACHABLE</span>`, true, "unreachable"},
	} {
		h := c.h
		srv := httptest.NewServer(Handler(st, func() Health { return h }, Options{}))
		resp, err := srv.Client().Get(srv.URL + "/")
		if err != nil {
			t.Fatal(err)
		}
		b, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		srv.Close()
		page := string(b)
		if !strings.Contains(page, c.want) {
			t.Errorf("%s: page lacks %q", c.scenario, c.want)
		}
		if got := strings.Contains(page, "UNREACHABLE"); got != c.flagged {
			t.Errorf("%s: UNREACHABLE shown = %v, want %v", c.scenario, got, c.flagged)
		}
	}
}
