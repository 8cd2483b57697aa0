#!/usr/bin/env bash
# Builds the libFuzzer targets of tests/fuzz with clang (AddressSanitizer + UBSan) in build-fuzz
# and runs each for SECONDS (default 60), starting from its seed corpus in tests/fuzz/corpus/TARGET.
# New inputs go to build-fuzz/corpus/TARGET (the source tree is left alone); a crash, leak, timeout
# (20 s) or out-of-memory (2 GB) is saved in build-fuzz/crashes/TARGET/ and makes the script exit 1. It prints, per
# target, the executions run and whether it found anything.
# Usage: scripts/fuzz.sh [SECONDS] [TARGET...]     (targets: config_fuzz mechanism_fuzz
#        client_settings_fuzz service_fuzz; default all). Replay one input: build-fuzz/bin/TARGET FILE
set -euo pipefail
cd "$(dirname "$0")/.."

seconds="${1:-60}"
if ! [[ "$seconds" =~ ^[0-9]+$ ]] || ((seconds < 1)); then
  echo "fuzz.sh: SECONDS must be a whole number >= 1, not '$seconds'" >&2
  exit 3
fi
shift || true
targets=("$@")
((${#targets[@]})) || targets=(config_fuzz mechanism_fuzz client_settings_fuzz service_fuzz)

for tool in clang clang++; do
  command -v "$tool" >/dev/null || { echo "fuzz.sh: $tool not found; run scripts/setup.sh" >&2; exit 2; }
done
if [[ ! -f build-fuzz/CMakeCache.txt ]]; then
  CC=clang CXX=clang++ cmake -S . -B build-fuzz -DCMAKE_BUILD_TYPE=RelWithDebInfo -DGRAFT_FUZZ=ON >/dev/null
fi
cmake --build build-fuzz -j2 --target "${targets[@]}"

# UBSan aborts on its first report (-fno-sanitize-recover), so libFuzzer keeps the input.
export ASAN_OPTIONS="detect_leaks=1:${ASAN_OPTIONS:-}"
export UBSAN_OPTIONS="print_stacktrace=1:halt_on_error=1:${UBSAN_OPTIONS:-}"
failed=0
summary=()
for t in "${targets[@]}"; do
  corpus="build-fuzz/corpus/$t" crashes="build-fuzz/crashes/$t" log="build-fuzz/fuzz-$t.log"
  rm -rf "$crashes"  # this run's findings only
  mkdir -p "$corpus" "$crashes"
  seeds="tests/fuzz/corpus/${t%_fuzz}"
  [[ -d "$seeds" ]] || { echo "fuzz.sh: no seed corpus $seeds" >&2; exit 2; }
  echo "fuzz: $t for ${seconds} s (seeds $seeds, log $log)"
  set +e
  "build-fuzz/bin/$t" "$corpus" "$seeds" -max_total_time="$seconds" -timeout=20 -rss_limit_mb=2048 \
    -max_len=65536 -print_final_stats=1 -artifact_prefix="$crashes/" >"$log" 2>&1
  rc=$?
  set -e
  execs=$(grep -o 'stat::number_of_executed_units: *[0-9]*' "$log" | grep -o '[0-9]*$' || true)
  # crash-, leak-, timeout- and oom- files are findings; a slow-unit- file (an input that once took
  # 10 s, e.g. while the machine was busy) is only reported.
  found=$(find "$crashes" -type f ! -name 'slow-unit-*' | wc -l)
  slow=$(find "$crashes" -type f -name 'slow-unit-*' | wc -l)
  ((slow == 0)) || echo "fuzz: $t: $slow slow inputs (>= 10 s once) kept in $crashes; replay: build-fuzz/bin/$t FILE" >&2
  if ((rc != 0)) || ((found > 0)); then
    failed=1
    summary+=("$t: ${execs:-?} executions, FAILED (exit $rc; $found inputs in $crashes; see $log)")
    grep -E "^==[0-9]+==ERROR|invariant broken|runtime error|SUMMARY" "$log" | head -5 >&2 || true
  else
    summary+=("$t: ${execs:-?} executions in ${seconds} s, no crash")
  fi
done
printf 'fuzz: %s\n' "${summary[@]}"
exit "$failed"
