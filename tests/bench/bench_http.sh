#!/usr/bin/env bash
# Throughput and latency of likenessd over TLS keep-alive, measured with wrk
# (Debian's package): image-vs-image and image-vs-template verifications,
# then resident memory after 10,000 requests. Rerun with
#   bash tests/bench/bench_http.sh [SECONDS] [CONNECTIONS]
# Needs a release build in build-release/ (deploy/run.sh or
#   cmake -S . -B build-release -DCMAKE_BUILD_TYPE=Release && cmake --build build-release)
# and the LFW photos in ../shared (or set PROBE and REFERENCE to two JPEGs).
set -euo pipefail
cd "$(dirname "$0")/../.."
ROOT=$PWD
. tests/lib/service.sh
SECS=${1:-30}
CONNS=${2:-8}
BIN=${BIN:-$ROOT/build-release/bin}
LFW=${LFW:-$ROOT/../shared/datasets/lfw/lfw-deepfunneled}
PROBE=${PROBE:-$LFW/Aaron_Peirsol/Aaron_Peirsol_0001.jpg}
REFERENCE=${REFERENCE:-$LFW/Aaron_Peirsol/Aaron_Peirsol_0002.jpg}
for f in "$BIN/likenessd" "$PROBE" "$REFERENCE"; do
  [ -e "$f" ] || { echo "bench_http: missing $f" >&2; exit 1; }
done
command -v wrk >/dev/null || { echo "bench_http: wrk is not installed (apt-get install wrk)" >&2; exit 1; }

T=$(mktemp -d)
PORT=$((20000 + RANDOM % 20000))
cleanup() { [ -n "${LK_PID:-}" ] && kill "$LK_PID" 2>/dev/null; wait 2>/dev/null; rm -rf "$T"; }
trap cleanup EXIT
lk_load_service "$T" "$PORT" bench lkbench7b1e "$PROBE" "$REFERENCE"
PID=$LK_PID
U=https://127.0.0.1:$PORT

rss() { awk '/VmRSS/ {print $2}' "/proc/$PID/status"; }
echo "likenessd $(nproc) cores, workers = cores, $CONNS connections, ${SECS}s per run"
echo "RSS after start: $(rss) kB"
for kind in pair tpl; do
  BODY="$T/$kind.body" wrk -t2 -c"$CONNS" -d"${SECS}s" --timeout 10s --latency \
      -s tests/bench/wrk_post.lua "$U/v1/verifications" | grep RESULT | sed "s/^RESULT/$kind:/"
done
# Resident memory after 10,000 requests in all (the runs above count too).
N=$(curl -sk "$U/metrics" | awk '/^likeness_http_requests_total/ {s += $2} END {print s}')
while [ "${N%.*}" -lt 10000 ]; do
  BODY="$T/tpl.body" wrk -t2 -c"$CONNS" -d10s -s tests/bench/wrk_post.lua "$U/v1/verifications" >/dev/null
  N=$(curl -sk "$U/metrics" | awk '/^likeness_http_requests_total/ {s += $2} END {print s}')
done
echo "RSS after $N requests: $(rss) kB"
