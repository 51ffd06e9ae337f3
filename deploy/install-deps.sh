#!/usr/bin/env bash
# Installs every build and test dependency of likeness from Debian's packages.
# Idempotent: asks apt only for what is missing. Needs root (or sudo).
set -euo pipefail

PKGS=(
  build-essential cmake pkg-config git
  libturbojpeg0-dev libpng-dev zlib1g-dev libexif-dev libxml2-dev
  libcjson-dev libsodium-dev libssl-dev libsqlite3-dev libinih-dev libmicrohttpd-dev
  libgnutls28-dev libpq-dev postgresql postgresql-client
  opencv-data
  openssl curl ca-certificates
  python3 python3-numpy python3-pil python3-skimage python3-sklearn python3-opencv python3-nacl python3-yaml
  valgrind wrk nginx systemd testssl.sh
  clang libclang-rt-14-dev
)
# Node.js and npm run the API-spec lint and schema validation (tests/api);
# Debian's packages only if the machine has no node of its own.
if ! command -v npm >/dev/null; then
  PKGS+=(nodejs npm)
fi

missing=()
for p in "${PKGS[@]}"; do
  if ! dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed"; then
    missing+=("$p")
  fi
done

if [ ${#missing[@]} -eq 0 ]; then
  echo "install-deps: all ${#PKGS[@]} packages present"
  exit 0
fi

SUDO=""
if [ "$(id -u)" -ne 0 ]; then
  if command -v sudo >/dev/null; then SUDO="sudo"; else
    echo "install-deps: missing packages (${missing[*]}) and not root; run as root or install sudo" >&2
    exit 1
  fi
fi
echo "install-deps: installing ${missing[*]}"
$SUDO apt-get update -qq
DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq --no-install-recommends "${missing[@]}"
