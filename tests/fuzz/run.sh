#!/usr/bin/env bash
# Builds the libFuzzer targets of tests/fuzz (clang, ASan + UBSan, in
# build-fuzz/) and runs each for SECONDS (default 30), one after the other,
# over a copy of its seed corpus plus its saved regression inputs.
# Exit status 1 if any target crashed, leaked, timed out or drew a sanitizer
# report (the reproducer is kept in build-fuzz/fuzz-artifacts/NAME/); 2 if
# the tools are missing (deploy/install-deps.sh installs them). Installs
# nothing.
#   tests/fuzz/run.sh [SECONDS] [TARGET...]
set -uo pipefail

SECONDS_EACH=${1:-30}
shift || true
HERE=$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)
ROOT=$(cd "$HERE/../.." && pwd)
BUILD=${LIKENESS_FUZZ_BUILD:-$ROOT/build-fuzz}
ALL=(image multipart request model template config audit)
TARGETS=("$@")
[ ${#TARGETS[@]} -eq 0 ] && TARGETS=("${ALL[@]}")

if ! [[ "$SECONDS_EACH" =~ ^[0-9]+$ ]] || [ "$SECONDS_EACH" -lt 1 ]; then
  echo "usage: tests/fuzz/run.sh [SECONDS] [TARGET...]  (targets: ${ALL[*]})" >&2
  exit 2
fi
if ! command -v clang >/dev/null; then
  echo "fuzz: clang is missing; run deploy/install-deps.sh" >&2
  exit 2
fi
if ! ls "$(clang -print-resource-dir)"/lib/linux/libclang_rt.fuzzer-x86_64.a >/dev/null 2>&1 &&
   ! ls "$(clang -print-resource-dir)"/lib/*/libclang_rt.fuzzer*.a >/dev/null 2>&1; then
  echo "fuzz: libFuzzer (libclang-rt-14-dev) is missing; run deploy/install-deps.sh" >&2
  exit 2
fi

# The top-level CMakeLists.txt adds tests/fuzz when LIKENESS_FUZZ is ON.
echo "fuzz: configuring $BUILD"
mkdir -p "$BUILD"
if ! cmake -S "$ROOT" -B "$BUILD" -DCMAKE_C_COMPILER=clang -DLIKENESS_SANITIZE=ON \
     -DLIKENESS_FUZZ=ON -DCMAKE_BUILD_TYPE=RelWithDebInfo \
     >"$BUILD/fuzz-configure.log" 2>&1; then
  cat "$BUILD/fuzz-configure.log" >&2
  echo "fuzz: configuration failed" >&2
  exit 1
fi
rm -f "$BUILD/fuzz-configure.log"
build_targets=()
for t in "${TARGETS[@]}"; do build_targets+=(--target "fuzz_$t"); done
echo "fuzz: building ${TARGETS[*]}"
if ! cmake --build "$BUILD" -j2 "${build_targets[@]}" >"$BUILD/fuzz-build.log" 2>&1; then
  tail -50 "$BUILD/fuzz-build.log" >&2
  echo "fuzz: build failed (log: $BUILD/fuzz-build.log)" >&2
  exit 1
fi

dict_for() {
  case "$1" in
    image) cat "$HERE/dict/jpeg.dict" "$HERE/dict/png.dict" ;;
    multipart) cat "$HERE/dict/multipart.dict" ;;
    request) cat "$HERE/dict/json.dict" "$HERE/dict/multipart.dict" ;;
    *) return 1 ;;
  esac
}

export ASAN_OPTIONS=${ASAN_OPTIONS:-detect_leaks=1:abort_on_error=0:allocator_may_return_null=0}
export UBSAN_OPTIONS=${UBSAN_OPTIONS:-print_stacktrace=1:halt_on_error=1}
WORK="$BUILD/fuzz-work"
ART="$BUILD/fuzz-artifacts"
passed=0
failed=0
summary=()
for t in "${TARGETS[@]}"; do
  bin="$BUILD/bin/fuzz_$t"
  corpus="$WORK/$t"
  rm -rf "$corpus" "$ART/$t"
  mkdir -p "$corpus" "$ART/$t"
  if [ -z "$(ls -A "$HERE/corpus/$t" 2>/dev/null)" ]; then
    echo "fuzz: no seeds in tests/fuzz/corpus/$t (regenerate: python3 tests/fuzz/make_seeds.py)" >&2
    exit 1
  fi
  cp "$HERE/corpus/$t"/* "$corpus"/
  if [ -d "$HERE/regressions/$t" ]; then
    cp "$HERE/regressions/$t"/* "$corpus"/ 2>/dev/null || true
  fi
  # A fixed seed (LIKENESS_FUZZ_SEED, default 1) makes a CI run repeat the
  # same inputs, so it passes or fails the same way on every machine; set
  # another seed (or 0 for a random one) for exploratory runs.
  args=(-max_total_time="$SECONDS_EACH" -rss_limit_mb=2048 -timeout=10 -print_final_stats=1
        -seed="${LIKENESS_FUZZ_SEED:-1}" -artifact_prefix="$ART/$t/")
  if dict_for "$t" >"$WORK/$t.dict"; then
    args+=(-dict="$WORK/$t.dict")
  fi
  log="$WORK/$t.log"
  echo "fuzz: running fuzz_$t for ${SECONDS_EACH}s"
  "$bin" "${args[@]}" "$corpus" >"$log" 2>&1
  rc=$?
  runs=$(sed -n 's/^stat::number_of_executed_units: *//p' "$log" | tail -1)
  speed=$(sed -n 's/^stat::average_exec_per_sec: *//p' "$log" | tail -1)
  units=$(sed -n 's/^stat::new_units_added: *//p' "$log" | tail -1)
  cov=$(grep -o 'cov: [0-9]*' "$log" | tail -1 | cut -d' ' -f2)
  crashes=$(find "$ART/$t" -type f | wc -l)
  bad=0
  if [ $rc -ne 0 ] || [ "$crashes" -ne 0 ] ||
     grep -qE 'ERROR: (AddressSanitizer|LeakSanitizer|libFuzzer)|runtime error:|SUMMARY: |fuzz contract broken|==[0-9]+== ERROR' "$log"; then
    bad=1
  fi
  line=$(printf 'fuzz_%-10s executions %-10s exec/s %-7s cov %-6s new units %-5s crashes %s' \
         "$t" "${runs:-?}" "${speed:-?}" "${cov:-?}" "${units:-?}" "$crashes")
  if [ $bad -eq 0 ]; then
    passed=$((passed + 1))
    summary+=("$line  ok")
  else
    failed=$((failed + 1))
    summary+=("$line  FAILED (exit $rc; log $log)")
    grep -m1 -A25 -E 'ERROR: |runtime error:|fuzz contract broken|Test unit written|SUMMARY' "$log" | head -40 >&2
    ls "$ART/$t" >&2
  fi
done
echo
printf '%s\n' "${summary[@]}"
echo "fuzz: $passed passed, $failed failed"
[ $failed -eq 0 ]
