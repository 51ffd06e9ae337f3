#!/usr/bin/env bash
# Soak: likenessd (release build) at saturation for MINUTES (default 10) with
# wrk over TLS keep-alive, resident memory sampled from /proc every 10 s.
# Reports requests, statuses (no 5xx other than 503 allowed), RSS at the
# start of load (after a 30 s warm-up) and at the end, and the growth in %.
#   bash tests/harden/soak.sh [MINUTES] [CONNECTIONS]
# Not a CTest test. Needs wrk (Debian's package) and the LFW photos in
# ../shared (or PROBE and REFERENCE); builds build-release/ if it is missing.
# The load alternates between image-vs-image and image-vs-template
# verifications (one wrk run each, back to back), as tests/bench/bench_http.sh
# builds them.
set -euo pipefail
cd "$(dirname "$0")/../.."
ROOT=$PWD
. tests/lib/service.sh
MINUTES=${1:-10}
CONNS=${2:-8}
BIN=${BIN:-$ROOT/build-release/bin}
LFW=${LFW:-$ROOT/../shared/datasets/lfw/lfw-deepfunneled}
PROBE=${PROBE:-$LFW/Aaron_Peirsol/Aaron_Peirsol_0001.jpg}
REFERENCE=${REFERENCE:-$LFW/Aaron_Peirsol/Aaron_Peirsol_0002.jpg}
command -v wrk >/dev/null || { echo "soak: wrk is not installed (apt-get install wrk)" >&2; exit 1; }
if [ ! -x "$BIN/likenessd" ]; then
  cmake -S "$ROOT" -B "$ROOT/build-release" -DCMAKE_BUILD_TYPE=Release >/dev/null
  cmake --build "$ROOT/build-release" -j2 --target likenessd likeness >/dev/null
fi
for f in "$BIN/likenessd" "$PROBE" "$REFERENCE"; do
  [ -e "$f" ] || { echo "soak: missing $f" >&2; exit 1; }
done

T=$(mktemp -d)
PORT=$((20000 + RANDOM % 20000))
cleanup() {
  [ -n "${SAMPLER:-}" ] && kill "$SAMPLER" 2>/dev/null
  [ -n "${LK_PID:-}" ] && kill "$LK_PID" 2>/dev/null
  wait 2>/dev/null
  rm -rf "$T"
}
trap cleanup EXIT
lk_load_service "$T" "$PORT" soak lksoak5e1f "$PROBE" "$REFERENCE"
PID=$LK_PID
U=https://127.0.0.1:$PORT

rss() { awk '/VmRSS/ {print $2}' "/proc/$PID/status"; }
( while kill -0 "$PID" 2>/dev/null; do echo "$(date +%s) $(rss)"; sleep 10; done ) > "$T/rss" &
SAMPLER=$!
echo "soak: likenessd pid $PID, $(nproc) cores, $CONNS connections, $MINUTES min of load after a 30 s warm-up"
echo "RSS after start: $(rss) kB"
BODY="$T/pair.body" wrk -t2 -c"$CONNS" -d30s --timeout 20s -s tests/bench/wrk_post.lua \
    "$U/v1/verifications" | grep RESULT | sed 's/^RESULT/warm-up:/'
RSS0=$(rss)
echo "RSS at start of load: $RSS0 kB"
END=$(( $(date +%s) + MINUTES * 60 ))
: > "$T/results"
while [ "$(date +%s)" -lt "$END" ]; do
  for kind in pair tpl; do
    LEFT=$(( END - $(date +%s) ))
    [ "$LEFT" -le 0 ] && break
    D=$(( LEFT < 60 ? LEFT : 60 ))
    BODY="$T/$kind.body" wrk -t2 -c"$CONNS" -d"${D}s" --timeout 20s -s tests/bench/wrk_post.lua \
        "$U/v1/verifications" | grep RESULT | sed "s/^RESULT/$kind/" | tee -a "$T/results"
  done
done
RSS1=$(rss)
kill -0 "$PID" || { echo "soak: likenessd died" >&2; tail -20 "$T/log" >&2; exit 1; }
/usr/bin/python3 - "$T/results" "$T/rss" "$RSS0" "$RSS1" <<'PY'
import re, sys
res, rssf, r0, r1 = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4])
req = err = 0
st = {}
for ln in open(res):
    m = re.search(r"requests=(\d+) errors=(\d+) statuses=(\S*)", ln)
    if not m:
        continue
    req += int(m.group(1)); err += int(m.group(2))
    for kv in filter(None, m.group(3).split(",")):
        k, v = kv.split("=")
        st[k] = st.get(k, 0) + int(v)
samples = [int(l.split()[1]) for l in open(rssf) if len(l.split()) == 2]
bad5 = {k: v for k, v in st.items() if k.startswith("5") and k != "503"}
print(f"requests: {req} (socket errors/timeouts {err})")
print("statuses: " + ", ".join(f"{k}: {v}" for k, v in sorted(st.items())))
print(f"RSS at start of load: {r0} kB; at the end: {r1} kB; growth {100.0 * (r1 - r0) / r0:+.1f} %")
print(f"RSS samples every 10 s: min {min(samples)} kB, max {max(samples)} kB, {len(samples)} samples")
if bad5:
    print(f"FAIL: 5xx other than 503: {bad5}")
    sys.exit(1)
print("ok: no 5xx other than 503")
PY
grep -ci "sanitizer\|runtime error" "$T/log" >/dev/null && { echo "soak: sanitizer output in the log" >&2; exit 1; }
echo "soak: done $(date -u +%Y-%m-%dT%H:%MZ)"
