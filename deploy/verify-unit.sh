#!/usr/bin/env bash
# Check deploy/holomix.service with systemd's own verifier, and print its
# exposure score. Needs systemd-analyze (Debian package systemd); without it the
# check is skipped with a message, so the result depends on the machine.
#
# The unit's ExecStart names /usr/local/bin/holomix, which `verify` requires to
# exist and be executable; the check uses a copy whose ExecStart points at
# $HOLOMIX_BIN (e.g. a built binary) or at a stand-in executable, nothing else
# changed. HOLOMIX_UNIT checks another unit file.
set -euo pipefail
cd "$(dirname "$0")/.."
UNIT="${HOLOMIX_UNIT:-deploy/holomix.service}"

if ! command -v systemd-analyze >/dev/null 2>&1; then
  echo "verify-unit: skipped: systemd-analyze not installed (apt-get install -y systemd)"
  exit 0
fi

tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
bin="${HOLOMIX_BIN:-}"
if [ -z "$bin" ]; then
  bin="$tmp/holomix"
  printf '#!/bin/sh\nexit 0\n' >"$bin"
  chmod 0755 "$bin"
fi
sed "s#/usr/local/bin/holomix#$bin#g" "$UNIT" >"$tmp/holomix.service"

# verify prints nothing and exits 0 when the unit is clean; any warning fails the check.
out=$(systemd-analyze verify "$tmp/holomix.service" 2>&1) || { echo "$out" >&2; echo "verify-unit: $UNIT failed systemd-analyze verify" >&2; exit 1; }
if [ -n "$out" ]; then
  echo "$out" >&2
  echo "verify-unit: systemd-analyze verify warned about $UNIT" >&2
  exit 1
fi

# Exposure score (0 = fully locked down, 10 = unprotected); fail above 2.0.
score=$(systemd-analyze security --offline=true "$tmp/holomix.service" 2>/dev/null | sed -n 's/.*Overall exposure level for holomix.service: \([0-9.]*\).*/\1/p')
if [ -z "$score" ]; then
  echo "verify-unit: could not read the exposure score" >&2
  exit 1
fi
if ! awk -v s="$score" 'BEGIN { exit !(s <= 2.0) }'; then
  echo "verify-unit: exposure level $score is above 2.0" >&2
  exit 1
fi
echo "verify-unit: $UNIT ok (systemd-analyze verify clean, exposure level $score)"
