#!/usr/bin/env bash
# Runs the whole lumenrig test suite: installs what is missing, builds, ctest.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
ctest --test-dir build --output-on-failure -j"$(nproc)" "$@"
