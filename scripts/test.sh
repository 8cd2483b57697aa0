#!/usr/bin/env bash
# Installs what graft needs, builds it with warnings as errors and runs every test.
# Usage: scripts/test.sh [ctest arguments...]   (e.g. scripts/test.sh -R Spec)
set -euo pipefail
cd "$(dirname "$0")/.."

bash scripts/setup.sh
cmake -S . -B build -DCMAKE_BUILD_TYPE=RelWithDebInfo -DGRAFT_WERROR=ON
cmake --build build -j2
cd build
ctest --output-on-failure --timeout 1500 "$@"
