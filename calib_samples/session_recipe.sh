#!/usr/bin/env bash
# Sample session recipes for the capture simulator (run from the repository
# root after building; LUMENRIG defaults to the Release build).
set -euo pipefail
LUMENRIG=${LUMENRIG:-build/cli/lumenrig}
OUT=${1:-/tmp/kh-sessions}

# The rig calibrations in this folder, regenerated (byte-identical output).
"$LUMENRIG" simulate --layout two-ring --lights 64 --near-field --rig-out "$OUT/rig_tworing_64.json" --force
"$LUMENRIG" simulate --lights 156 --rig-out "$OUT/rig_dome_156.json" --force

# A clean two-camera session on the 156-light dome (distant lights).
"$LUMENRIG" simulate --out "$OUT/kh-bust-03-dome156" --lights 156 --size 320x240 --cameras 2 --seed 7

# The same bust in the 64-light two-ring rig with near-field lights.
"$LUMENRIG" simulate --out "$OUT/kh-bust-03-tworing64" --layout two-ring --lights 64 --near-field --seed 7

# A faulty take for the session check: every fault at once, aimed at cam00.
"$LUMENRIG" simulate --out "$OUT/kh-bust-03-faulty" --lights 64 --cameras 2 --seed 7 \
  --fault-dead-light cam00:5 --fault-missing cam00:9 --fault-saturate cam00:12 \
  --fault-swap cam00:20,21 --fault-motion-px 4 --fault-drift-percent 6 --fault-plate-shift-px 3
