#!/usr/bin/env bash
# The full demo on one machine: installs the packages when needed and builds the three programs it
# runs (graftd, graft-worker, graft; the tests build when the tests run), starts a coordinator on
# loopback with a fresh data dir and generated tokens, starts two workers, submits a
# parcel-routing sweep (interchange weight 0 and 1, two seeds each), watches it to the end,
# prints `graft compare`, fetches every job's artifacts, and stops every process it started,
# also when interrupted. Usage: scripts/demo.sh [OUT_DIR] [SWEEP_CONFIG]   (defaults: var/demo,
# configs/parcel-routing-sweep.yaml; configs/ferry-boarding-sweep.yaml is the transformer demo)
set -euo pipefail
cd "$(dirname "$0")/.."
root="$(pwd)"
out="${1:-var/demo}"
sweep_config="${2:-configs/parcel-routing-sweep.yaml}"

bash scripts/setup.sh
# Only the programs the demo runs: on a fresh machine the tests and benchmarks would take most of
# the time (scripts/test.sh builds everything). Up-to-date programs take a moment to check.
if [[ ! -f build/CMakeCache.txt ]]; then
  cmake -S . -B build -DCMAKE_BUILD_TYPE=RelWithDebInfo
fi
cmake --build build -j2 --target graftd graft-worker graft

rm -rf "$out"
mkdir -p "$out"
out="$(cd "$out" && pwd)"
pids=()
cleanup() {
  for pid in "${pids[@]}"; do kill -TERM "$pid" 2>/dev/null || true; done
  for pid in "${pids[@]}"; do wait "$pid" 2>/dev/null || true; done
}
trap cleanup EXIT
trap 'echo "demo: interrupted; stopping"; exit 130' INT TERM

# Tokens: graftd keeps only their SHA-256.
user_token="$(head -c 24 /dev/urandom | base64 | tr -d '/+=')"
worker_token="$(head -c 24 /dev/urandom | base64 | tr -d '/+=')"
hash() { printf %s "$1" | sha256sum | cut -d' ' -f1; }
cat > "$out/tokens.yaml" <<EOT
- {name: demo, role: user, sha256: $(hash "$user_token")}
- {name: demo-node, role: worker, sha256: $(hash "$worker_token")}
EOT
printf %s "$worker_token" > "$out/worker.token"
printf %s "$user_token" > "$out/user.token"
chmod 600 "$out"/*.token

echo "== starting graftd (data dir $out/data)"
build/bin/graftd --config configs/graftd.yaml --listen 127.0.0.1:0 --port-file "$out/port" \
  --data-dir "$out/data" --tokens-file "$out/tokens.yaml" > "$out/graftd.log" 2>&1 &
pids+=($!)
for _ in $(seq 1 100); do [[ -s "$out/port" ]] && break; sleep 0.1; done
[[ -s "$out/port" ]] || { echo "demo: graftd did not start; see $out/graftd.log"; exit 1; }
export GRAFT_SERVER="127.0.0.1:$(cat "$out/port")"
export GRAFT_TOKEN="$user_token"
echo "   listening on $GRAFT_SERVER"

echo "== starting two workers"
for n in 1 2; do
  build/bin/graft-worker serve --server "$GRAFT_SERVER" --token-file "$out/worker.token" --threads 1 \
    --work-dir "$out/worker$n" > "$out/worker$n.log" 2>&1 &
  pids+=($!)
done

echo "== submitting the sweep ($sweep_config)"
sweep="$(build/bin/graft submit "$sweep_config" --json | /usr/bin/python3 -c 'import json,sys; print(json.load(sys.stdin)["sweep_id"])')"
echo "   sweep $sweep"
echo "== watching $sweep"
build/bin/graft watch "$sweep" || true
echo
build/bin/graft wait "$sweep" --timeout 1800
echo "== graft compare $sweep"
build/bin/graft compare "$sweep"
echo
echo "== artifacts"
for job in $(build/bin/graft list --sweep "$sweep" --json | /usr/bin/python3 -c 'import json,sys; print(" ".join(j["id"] for j in json.load(sys.stdin)))'); do
  build/bin/graft fetch "$job" --out "$out/artifacts/$job" > /dev/null
  echo "   $out/artifacts/$job  ($(cd "$out/artifacts/$job" && ls | paste -sd, | sed 's/,/, /g'))"
done
echo "logs: $out/graftd.log, $out/worker1.log, $out/worker2.log"
echo "IIA on sampled triples is evidence, not proof, and only on this input distribution (see README, Cautions)."
