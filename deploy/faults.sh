#!/usr/bin/env bash
# Fault suite, full mode: `holomix run` against a real Mosquitto and InfluxDB 1.8
# (loopback ports, started by the suite) under steady load with alert-triggering
# intake changes, through nine faults: SIGKILL ×3, InfluxDB down 60 s, InfluxDB
# down until the spool's size limit applies back-pressure, a broker restart, the
# webhook receiver down 2 min then 500 then 429, the storage disk full (32 MiB
# tmpfs; root needed, else the spool limit stands in), 10 % malformed payloads,
# clocks an hour ahead and a day late, SIGTERM under load. One results table;
# exit status 1 on any lost or duplicated reading or alert. Then every payload
# fuzz target runs for FUZZTIME (default 60s); a crasher is kept by `go test`
# under ingest/testdata/fuzz/<target>/ as a regression input and fails the run.
# About 20-25 minutes. (`go test ./deploy/faults/` runs the reduced mode.)
#
# Usage: deploy/faults.sh [-only NAMES|NUMBERS] [-out DIR]     FUZZTIME=10s deploy/faults.sh
set -euo pipefail
cd "$(dirname "$0")/.."
FUZZTIME="${FUZZTIME:-60s}"
if [ ! -x .cache/bin/influxd ] && ! command -v influxd >/dev/null 2>&1; then
  echo "faults.sh: InfluxDB 1.8 not found; run ./deploy/test.sh once (it builds .cache/bin/influxd)" >&2
  exit 1
fi
mkdir -p .cache
go build -o .cache/faults ./deploy/faults
status=0
.cache/faults -full "$@" || status=$?

echo
echo "== fuzzing every payload decoder, $FUZZTIME each"
marker=$(mktemp)
trap 'rm -f "$marker"' EXIT
for target in $(go test -list '^Fuzz' ./ingest/ | grep '^Fuzz' || true); do
  log=$(mktemp)
  if ./deploy/fuzz-one.sh "$target" "$FUZZTIME" "$log"; then
    echo "  $target: ok ($(grep -o 'execs: [0-9]*' "$log" | tail -1 | cut -d' ' -f2) executions)"
  else
    echo "  $target: FAILED"
    cat "$log"
    status=1
  fi
  rm -f "$log"
done
new=$(find ingest/testdata/fuzz -type f -newer "$marker" 2>/dev/null || true)
if [ -n "$new" ]; then
  echo "new crashers kept as regression inputs (commit them with the fix):"
  echo "$new"
  status=1
fi
exit "$status"
