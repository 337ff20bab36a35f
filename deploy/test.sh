#!/usr/bin/env bash
# Run every holomix test on this machine, installing what the tests need first:
# Mosquitto (broker), python3-gsw (TEOS-10 reference for the physics checks) and
# Chromium (status-page browser test) from Debian, and InfluxDB 1.8.10 built from
# source once into .cache/bin. Tests start their own servers on loopback.
#
# Usage: ./deploy/test.sh            all tests (what CI runs)
#        FUZZTIME=30s ./deploy/test.sh   longer fuzzing of the payload decoders
set -euo pipefail
cd "$(dirname "$0")/.."
ROOT=$PWD
export GOFLAGS="${GOFLAGS:-} -mod=mod"
FUZZTIME="${FUZZTIME:-5s}"

log() { printf '\n== %s\n' "$*"; }

command -v go >/dev/null || { echo "test.sh: Go is required (https://go.dev/doc/install); none found on PATH" >&2; exit 1; }

# --- Debian packages -----------------------------------------------------------
need=()
command -v mosquitto >/dev/null 2>&1 || [ -x /usr/sbin/mosquitto ] || need+=(mosquitto)
/usr/bin/python3 -c 'import gsw' >/dev/null 2>&1 || need+=(python3-gsw)
command -v chromium >/dev/null 2>&1 || need+=(chromium)
if [ ${#need[@]} -gt 0 ]; then
  if [ "$(id -u)" -eq 0 ] && command -v apt-get >/dev/null; then
    log "installing ${need[*]} from Debian"
    apt-get update -qq
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends "${need[@]}" >/dev/null
  else
    echo "test.sh: missing ${need[*]}; install with: sudo apt-get update && sudo apt-get install -y ${need[*]}" >&2
    exit 1
  fi
fi
# A packaged broker may have started itself on 1883; tests use their own ports, so it is left alone.

# --- InfluxDB 1.8.10, built once ----------------------------------------------
INFLUXD="$ROOT/.cache/bin/influxd"
if [ ! -x "$INFLUXD" ]; then
  log "building InfluxDB 1.8.10 into .cache/bin (once, about 90 s)"
  mkdir -p "$ROOT/.cache/bin"
  (cd /tmp && GOFLAGS= GOBIN="$ROOT/.cache/bin" go install github.com/influxdata/influxdb/cmd/influxd@v1.8.10)
fi
export HOLOMIX_INFLUXD="$INFLUXD"

# --- static checks ---------------------------------------------------------------
log "gofmt"
unformatted=$(gofmt -l $(git ls-files '*.go' 2>/dev/null || find . -name '*.go' -not -path './.cache/*'))
if [ -n "$unformatted" ]; then echo "gofmt wants to rewrite: $unformatted" >&2; exit 1; fi
log "go vet"
go vet ./...
log "systemd unit"
./deploy/verify-unit.sh

# --- fuzzing (brief; deploy/faults.sh runs each target longer) ------------------
# Logs of this run in a directory of its own (two checkouts may test at once).
logs=$(mktemp -d -t holomix-test.XXXXXX)
log "fuzzing payload decoders, $FUZZTIME each"
for target in $(go test -list '^Fuzz' ./ingest/ | grep '^Fuzz' || true); do
  ./deploy/fuzz-one.sh "$target" "$FUZZTIME" "$logs/fuzz.log" || { cat "$logs/fuzz.log"; exit 1; }
  echo "  $target ok"
done

# --- all tests --------------------------------------------------------------------
log "go test -race ./..."
set +e
go test -race -count=1 -timeout 45m ./... 2>&1 | tee "$logs/test.log"
status=${PIPESTATUS[0]}
set -e
# Detector scoring against 20 simulated seasons: pure computation, too slow under
# the race detector (the detect and engine packages are raced above), so it runs here.
log "detectors against simulator truth (20 seasons, no race detector)"
set +e
go test -count=1 -timeout 20m -run 'TestDetectorsAgainstSimulatorTruth' -v ./internal/demo/ 2>&1 | tee -a "$logs/test.log"
truth=${PIPESTATUS[0]}
set -e
[ "$truth" -eq 0 ] || status=1
passed=$(grep -c '^ok ' "$logs/test.log" || true)
failed=$(grep -c '^FAIL\s' "$logs/test.log" || true)
echo
echo "packages: $passed passed, $failed failed (log: $logs/test.log)"
exit "$status"
