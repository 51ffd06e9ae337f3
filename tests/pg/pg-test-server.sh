#!/usr/bin/env bash
# A throwaway PostgreSQL 15 cluster for tests, on loopback only.
#
#   pg-test-server.sh start DIR PORT   initdb into DIR (if not done), start the
#                                      server on 127.0.0.1:PORT, create the
#                                      database likeness_test, print its URL:
#                                      postgres://postgres@127.0.0.1:PORT/likeness_test
#   pg-test-server.sh stop DIR         stop the server (fast) and remove DIR
#   pg-test-server.sh pause DIR        stop the server, keep DIR
#   pg-test-server.sh resume DIR       start a paused server again
#
# The server runs as the `postgres` OS user when this script runs as root
# (PostgreSQL refuses to run as root); DIR is given to that user, so its
# parent folders must let that user in. Authentication is `trust`, for
# 127.0.0.1 and the Unix socket inside DIR only. fsync, synchronous_commit
# and full_page_writes stay on: tests of crash consistency rely on them.
# Every command is idempotent; any failure prints why and exits non-zero.
set -euo pipefail

PGBIN=${PGBIN:-/usr/lib/postgresql/15/bin}
DBNAME=likeness_test

die() {
  echo "pg-test-server: $*" >&2
  exit 1
}

usage() {
  die "usage: $0 start DIR PORT | stop DIR | pause DIR | resume DIR"
}

for tool in initdb pg_ctl postgres psql; do
  [ -x "$PGBIN/$tool" ] ||
    die "$PGBIN/$tool is missing: install the PostgreSQL 15 server and client (apt-get install postgresql-15 postgresql-client-15)"
done
PSQL=$PGBIN/psql

# Runs a command as the cluster's owner.
as_owner() {
  if [ "$(id -u)" -eq 0 ]; then
    runuser -u postgres -- "$@"
  else
    "$@"
  fi
}

running() {
  as_owner "$PGBIN/pg_ctl" -D "$1" status >/dev/null 2>&1
}

start_server() {
  local dir=$1
  if running "$dir"; then
    return 0
  fi
  if ! as_owner "$PGBIN/pg_ctl" -D "$dir" -l "$dir/server.log" -w -t 60 start >/dev/null; then
    echo "pg-test-server: the server in $dir did not start; its log:" >&2
    tail -n 30 "$dir/server.log" >&2 || true
    exit 1
  fi
}

cmd=${1:-}
[ -n "$cmd" ] || usage
dir=${2:-}
[ -n "$dir" ] || usage
case "$dir" in /*) ;; *) dir=$PWD/$dir ;; esac

case "$cmd" in
start)
  port=${3:-}
  [[ "$port" =~ ^[0-9]+$ ]] && [ "$port" -ge 1024 ] && [ "$port" -le 65535 ] ||
    die "start needs a PORT between 1024 and 65535 (got '${port}')"
  if [ "$(id -u)" -eq 0 ]; then
    id postgres >/dev/null 2>&1 ||
      die "there is no 'postgres' OS user to run the server as (it comes with the postgresql-15 package)"
  fi
  mkdir -p "$dir"
  if [ "$(id -u)" -eq 0 ]; then
    chown postgres: "$dir"
  fi
  chmod 700 "$dir"
  as_owner test -w "$dir" ||
    die "the postgres user cannot write to $dir: let it into the parent folders (chmod o+x) or pick another DIR"

  if [ ! -f "$dir/PG_VERSION" ]; then
    [ -z "$(ls -A "$dir")" ] || die "$dir is neither empty nor a PostgreSQL cluster; refusing to use it"
    # --locale=C: byte order for text, the same on every machine.
    as_owner "$PGBIN/initdb" -D "$dir" -U postgres --auth=trust -E UTF8 --locale=C \
      --no-instructions >"$dir.initdb.log" 2>&1 || {
      cat "$dir.initdb.log" >&2
      die "initdb into $dir failed"
    }
    rm -f "$dir.initdb.log"
    as_owner tee -a "$dir/postgresql.conf" >/dev/null <<EOF

# pg-test-server.sh: loopback only, durable commits, a small footprint.
listen_addresses = '127.0.0.1'
port = $port
unix_socket_directories = '$dir'
fsync = on
synchronous_commit = on
full_page_writes = on
max_connections = 60
shared_buffers = 16MB
EOF
    as_owner tee "$dir/pg_hba.conf" >/dev/null <<EOF
# TYPE  DATABASE  USER  ADDRESS        METHOD
local   all       all                  trust
host    all       all   127.0.0.1/32   trust
EOF
  else
    grep -q "^port = $port\$" "$dir/postgresql.conf" ||
      die "$dir holds a cluster set up for another port; stop it first ($0 stop $dir)"
  fi
  start_server "$dir"

  exists=$("$PSQL" -X -q -A -t -h 127.0.0.1 -p "$port" -U postgres -d postgres \
    -c "SELECT 1 FROM pg_database WHERE datname = '$DBNAME'") ||
    die "cannot query the server on 127.0.0.1:$port"
  if [ "$exists" != 1 ]; then
    "$PSQL" -X -q -h 127.0.0.1 -p "$port" -U postgres -d postgres \
      -c "CREATE DATABASE $DBNAME" >/dev/null || die "cannot create database $DBNAME"
  fi
  [ "$("$PSQL" -X -q -A -t -h 127.0.0.1 -p "$port" -U postgres -d "$DBNAME" -c "SHOW fsync")" = on ] ||
    die "fsync is not on in $dir"
  echo "postgres://postgres@127.0.0.1:$port/$DBNAME"
  ;;
stop)
  if [ ! -e "$dir" ]; then
    echo "pg-test-server: $dir does not exist; nothing to stop" >&2
    exit 0
  fi
  [ -f "$dir/PG_VERSION" ] || [ -z "$(ls -A "$dir")" ] ||
    die "$dir is not a PostgreSQL cluster; refusing to remove it"
  if [ -f "$dir/PG_VERSION" ] && running "$dir"; then
    as_owner "$PGBIN/pg_ctl" -D "$dir" -m fast -w -t 60 stop >/dev/null ||
      die "pg_ctl could not stop the server in $dir"
  fi
  rm -rf "$dir"
  ;;
pause)
  [ -f "$dir/PG_VERSION" ] || die "$dir is not a PostgreSQL cluster"
  if running "$dir"; then
    as_owner "$PGBIN/pg_ctl" -D "$dir" -m fast -w -t 60 stop >/dev/null ||
      die "pg_ctl could not stop the server in $dir"
  fi
  ;;
resume)
  [ -f "$dir/PG_VERSION" ] || die "$dir is not a PostgreSQL cluster"
  start_server "$dir"
  ;;
*)
  usage
  ;;
esac
