#!/usr/bin/env bash
# Benchmark holomix on this machine: a bare pipeline (A) against `holomix run`
# (B), interleaved over rounds, for one reading per message and for 24-depth
# profiles, with Mosquitto's default in-flight window (20) and the one
# deploy/mosquitto.conf recommends (1000); then alert latency at half load,
# the daemon's peak memory with 1,000 sites × 30 depths and the replay
# benchmark (deploy/bench-replay.sh). It starts its own Mosquitto and InfluxDB
# 1.8 on loopback ports (deploy/test.sh installs both) and takes about 10-15
# minutes on 2 cores.
#
# Usage: deploy/bench.sh [flags of deploy/bench, e.g. -rounds 5 -parts throughput]
# Prints a markdown table; raw outputs go to bench-out/DATE-TIME/.
set -euo pipefail
cd "$(dirname "$0")/.."
if [ ! -x .cache/bin/influxd ] && ! command -v influxd >/dev/null 2>&1; then
  echo "bench.sh: InfluxDB 1.8 not found; run ./deploy/test.sh once (it builds .cache/bin/influxd)" >&2
  exit 1
fi
go build -o .cache/bench ./deploy/bench
exec .cache/bench "$@"
