package main

import (
	"context"
	"fmt"
	"net/http"
	"net/http/httptest"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"

	"holomix/ingest"
	"holomix/internal/testenv"
)

// TestDaemonNeverRevealsSecrets runs the real daemon with every kind of secret
// set (broker password from a file over TLS with a client certificate, the
// database token from the environment against InfluxDB with authentication, a
// webhook secret from a file, status-page basic password from a file and bearer
// token from the environment), feeds it readings and a malformed message,
// reloads it with SIGHUP, scrapes /metrics, the status page and /api/sites,
// receives its webhooks, stops it, and checks that no secret appears in any of
// it: log, pages, metrics, webhook bodies and headers.
func TestDaemonNeverRevealsSecrets(t *testing.T) {
	bin := buildHolomix(t)
	dir := t.TempDir()
	secrets := map[string]string{
		"mqtt password":   "Mq-pw-larch-8812",
		"influx password": "Ix-pw-otter-5531",
		"webhook secret":  "whsec_aG9sb21peC10ZXN0LXdlYmhvb2stc2VjcmV0",
		"basic password":  "Bs-pw-hatchery-2231",
		"bearer token":    "Br-tok-9f8e7d6c5b4a",
	}
	// The webhook secret's decoded key would be as bad as the secret itself.
	secrets["webhook key"] = "holomix-test-webhook-secret"

	pki := testenv.GenerateTLS(t, filepath.Join(dir, "tls"))
	pwFile := filepath.Join(dir, "mosquitto.passwords")
	if out, err := exec.Command("mosquitto_passwd", "-b", "-c", pwFile, "buoyreader", secrets["mqtt password"]).CombinedOutput(); err != nil {
		t.Fatalf("mosquitto_passwd (ships with the broker: apt-get install -y mosquitto): %v\n%s", err, out)
	}
	broker := testenv.StartMosquitto(t, testenv.MosquittoOptions{TLS: pki.Files(true), PasswordFile: pwFile, Extra: testenv.MosquittoUserLine()})
	db := testenv.StartInflux(t, testenv.InfluxOptions{Auth: true, Username: "holomix", Password: secrets["influx password"]})
	hooks := &webhookCollector{}
	hookSrv := httptest.NewServer(hooks)
	defer hookSrv.Close()

	write := func(name, v string) string {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, []byte(v+"\n"), 0o600); err != nil {
			t.Fatal(err)
		}
		return p
	}
	httpPort := testenv.FreePort(t)
	cfg := fmt.Sprintf(`mqtt:
  broker: %s
  client_id: holomix-secrets-test
  username: buoyreader
  password: {file: %s}
  tls:
    ca_file: %s
    cert_file: %s
    key_file: %s
  subscriptions:
    - topic: buoys/+/chain
      template: buoys/{site}/chain
influx:
  url: %s
  bucket: %s
  token: {env: HOLOMIX_TEST_INFLUX_TOKEN}
storage:
  dir: %s
sites:
  - id: fenwater
    max_depth_m: 10
    sensor_depths_m: [0.5, 2, 4, 6, 8]
detect:
  hold_time: 1h
  watermark: 20m
alerts:
  receivers:
    - name: lab
      url: %s/hook
      secret: {file: %s}
      send_resolved: true
    - name: ops
      type: log
http:
  listen: 127.0.0.1:%d
  basic_user: hatchery
  basic_password: {file: %s}
  bearer_token: {env: HOLOMIX_TEST_BEARER}
log:
  level: debug
`, broker.TLSURL, write("mqtt.password", secrets["mqtt password"]), pki.CAFile, pki.ClientCertFile, pki.ClientKeyFile,
		db.URL, db.Bucket, filepath.Join(dir, "state"), hookSrv.URL, write("hook.secret", secrets["webhook secret"]),
		httpPort, write("basic.password", secrets["basic password"]))
	cfgPath := write("holomix.yaml", cfg)
	env := []string{"HOLOMIX_TEST_INFLUX_TOKEN=holomix:" + secrets["influx password"], "HOLOMIX_TEST_BEARER=" + secrets["bearer token"]}

	d := newDaemon(t, "holomix run", bin, env, "run", "-c", cfgPath)
	d.start()
	base := fmt.Sprintf("http://127.0.0.1:%d", httpPort)
	bearer := "Bearer " + secrets["bearer token"]
	d.waitHTTP(base+"/api/sites", bearer, 30*time.Second)

	// Readings over TLS from a second client, and one malformed message.
	pubOpts := mqtt.NewClientOptions().AddBroker(broker.TLSURL).SetClientID("secrets-test-publisher").
		SetUsername("buoyreader").SetPassword(secrets["mqtt password"])
	tc, err := ingest.TLSConfig(loadTLS(pki.CAFile, pki.ClientCertFile, pki.ClientKeyFile), broker.TLSURL)
	if err != nil {
		t.Fatal(err)
	}
	pubOpts.SetTLSConfig(tc)
	pub := mqtt.NewClient(pubOpts)
	if tok := pub.Connect(); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		t.Fatalf("publisher: %v", tok.Error())
	}
	defer pub.Disconnect(100)
	// The two-instance scenario (stratified, cooling, mixed): it raises alerts,
	// so webhook bodies and headers are checked too.
	start := time.Now().UTC().Add(-time.Duration(partitionSteps+3) * 10 * time.Minute).Truncate(10 * time.Minute)
	n := 0
	for step := 0; step < partitionSteps; step++ {
		for di, dep := range partitionDepths {
			publish(t, pub, "buoys/fenwater/chain", chainReading(start.Add(time.Duration(step)*10*time.Minute), dep, partitionTemp(2, step, di)))
			n++
		}
	}
	publish(t, pub, "buoys/fenwater/chain", `{"time": "not a time", "depth_m": "deep", "temp_c": }`)

	// Wait until the readings are in the database (the writer authenticated).
	ctx := context.Background()
	deadline := time.Now().Add(60 * time.Second)
	for {
		counts, err := influxCount(ctx, db.InfluxQL, db.Token, `SELECT COUNT(temp_c) FROM water_temperature GROUP BY site`)
		if err == nil && counts["fenwater"] == int64(n) {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("readings not stored within 60 s (counts %v, err %v)\n%s", counts, err, d.tail())
		}
		time.Sleep(200 * time.Millisecond)
	}

	for deadline := time.Now().Add(30 * time.Second); len(hooks.all()) == 0; time.Sleep(200 * time.Millisecond) {
		if time.Now().After(deadline) {
			t.Fatalf("no webhook delivered within 30 s\n%s", d.tail())
		}
	}

	// Reload: the daemon must survive SIGHUP and say what it did, without secrets.
	d.signal(syscall.SIGHUP)
	time.Sleep(time.Second)
	if !d.running() {
		t.Fatalf("daemon exited on SIGHUP (reload is not handled)\n%s", d.tail())
	}
	d.waitHTTP(base+"/api/sites", bearer, 10*time.Second)

	pages := map[string]string{}
	for _, path := range []string{"/", "/api/sites", "/api/sites/fenwater", "/sites/fenwater", "/metrics", "/healthz", "/readyz"} {
		code, body, hdr, err := httpGet(base+path, bearer)
		if err != nil {
			t.Fatalf("GET %s: %v", path, err)
		}
		if path != "/readyz" && code != http.StatusOK {
			t.Errorf("GET %s with the bearer token: %d\n%.300s", path, code, body)
		}
		pages[path] = fmt.Sprintf("%v\n%s", hdr, body)
	}
	if !strings.Contains(pages["/metrics"], "# TYPE") {
		t.Errorf("/metrics does not look like Prometheus text:\n%.500s", pages["/metrics"])
	}

	t.Run("configured authentication is enforced", func(t *testing.T) {
		for _, path := range []string{"/", "/api/sites", "/metrics"} {
			if code, _, hdr, err := httpGet(base+path, ""); err != nil || code != http.StatusUnauthorized || hdr.Get("WWW-Authenticate") == "" {
				t.Errorf("GET %s without credentials: %d %v (want 401 with a challenge; mount internal/httpauth.Wrap)", path, code, err)
			}
			if code, _, _, _ := httpGet(base+path, "Bearer wrong-token"); code != http.StatusUnauthorized {
				t.Errorf("GET %s with a wrong token: %d, want 401", path, code)
			}
		}
		req, _ := http.NewRequest(http.MethodGet, base+"/api/sites", nil)
		req.SetBasicAuth("hatchery", secrets["basic password"])
		resp, err := http.DefaultClient.Do(req)
		if err != nil || resp.StatusCode != http.StatusOK {
			t.Errorf("basic credentials refused: %v %v", resp, err)
		}
		if resp != nil {
			resp.Body.Close()
		}
	})

	if code := d.stop(60 * time.Second); code != 0 {
		t.Errorf("daemon exit code %d after SIGTERM, want 0", code)
	}

	check := func(where, text string) {
		t.Helper()
		if found := containsAny(text, secrets); len(found) > 0 {
			t.Errorf("%s reveals %v", where, found)
		}
	}
	log := d.out.String()
	if !strings.Contains(log, "fenwater") && !strings.Contains(log, "buoys/") {
		t.Errorf("the daemon's log says nothing about its work; is it captured?\n%s", d.tail())
	}
	check("daemon log", log)
	for path, body := range pages {
		check("GET "+path, body)
	}
	for i, h := range hooks.all() {
		check(fmt.Sprintf("webhook %d body", i), h.Body)
		check(fmt.Sprintf("webhook %d headers", i), fmt.Sprint(h.Header))
	}
	check("mosquitto log", broker.Log())
	t.Logf("checked %d bytes of log, %d pages, %d webhooks", len(log), len(pages), len(hooks.all()))
}
