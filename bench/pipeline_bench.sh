#!/usr/bin/env bash
# Benchmarks of `lumenrig run` (issue: staged pipeline), side by side in one run:
#  1. decode floor: the whole run (no pairs) vs decoding every input frame once
#     with the same threads (`lumenrig info --verify` decodes every frame, as
#     stored: half floats stay half); the run's per-stage CPU (`run --stats`)
#     against the CPU the 1.5x target leaves beyond the decode;
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

# Runs a command, prints "wall_s peak_rss_mib cpu_s" (GNU time is not
# assumed: a tiny Python wrapper reads the child's rusage); the command's
# output goes to $WORK/last.log.
measure() {
  $PY - "$WORK/last.log" "$@" <<'PYEOF'
import resource, subprocess, sys, time
t = time.time()
with open(sys.argv[1], "w") as log:
    rc = subprocess.call(sys.argv[2:], stdout=log, stderr=subprocess.STDOUT)
wall = time.time() - t
ru = resource.getrusage(resource.RUSAGE_CHILDREN)
if rc != 0:
    sys.exit(f"command failed ({rc}): {' '.join(sys.argv[2:])}")
print(f"{wall:.2f} {ru.ru_maxrss / 1024.0:.0f} {ru.ru_utime + ru.ru_stime:.2f}")
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
read -r dec_s dec_rss dec_cpu < <(measure "$LR" info "$S" --verify --threads "$THREADS")
rm -rf "$WORK/out"
read -r run_s run_rss run_cpu < <(measure "$LR" run "$S" --out "$WORK/out" --stages check,normals,matte,assemble \
  --normals-method "$METHOD" --threads "$THREADS" --mem-budget "$BUDGET" --stats)
stats=$(sed -n '/^stage /,/^output:/p' "$WORK/last.log" | grep -v '^output:')
read -r zdec_s zdec_rss zdec_cpu < <(LUMENRIG_LIBDEFLATE=0 measure "$LR" info "$S" --verify --threads "$THREADS")
rm -rf "$WORK/out"
read -r zrun_s zrun_rss zrun_cpu < <(LUMENRIG_LIBDEFLATE=0 measure "$LR" run "$S" --out "$WORK/out" \
  --stages check,normals,matte,assemble --normals-method "$METHOD" --threads "$THREADS" --mem-budget "$BUDGET")
rm -f "$WORK/ref.h5"
read -r ref_s ref_rss ref_cpu < <(measure "$PY" "$HERE/reference/lab_pipeline.py" "$S" "$WORK/ref.h5")
echo
echo "| measurement | wall s | CPU s | peak RSS MiB |"
echo "|---|---|---|---|"
echo "| decode every frame once (info --verify) | $dec_s | $dec_cpu | $dec_rss |"
echo "| lumenrig run (check, normals, matte, assemble) | $run_s | $run_cpu | $run_rss |"
echo "| decode every frame once, zlib | $zdec_s | $zdec_cpu | $zdec_rss |"
echo "| lumenrig run, zlib | $zrun_s | $zrun_cpu | $zrun_rss |"
echo "| reference lab script (numpy/OpenCV/h5py) | $ref_s | $ref_cpu | $ref_rss |"
echo
echo "run --stats (the normals stage includes the one decode of the OLAT frames and the check's statistics on them):"
echo "$stats"
$PY - "$dec_s" "$run_s" "$ref_s" "$run_rss" "$ref_rss" "$zdec_s" "$zrun_s" "$dec_cpu" "$run_cpu" "$THREADS" <<'PYEOF'
import sys
dec, run, ref, run_rss, ref_rss, zdec, zrun, dec_cpu, run_cpu, threads = map(float, sys.argv[1:])
print(f"\nrun / decode floor: {run / dec:.2f}x (target <= 1.5x)")
print(f"  CPU beyond the decode: {run_cpu - dec_cpu:.1f} s; the target leaves at most"
      f" 0.5 x {dec:.2f} s x {threads:.0f} threads = {0.5 * dec * threads:.1f} s")
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
  "$LR" info "$s" --verify --threads "$THREADS" >/dev/null  # warm the page cache (the script above evicts it)
  rm -rf "$WORK/out_g"
  read -r t r _ < <(measure "$LR" run "$s" --out "$WORK/out_g" --stages check,normals,matte,assemble --normals-method "$METHOD" \
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
