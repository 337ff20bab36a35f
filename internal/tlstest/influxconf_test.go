package tlstest

import (
	"context"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	influxdb2 "github.com/influxdata/influxdb-client-go/v2"

	"holomix/internal/testenv"
)

// TestExampleInfluxConfig starts InfluxDB 1.8 with deploy/influxdb.conf (its
// directories and ports moved into the test's temporary directory and free
// loopback ports, nothing else changed) and checks what the file promises:
// authentication is on (an anonymous query gets 401), and once the admin user
// exists the v2 write and Flux query endpoints holomix uses work with a
// "user:password" token.
func TestExampleInfluxConfig(t *testing.T) {
	root, err := testenv.RepoRoot()
	if err != nil {
		t.Fatal(err)
	}
	b, err := os.ReadFile(filepath.Join(root, "deploy", "influxdb.conf"))
	if err != nil {
		t.Fatal(err)
	}
	conf := string(b)
	for _, promise := range []string{"auth-enabled = true", "flux-enabled = true", "reporting-disabled = true"} {
		if !strings.Contains(conf, promise) {
			t.Fatalf("deploy/influxdb.conf no longer says %q", promise)
		}
	}
	in := testenv.StartInfluxConfig(t, func(dir string, httpPort, rpcPort int) (string, error) {
		c := conf
		for from, to := range map[string]string{
			"/var/lib/influxdb": dir,
			`"127.0.0.1:8086"`:  fmt.Sprintf(`"127.0.0.1:%d"`, httpPort),
			`"127.0.0.1:8088"`:  fmt.Sprintf(`"127.0.0.1:%d"`, rpcPort),
		} {
			if !strings.Contains(c, from) {
				return "", fmt.Errorf("deploy/influxdb.conf no longer contains %q", from)
			}
			c = strings.ReplaceAll(c, from, to)
		}
		return c, nil
	})
	base := in.URL
	// q runs one statement and returns the HTTP status; a 200 whose body
	// carries an InfluxQL error fails the test with that error.
	q := func(user, pass, stmt string) int {
		t.Helper()
		req, _ := http.NewRequest(http.MethodPost, base+"/query", strings.NewReader(url.Values{"q": {stmt}}.Encode()))
		req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
		if user != "" {
			req.SetBasicAuth(user, pass)
		}
		resp, err := http.DefaultClient.Do(req)
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		body, _ := io.ReadAll(resp.Body)
		if resp.StatusCode == http.StatusOK && strings.Contains(string(body), `"error"`) {
			t.Fatalf("%s: HTTP 200 with an error: %s\n%s", stmt, body, in.Log())
		}
		return resp.StatusCode
	}
	// The first admin may be created anonymously, as the file's comment says.
	if code := q("", "", `CREATE USER admin WITH PASSWORD 'adm-pw-6620' WITH ALL PRIVILEGES`); code != http.StatusOK {
		t.Fatalf("create admin: HTTP %d\n%s", code, in.Log())
	}
	if code := q("", "", "SHOW DATABASES"); code != http.StatusUnauthorized {
		t.Fatalf("anonymous query: HTTP %d, want 401 (auth-enabled)\n%s", code, in.Log())
	}
	if code := q("admin", "adm-pw-6620", "CREATE DATABASE lake"); code != http.StatusOK {
		t.Fatalf("create database: HTTP %d", code)
	}
	client := influxdb2.NewClient(base, "admin:adm-pw-6620")
	defer client.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	if err := client.WriteAPIBlocking("", "lake/autogen").WriteRecord(ctx, "water_temperature,depth_m=18,site=larchmere qc=0i,temp_c=4.02 1795000000000000000"); err != nil {
		t.Fatalf("v2 write: %v", err)
	}
	res, err := client.QueryAPI("").Query(ctx, `from(bucket: "lake/autogen") |> range(start: 2026-01-01T00:00:00Z, stop: 2027-01-01T00:00:00Z) |> filter(fn: (r) => r._field == "temp_c")`)
	if err != nil {
		t.Fatalf("flux query (flux-enabled): %v", err)
	}
	n := 0
	for res.Next() {
		if res.Record().Value() != 4.02 {
			t.Fatalf("read back %v", res.Record().Value())
		}
		n++
	}
	if res.Err() != nil || n != 1 {
		t.Fatalf("flux result: %d records, %v", n, res.Err())
	}
	bad := influxdb2.NewClient(base, "admin:wrong")
	defer bad.Close()
	if err := bad.WriteAPIBlocking("", "lake/autogen").WriteRecord(ctx, "water_temperature,depth_m=1,site=x temp_c=1 1795000000000000000"); err == nil {
		t.Fatal("a write with a wrong password was accepted")
	}
}
