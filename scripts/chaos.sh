#!/usr/bin/env bash
# The chaos drill with a longer budget than the one ctest runs (label `chaos`): a sweep trained by
# real workers while workers and graftd are SIGKILLed and restarted, then checked point by point
# against the same specs trained once without faults. The drill itself is tests/chaos_test.cc;
# this script builds it and runs it with its own settings.
#
# Usage: scripts/chaos.sh [--seed N] [--seconds S] [--kills K] [--jobs J] [--steps N] [--width W]
#                         [--workers N] [--build-dir DIR]
# Defaults: seed 12, faults for at most 360 s, at most 20 worker kills, 12 jobs of 800 steps at
# width 512 on 3 workers (ctest's run has 400 steps, so it takes about half the time).
set -euo pipefail
cd "$(dirname "$0")/.."

seed=12 seconds=360 kills=20 jobs=12 steps=800 width=512 workers=3 build=build
while [[ $# -gt 0 ]]; do
  case "$1" in
    --seed) seed="$2"; shift 2 ;;
    --seconds) seconds="$2"; shift 2 ;;
    --kills) kills="$2"; shift 2 ;;
    --jobs) jobs="$2"; shift 2 ;;
    --steps) steps="$2"; shift 2 ;;
    --width) width="$2"; shift 2 ;;
    --workers) workers="$2"; shift 2 ;;
    --build-dir) build="$2"; shift 2 ;;
    -h|--help) sed -n '2,11p' "$0"; exit 0 ;;
    *) echo "chaos.sh: unknown argument '$1' (see --help)" >&2; exit 3 ;;
  esac
done
for v in "$seed" "$seconds" "$kills" "$jobs" "$steps" "$width" "$workers"; do
  [[ "$v" =~ ^[0-9]+$ ]] || { echo "chaos.sh: '$v' is not a whole number" >&2; exit 3; }
done
(( steps % 50 == 0 )) || { echo "chaos.sh: --steps must be a multiple of 50 (the evaluation interval)" >&2; exit 3; }
(( jobs >= 10 )) || { echo "chaos.sh: --jobs must be at least 10 (graftd is killed after 1-4 and 5-9 successes)" >&2; exit 3; }

if [[ ! -f "$build/CMakeCache.txt" ]]; then
  bash scripts/setup.sh
  cmake -S . -B "$build" -DCMAKE_BUILD_TYPE=RelWithDebInfo -DGRAFT_WERROR=ON
fi
cmake --build "$build" -j2 --target chaos_test graftd graft-worker

GRAFT_CHAOS_SEED="$seed" GRAFT_CHAOS_SECONDS="$seconds" GRAFT_CHAOS_KILLS="$kills" GRAFT_CHAOS_JOBS="$jobs" \
GRAFT_CHAOS_STEPS="$steps" GRAFT_CHAOS_WIDTH="$width" GRAFT_CHAOS_WORKERS="$workers" \
  exec "$build/bin/chaos_test" --gtest_filter='Chaos.*'
