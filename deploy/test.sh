#!/usr/bin/env bash
# The one test command: installs what is missing, builds with AddressSanitizer
# and UndefinedBehaviorSanitizer, runs every CTest test, then runs each
# libFuzzer target for LIKENESS_FUZZ_SECONDS (default 20) under the same
# sanitizers (tests/fuzz/run.sh).
set -euo pipefail
cd "$(dirname "$0")/.."
bash deploy/install-deps.sh
BUILD=${LIKENESS_TEST_BUILD:-build-test}
cmake -S . -B "$BUILD" -DCMAKE_BUILD_TYPE=RelWithDebInfo -DLIKENESS_SANITIZE=ON \
      ${LIKENESS_SHARED:+-DLIKENESS_SHARED="$LIKENESS_SHARED"}
cmake --build "$BUILD" -j"$(nproc)"
(cd "$BUILD" && ctest --output-on-failure -j"$(nproc)" "$@")
bash tests/fuzz/run.sh "${LIKENESS_FUZZ_SECONDS:-20}"
