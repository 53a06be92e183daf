#!/usr/bin/env bash
# Benchmarks of `lumenrig run` (issue: staged pipeline), side by side in one run:
#  1. decode floor: the whole run (no pairs) vs decoding every input frame once
#     with the same threads (`lumenrig info --verify` decodes every frame);
#     both with lumenrig's libdeflate for OpenEXR's ZIP blocks and with zlib
#     (OpenEXR's stock codec, LUMENRIG_LIBDEFLATE=0; capture_io/zlib_libdeflate.h);
#  2. against the usual lab script (bench/reference/lab_pipeline.py, numpy +
#     OpenCV + h5py): wall time and peak RSS ratios;
#  3. growth: run time over three light counts and three sizes (fitted
#     exponent of time against lights x pixels) and peak RSS as lights grow.
# Usage: bench/pipeline_bench.sh [BUILD_DIR] [SIZE] [LIGHTS] [THREADS] [WORK_DIR]
# Environment: BUDGET (--mem-budget), METHOD (normals method), GROWTH_SIZE
# (base size of the growth sweep; 0 skips it; default SIZE).
set -euo pipefail
BUILD=${1:-build}
SIZE=${2:-512}
LIGHTS=${3:-156}
THREADS=${4:-2}
WORK=${5:-/tmp/lumenrig-pipeline-bench}
BUDGET=${BUDGET:-512M}   # below the stack size, so memory is set by the budget
METHOD=${METHOD:-robust}
LR="$BUILD/cli/lumenrig"
PY=/usr/bin/python3
HERE=$(cd "$(dirname "$0")" && pwd)
mkdir -p "$WORK"

# Runs a command, prints "wall_s peak_rss_mib" (GNU time is not assumed:
# a tiny Python wrapper reads the child's rusage).
measure() {
  $PY - "$@" <<'PYEOF'
import resource, subprocess, sys, time
t = time.time()
rc = subprocess.call(sys.argv[1:], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
wall = time.time() - t
rss = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0
if rc != 0:
    sys.exit(f"command failed ({rc}): {' '.join(sys.argv[1:])}")
print(f"{wall:.2f} {rss:.0f}")
PYEOF
}

session() {  # session LIGHTS SIZE -> path (simulated once, cached)
  local dir="$WORK/s_${1}_${2}"
  if [ ! -f "$dir/session.json" ]; then
    "$LR" simulate --out "$dir" --lights "$1" --size "${2}x${2}" --cameras 2 --threads "$THREADS" \
      --tracking-every 0 >/dev/null
  fi
  echo "$dir"
}

S=$(session "$LIGHTS" "$SIZE")
echo "session: $S (2 cameras x $LIGHTS lights, ${SIZE}x${SIZE}, threads $THREADS, budget $BUDGET, normals $METHOD)"

# Warm the page cache first (the reference script below needs most of the
# RAM and evicts it), so every measurement decodes from memory, not disk.
"$LR" info "$S" --verify --threads "$THREADS" >/dev/null
read -r dec_s dec_rss < <(measure "$LR" info "$S" --verify --threads "$THREADS")
rm -rf "$WORK/out"
read -r run_s run_rss < <(measure "$LR" run "$S" --out "$WORK/out" --stages check,normals,matte,assemble --normals-method "$METHOD" \
  --threads "$THREADS" --mem-budget "$BUDGET")
read -r zdec_s zdec_rss < <(LUMENRIG_LIBDEFLATE=0 measure "$LR" info "$S" --verify --threads "$THREADS")
rm -rf "$WORK/out"
read -r zrun_s zrun_rss < <(LUMENRIG_LIBDEFLATE=0 measure "$LR" run "$S" --out "$WORK/out" \
  --stages check,normals,matte,assemble --normals-method "$METHOD" --threads "$THREADS" --mem-budget "$BUDGET")
rm -f "$WORK/ref.h5"
read -r ref_s ref_rss < <(measure "$PY" "$HERE/reference/lab_pipeline.py" "$S" "$WORK/ref.h5")
echo
echo "| measurement | wall s | peak RSS MiB |"
echo "|---|---|---|"
echo "| decode every frame once (info --verify) | $dec_s | $dec_rss |"
echo "| lumenrig run (check, normals, matte, assemble) | $run_s | $run_rss |"
echo "| decode every frame once, zlib | $zdec_s | $zdec_rss |"
echo "| lumenrig run, zlib | $zrun_s | $zrun_rss |"
echo "| reference lab script (numpy/OpenCV/h5py) | $ref_s | $ref_rss |"
$PY - "$dec_s" "$run_s" "$ref_s" "$run_rss" "$ref_rss" "$zdec_s" "$zrun_s" <<'PYEOF'
import sys
dec, run, ref, run_rss, ref_rss, zdec, zrun = map(float, sys.argv[1:])
print(f"\nrun / decode floor: {run / dec:.2f}x (target <= 1.5x)")
print(f"  with zlib for both: {zrun / zdec:.2f}x; run against the zlib decode: {run / zdec:.2f}x;"
      f" libdeflate speed-up of the run: {zrun / run:.2f}x, of the decode: {zdec / dec:.2f}x")
print(f"reference / run (speed-up): {ref / run:.2f}x (target >= 5x)")
print(f"run peak RSS / reference peak RSS: {run_rss / ref_rss:.2f} (target <= 0.25)")
PYEOF

[ "${GROWTH_SIZE:-$SIZE}" = 0 ] && exit 0
SIZE=${GROWTH_SIZE:-$SIZE}
echo
echo "growth (run without pairs; 2 cameras):"
echo "| lights | size | lights x pixels | wall s | peak RSS MiB |"
echo "|---|---|---|---|---|"
rows=()
for spec in "$((LIGHTS / 4)) $SIZE" "$((LIGHTS / 2)) $SIZE" "$LIGHTS $SIZE" "$LIGHTS $((SIZE / 2))"; do
  set -- $spec
  s=$(session "$1" "$2")
  rm -rf "$WORK/out_g"
  read -r t r < <(measure "$LR" run "$s" --out "$WORK/out_g" --stages check,normals,matte,assemble --normals-method "$METHOD" \
    --threads "$THREADS" --mem-budget "$BUDGET")
  echo "| $1 | ${2}x${2} | $(($1 * $2 * $2)) | $t | $r |"
  rows+=("$(($1 * $2 * $2)) $t")
done
$PY - "${rows[@]}" <<'PYEOF'
import math, sys
pts = [tuple(map(float, a.split())) for a in sys.argv[1:]]
xs = [math.log(p[0]) for p in pts]; ys = [math.log(p[1]) for p in pts]
n = len(xs); mx = sum(xs) / n; my = sum(ys) / n
slope = sum((x - mx) * (y - my) for x, y in zip(xs, ys)) / sum((x - mx) ** 2 for x in xs)
print(f"\nfitted exponent of time vs lights x pixels: {slope:.2f} (1.0 = linear)")
PYEOF
