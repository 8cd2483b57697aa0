#!/usr/bin/env bash
# Installs what graft needs, builds it with warnings as errors, runs every test, runs each fuzz
# target for a bounded time (scripts/fuzz.sh), then graftd's tests again under AddressSanitizer.
# Usage: scripts/test.sh [--sanitize address|thread] [ctest arguments...]   (e.g. scripts/test.sh -R Spec)
# --sanitize builds the whole tree with that sanitizer into its own folder (build-address or
# build-thread) and runs the tests there, with the suppressions of tests/sanitizer/.
set -euo pipefail
cd "$(dirname "$0")/.."

build=build sanitize=""
if [[ "${1:-}" == "--sanitize" ]]; then
  sanitize="${2:-}"
  case "$sanitize" in
    address|thread) build="build-$sanitize" ;;
    *) echo "test.sh: --sanitize takes address or thread, not '${sanitize}'" >&2; exit 3 ;;
  esac
  shift 2
fi

bash scripts/setup.sh
cmake -S . -B "$build" -DCMAKE_BUILD_TYPE=RelWithDebInfo -DGRAFT_WERROR=ON -DGRAFT_SANITIZE="$sanitize"
cmake --build "$build" -j2
sup="$PWD/tests/sanitizer"
# Reports fail the test that triggered them (exit code 66), also in the child processes (graftd,
# graft-worker) the tests start, which inherit these settings.
export ASAN_OPTIONS="detect_leaks=1:abort_on_error=0:exitcode=66:${ASAN_OPTIONS:-}"
export LSAN_OPTIONS="suppressions=$sup/lsan.supp:print_suppressions=0:${LSAN_OPTIONS:-}"
export TSAN_OPTIONS="suppressions=$sup/tsan.supp:exitcode=66:halt_on_error=0:${TSAN_OPTIONS:-}"
cd "$build"
ctest --output-on-failure --timeout 1500 "$@"
cd ..
# The libFuzzer targets (clang, AddressSanitizer + UBSan, in build-fuzz), each for a bounded time:
# 4 targets x GRAFT_FUZZ_SECONDS (default 40) s. A crash fails the run. Not with --sanitize: that
# run is about the tests above.
if [[ -z "$sanitize" ]]; then
  bash scripts/fuzz.sh "${GRAFT_FUZZ_SECONDS:-40}"
fi
# graftd and the coordinator's tests (server_test) once more with AddressSanitizer and
# LeakSanitizer, in build-address-server, starting the normal build's graft-worker: the service
# code that takes hostile input and faults, within CI's time (the whole tree under a sanitizer is
# --sanitize). Not when ctest arguments were given (a partial run) or with --sanitize.
if [[ -z "$sanitize" && $# -eq 0 ]]; then
  cmake -S . -B build-address-server -DCMAKE_BUILD_TYPE=RelWithDebInfo -DGRAFT_WERROR=ON -DGRAFT_SANITIZE=address \
    -DGRAFT_TEST_WORKER="$PWD/build/bin/graft-worker" >/dev/null
  cmake --build build-address-server -j2 --target graftd server_test
  (cd build-address-server &&
    ctest --output-on-failure --timeout 1500 \
      -R '^(JobState|SqliteJobStore|Service|LauncherTest|LauncherProcessRunner|RecoveryTest|Fault|Tokens|Artifacts|Limits|Watch)\.')
fi
