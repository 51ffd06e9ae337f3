#!/usr/bin/env bash
# Verifications per second of likenessd with one replica and with two
# replicas behind nginx (deploy/nginx/likeness.conf), all on this machine
# with one throwaway PostgreSQL store (tests/pg/pg-test-server.sh), driven
# by wrk over TLS keep-alive with the request bodies of
# tests/bench/bench_http.sh (one LFW pair; a probe against an enrolled
# template). Three set-ups, each measured for probe-vs-image and
# probe-vs-template:
#   direct   wrk -> replica 1
#   nginx-1  wrk -> nginx -> replica 1            (what nginx costs)
#   nginx-2  wrk -> nginx -> replicas 1 and 2
#   bash tests/deploy/bench_replicas.sh [SECONDS] [CONNECTIONS]
# Needs a build without sanitizers (BIN, default build-release/bin or
# build-deploy/bin), nginx, wrk, PostgreSQL 15 and LFW in ../shared.
# Not run by CTest.
set -euo pipefail
cd "$(dirname "$0")/../.."
ROOT=$PWD
. tests/lib/service.sh
SECS=${1:-15}
CONNS=${2:-8}
if [ -z "${BIN:-}" ]; then
  BIN=$ROOT/build-release/bin
  [ -x "$BIN/likenessd" ] || BIN=$ROOT/build-deploy/bin
fi
LFW=${LFW:-$ROOT/../shared/datasets/lfw/lfw-deepfunneled}
PROBE=${PROBE:-$LFW/Aaron_Peirsol/Aaron_Peirsol_0001.jpg}
REFERENCE=${REFERENCE:-$LFW/Aaron_Peirsol/Aaron_Peirsol_0002.jpg}
PY=/usr/bin/python3
NGINX=$(command -v nginx || echo /usr/sbin/nginx)
for f in "$BIN/likenessd" "$BIN/likeness" "$PROBE" "$REFERENCE"; do
  [ -e "$f" ] || { echo "bench_replicas: missing $f" >&2; exit 1; }
done
command -v wrk >/dev/null || { echo "bench_replicas: wrk is not installed (apt-get install wrk)" >&2; exit 1; }
[ -x "$NGINX" ] || { echo "bench_replicas: nginx is not installed (apt-get install nginx)" >&2; exit 1; }

T=$(mktemp -d)
chmod 711 "$T" # the PostgreSQL server runs as the postgres user when we are root
PIDS=()
cleanup() {
  for p in "${PIDS[@]}"; do kill "$p" 2>/dev/null || true; done
  wait 2>/dev/null || true
  bash tests/pg/pg-test-server.sh stop "$T/pg" >/dev/null 2>&1 || true
  rm -rf "$T"
}
trap cleanup EXIT
port() { $PY -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])'; }

URL=$(bash tests/pg/pg-test-server.sh start "$T/pg" "$(port)" | tail -n1)
lk_certs_and_keys "$T"
TOKEN=$("$BIN/likeness" keys api-create --store "$URL" --key-file "$T/keys" --name bench \
          --scopes verify,enrol 2>/dev/null)
export TOKEN

P1=$(port); P2=$(port); PN=$(port)
start_replica() { # start_replica N PORT
  cat > "$T/r$1.ini" <<INI
[server]
listen = 127.0.0.1
port = $2
cert_file = $T/tls/server.crt
key_file = $T/tls/server.key
queue_depth = 256
per_ip_connection_limit = 64
[model]
file = $ROOT/models/likeness-lfw.lkmodel
[store]
url = $URL
[keys]
file = $T/keys
[limits]
rate_per_second = 1000000
burst = 1000000
INI
  "$BIN/likenessd" --config "$T/r$1.ini" 2>"$T/r$1.log" &
  PIDS+=($!)
  lk_wait_healthy "https://localhost:$2/readyz" "$T/tls/ca.crt" 100 && return
  echo "bench_replicas: replica $1 did not become ready; its log:" >&2; tail "$T/r$1.log" >&2; exit 1
}
start_nginx() { # start_nginx NAME UPSTREAM_PORT...
  local d=$T/$1; shift
  mkdir -p "$d"
  local conf
  conf=$($PY tests/deploy/lkdeploy.py render-nginx deploy/nginx/likeness.conf "$d" "$PN" "$T/tls" "$@")
  "$NGINX" -c "$conf" -p "$d" -g 'daemon off;' 2>"$d/stderr.log" &
  NGINX_PID=$!
  PIDS+=($NGINX_PID)
  lk_wait_healthy "https://localhost:$PN/readyz" "$T/tls/ca.crt" 50 && return
  echo "bench_replicas: nginx did not start:" >&2; cat "$d/stderr.log" >&2; exit 1
}

start_replica 1 "$P1"
start_replica 2 "$P2"

# The bodies of tests/bench/bench_http.sh: the image pair, and the probe plus
# a template id.
B=lkbench7b1e
TID=$(lk_enrol_template "https://localhost:$P1" "$T/tls/ca.crt" "$TOKEN" "$REFERENCE")
lk_verification_bodies "$T" "$B" "$PROBE" "$REFERENCE" "$TID"
export CTYPE="multipart/form-data; boundary=$B"

measure() { # measure LABEL PORT
  for kind in pair tpl; do
    BODY="$T/$kind.body" wrk -t2 -c"$CONNS" -d"${SECS}s" --timeout 10s --latency \
        -s tests/bench/wrk_post.lua "https://localhost:$2/v1/verifications" |
      grep RESULT | sed "s/^RESULT/$1 $kind:/"
  done
}

echo "$(nproc) cores shared by wrk, nginx, the replicas and PostgreSQL;" \
     "workers = cores per replica; $CONNS connections, ${SECS}s per run"
measure direct "$P1"
start_nginx n1 "$P1"
measure nginx-1 "$PN"
kill "$NGINX_PID"; wait "$NGINX_PID" 2>/dev/null || true
start_nginx n2 "$P1" "$P2"
measure nginx-2 "$PN"
