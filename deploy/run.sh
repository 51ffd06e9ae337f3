#!/usr/bin/env bash
# Starts likenessd on https://localhost:8443 with the default model and the
# embedded SQLite store, doing every set-up step that is missing first:
#   1. installs the Debian packages (deploy/install-deps.sh),
#   2. builds a release build in build-release/,
#   3. makes development certificates (certs-example/make-dev-certs.sh),
#      a master key file (mode 0600), a configuration and an API key,
#      all under .likeness-dev/ (override with LIKENESS_DEV_DIR),
#   4. runs likenessd in the foreground (Ctrl-C drains and stops it).
# The API key is printed once, when it is made; it is also kept in
# .likeness-dev/api-key (mode 0600) for the examples in README.md.
# Development only: for production, see deploy/ and README.md.
set -euo pipefail
cd "$(dirname "$0")/.."
ROOT=$PWD
DEV=${LIKENESS_DEV_DIR:-$ROOT/.likeness-dev}
PORT=${LIKENESS_SERVER_PORT:-8443}

bash deploy/install-deps.sh
if [ ! -x build-release/bin/likenessd ] || [ -n "$(find src include CMakeLists.txt -newer build-release/bin/likenessd -print -quit 2>/dev/null)" ]; then
  echo "run: building (release) in build-release/"
  cmake -S . -B build-release -DCMAKE_BUILD_TYPE=Release >/dev/null
  cmake --build build-release -j"$(nproc)" --target likenessd likeness >/dev/null
fi
BIN=$ROOT/build-release/bin

mkdir -p "$DEV"
chmod 700 "$DEV"
if [ ! -f "$DEV/tls/server.crt" ]; then
  bash certs-example/make-dev-certs.sh "$DEV/tls"
fi
if [ ! -f "$DEV/keys" ]; then
  "$BIN/likeness" keys init --key-file "$DEV/keys"
fi
if [ ! -f "$DEV/likenessd.ini" ]; then
  cat > "$DEV/likenessd.ini" <<INI
# Development configuration made by deploy/run.sh; see deploy/likenessd.ini.example.
[server]
listen = 127.0.0.1
port = $PORT
cert_file = tls/server.crt
key_file = tls/server.key
client_ca_file = tls/ca.crt

[model]
file = $ROOT/models/likeness-lfw.lkmodel

[store]
url = sqlite:$DEV/store.db

[keys]
file = keys

[client:visitor-desk-1]
subject = CN=visitor-desk-1,O=Example Visitor Desk
scopes = verify
INI
fi
if [ ! -f "$DEV/api-key" ]; then
  umask 077
  "$BIN/likeness" keys api-create --config "$DEV/likenessd.ini" --name visitor-desk \
      --scopes verify,enrol,delete,audit > "$DEV/api-key"
  echo "run: API key (shown once; kept in $DEV/api-key):"
  cat "$DEV/api-key"
fi
echo "run: CA certificate for curl --cacert: $DEV/tls/ca.crt"
echo "run: starting likenessd on https://localhost:$PORT (Ctrl-C stops it)"
exec "$BIN/likenessd" --config "$DEV/likenessd.ini"
