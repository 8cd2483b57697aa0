#!/usr/bin/env bash
# Installs every Debian package graft needs to build, test and run. Idempotent: when all
# packages are already installed it does nothing (no apt-get update, no network).
set -euo pipefail

PACKAGES=(
  build-essential cmake pkg-config git ca-certificates
  libtorch-dev libgloo-dev libopenblas0-pthread
  libgrpc++-dev protobuf-compiler-grpc libprotobuf-dev protobuf-compiler
  libspdlog-dev libyaml-cpp-dev libgtest-dev libgmock-dev
  libmuparser-dev libsqlite3-dev nlohmann-json3-dev libcli11-dev libssl-dev openssl
  python3 python3-numpy python3-scipy python3-statsmodels python3-torch python3-yaml
  python3-grpcio python3-grpc-tools python3-pandas python3-pil
  chromium fonts-dejavu-core
  slurmctld slurmd slurm-client munge
  clang libclang-rt-14-dev
)

missing=()
for p in "${PACKAGES[@]}"; do
  if ! dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed"; then
    missing+=("$p")
  fi
done

if ((${#missing[@]} == 0)); then
  echo "setup: all ${#PACKAGES[@]} packages present"
  exit 0
fi

SUDO=""
if [[ $(id -u) -ne 0 ]]; then SUDO="sudo"; fi
echo "setup: installing ${#missing[@]} packages: ${missing[*]}"
$SUDO apt-get update -qq
DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq --no-install-recommends "${missing[@]}"
echo "setup: done"
