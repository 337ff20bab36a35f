#!/bin/sh
# Replay benchmark: a synthetic year of 1-minute data at 24 depths for one site
# (12 614 400 readings) through `holomix replay` on one core.
#
#   deploy/bench-replay.sh [YEAR_FILE]     (default /tmp/holomix-year.csv.gz, generated when absent)
#   FORMAT=long deploy/bench-replay.sh /tmp/holomix-year-long.csv.gz
#
# Prints readings per second (wall clock and CPU time) and the peak resident
# set size. The generated file is not part of the repository.
set -eu
cd "$(dirname "$0")/.."
year=${1:-/tmp/holomix-year.csv.gz}
bin=$(mktemp -d)
trap 'rm -rf "$bin"' EXIT
go build -o "$bin/holomix" ./cmd/holomix
if [ ! -s "$year" ]; then
	if [ "${FORMAT:-wide}" = long ]; then
		go run ./deploy/gen-year -long -o "$year"
	else
		go run ./deploy/gen-year -o "$year"
	fi
fi
GOMAXPROCS=1 /usr/bin/time -v "$bin/holomix" replay "$year" >/dev/null 2>"$bin/err"
readings=$(sed -n 's/^replayed \([0-9]*\) readings.*/\1/p' "$bin/err")
wall=$(sed -n 's/.*Elapsed (wall clock) time (h:mm:ss or m:ss): //p' "$bin/err")
user=$(sed -n 's/.*User time (seconds): //p' "$bin/err")
sys=$(sed -n 's/.*System time (seconds): //p' "$bin/err")
rss=$(sed -n 's/.*Maximum resident set size (kbytes): //p' "$bin/err")
grep '^replayed' "$bin/err"
echo "command: GOMAXPROCS=1 /usr/bin/time -v holomix replay $year"
awk -v n="$readings" -v w="$wall" -v u="$user" -v s="$sys" -v r="$rss" 'BEGIN {
	k = split(w, p, ":"); secs = 0; for (i = 1; i <= k; i++) secs = secs * 60 + p[i]
	printf "readings: %d\nwall: %.2f s -> %.0f readings/s\ncpu (user+sys): %.2f s -> %.0f readings/s\npeak RSS: %.1f MiB\n",
		n, secs, n / secs, u + s, n / (u + s), r / 1024
}'
