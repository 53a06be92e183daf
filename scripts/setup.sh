#!/usr/bin/env bash
# Installs what is missing (Debian packages), configures and builds lumenrig
# (Release, into ./build). With "demo" as first argument it then runs the
# built-in demo session and prints where every output is.
#   bash scripts/setup.sh          # install + build
#   bash scripts/setup.sh demo     # install + build + demo into ./lumenrig-demo
set -euo pipefail
cd "$(dirname "$0")/.."

PACKAGES=(
  build-essential cmake ninja-build pkg-config
  libopenexr-dev openexr libopencv-dev libeigen3-dev libhdf5-dev libtbb-dev
  libgtest-dev libgmock-dev libbenchmark-dev nlohmann-json3-dev libcli11-dev libfmt-dev
  libpng-dev libtiff-dev libxxhash-dev zlib1g-dev libdeflate-dev
  libopenmpi-dev openmpi-bin
  python3 python3-h5py python3-numpy python3-opencv
  chromium fonts-dejavu-core
)

missing=()
for p in "${PACKAGES[@]}"; do
  if ! dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed"; then
    missing+=("$p")
  fi
done
if ((${#missing[@]})); then
  echo "lumenrig setup: installing ${#missing[@]} missing package(s): ${missing[*]}"
  if [ "$(id -u)" -eq 0 ]; then
    SUDO=()
  elif command -v sudo >/dev/null 2>&1; then
    SUDO=(sudo)
  else
    echo "lumenrig setup: error: packages missing (${missing[*]}) and neither root nor sudo is available;" \
         "ask an administrator to run: apt-get install -y ${missing[*]}" >&2
    exit 2
  fi
  export DEBIAN_FRONTEND=noninteractive
  "${SUDO[@]}" apt-get update -qq
  "${SUDO[@]}" apt-get install -y -qq --no-install-recommends "${missing[@]}"
fi

WERROR=OFF
if [ "${CI:-}" = "true" ]; then WERROR=ON; fi
cmake -S . -B build -G Ninja -DCMAKE_BUILD_TYPE=Release -DLUMENRIG_WERROR="$WERROR" >/dev/null
cmake --build build -j"$(nproc)"
echo "lumenrig setup: built build/cli/lumenrig"

if [ "${1:-}" = "demo" ]; then
  shift
  exec ./build/cli/lumenrig demo --out lumenrig-demo "$@"
fi
