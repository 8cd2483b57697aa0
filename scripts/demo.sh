#!/usr/bin/env bash
# The demo: installs and builds graft when needed, then checks the shipped configs and prints
# the summary of each job. Works on a fresh Debian machine with nothing else installed.
set -euo pipefail
cd "$(dirname "$0")/.."

bash scripts/setup.sh
if [[ ! -x build/bin/graft-worker ]]; then
  cmake -S . -B build -DCMAKE_BUILD_TYPE=RelWithDebInfo
  cmake --build build -j2
fi

for config in configs/parcel-routing.yaml configs/checksum-digits.yaml; do
  echo "== ${config}"
  build/bin/graft-worker check "${config}"
  echo
done
