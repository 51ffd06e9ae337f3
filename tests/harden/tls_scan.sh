#!/usr/bin/env bash
# TLS scan of likenessd with testssl.sh (Debian's package testssl.sh, command
# `testssl`): protocols, cipher categories, forward secrecy, server defaults,
# HTTP security headers and the usual vulnerabilities, as flat JSON.
#   bash tests/harden/tls_scan.sh OUT.json
# BIN (default build-release/bin, else $LIKENESS_BIN) names the build whose
# likenessd is scanned, with development certificates and the default
# tls_priorities. A run takes about 45 s on 2 cores (testssl's own sockets,
# not --fast: with --fast the RC4 check needs an OpenSSL that still has RC4,
# which Debian's has not).
set -euo pipefail
cd "$(dirname "$0")/../.."
ROOT=$PWD
. tests/lib/service.sh
OUT=${1:?usage: tls_scan.sh OUT.json}
case "$OUT" in /*) ;; *) OUT=$PWD/$OUT ;; esac
BIN=${BIN:-${LIKENESS_BIN:-$ROOT/build-release/bin}}
TESTSSL=$(command -v testssl || command -v testssl.sh || true)
[ -n "$TESTSSL" ] || { echo "tls_scan: testssl.sh is not installed (apt-get install testssl.sh)" >&2; exit 3; }
[ -x "$BIN/likenessd" ] || { echo "tls_scan: missing $BIN/likenessd" >&2; exit 2; }

T=$(mktemp -d)
PORT=$((20000 + RANDOM % 20000))
# The service's stderr is kept beside OUT (OUT.likenessd.log) once it has
# stopped, for the caller to look for sanitizer reports.
cleanup() {
  [ -n "${PID:-}" ] && kill "$PID" 2>/dev/null
  wait 2>/dev/null
  [ -f "$T/log" ] && cp "$T/log" "$OUT.likenessd.log"
  rm -rf "$T"
}
trap cleanup EXIT
lk_service_setup "$T" "$PORT" "workers = 1"
lk_service_start "$T"
PID=$LK_PID
# A slow start (sanitized build) is scanned anyway; an exit is not.
lk_wait_healthy "https://127.0.0.1:$PORT/healthz" "$T/tls/ca.crt" 150 "$PID" || kill -0 "$PID" 2>/dev/null ||
  { echo "tls_scan: likenessd did not start" >&2; cat "$T/log" >&2; exit 1; }
rm -f "$OUT"
# -p protocols, -s cipher categories, -f forward secrecy, -S server defaults
# (certificate), -h headers, -U vulnerabilities. The certificate is from a development CA the scanner does
# not trust: its chain-of-trust finding is expected.
"$TESTSSL" --quiet --color 0 --warnings off --openssl-timeout 10 \
    -p -s -f -S -h -U --jsonfile "$OUT" "127.0.0.1:$PORT" > "$T/scan.txt" 2>&1 || true
kill -0 "$PID" || { echo "tls_scan: likenessd died during the scan" >&2; tail -20 "$T/log" >&2; exit 1; }
[ -s "$OUT" ] || { echo "tls_scan: testssl wrote no JSON" >&2; tail -30 "$T/scan.txt" >&2; exit 1; }
echo "tls_scan: $(grep -c '"id"' "$OUT") findings in $OUT"
