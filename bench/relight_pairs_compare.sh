#!/usr/bin/env bash
# Issue 6 benchmarks measured side by side in one run:
#  - pairs/s at SIZE x SIZE with all auxiliary targets: lumenrig pairs vs the
#    numpy reference (bench/reference/relight_numpy.py), and their ratio;
#  - peak RSS of `lumenrig relight` for two --mem-budget values and two light
#    counts (bounded by the budget, not by the number of lights).
# Usage: bash bench/relight_pairs_compare.sh [BUILD_DIR] [SIZE] [COUNT] [THREADS]
set -euo pipefail
BUILD=${1:-build}
SIZE=${2:-512}
COUNT=${3:-32}
THREADS=${4:-2}
ROOT=$(cd "$(dirname "$0")/.." && pwd)
LR="$BUILD/cli/lumenrig"
WORK=$(mktemp -d /tmp/lumenrig-pairs-bench-XXXXXX)
trap 'rm -rf "$WORK"' EXIT
session_for() {  # lights -> session dir (written once by relight_bench)
  LUMENRIG_BENCH_SIZE=$SIZE LUMENRIG_BENCH_LIGHTS=$1 "$BUILD/bench/relight_bench" --benchmark_filter=NONE 2>/dev/null | sed -n 's/^session: //p'
}
S156=$(session_for 156)
S40=$(session_for 40)
"$LR" envmaps --out "$WORK/envs" --height 256 >/dev/null

echo "== pairs/s at ${SIZE}x${SIZE}, 156 lights, all auxiliary targets, $COUNT samples, $THREADS threads =="
# End to end for both (setup included), wall and CPU (user+sys) seconds: the
# CPU figure is robust when the machine is shared.
/usr/bin/time -f "%e %U %S %M" -o "$WORK/ours.time" "$LR" pairs "$S156" --envs "$WORK/envs" --out "$WORK/ours.h5" \
  --count "$COUNT" --seed 1 --size "${SIZE}x${SIZE}" --batch 8 --threads "$THREADS" --mem-budget 2G | tail -3
OPENBLAS_NUM_THREADS=$THREADS /usr/bin/time -f "%e %U %S %M" -o "$WORK/numpy.time" /usr/bin/python3 \
  "$ROOT/bench/reference/relight_numpy.py" "$S156" "$WORK/envs" "$COUNT" "$SIZE" "$WORK/numpy.h5" 1
python3 - "$WORK/ours.time" "$WORK/numpy.time" "$COUNT" <<'PY'
import sys
o = [float(x) for x in open(sys.argv[1]).read().split()[-4:]]
n = [float(x) for x in open(sys.argv[2]).read().split()[-4:]]
c = int(sys.argv[3])
for name, t in (("lumenrig pairs", o), ("numpy reference", n)):
    print(f"{name:16s}: {c / t[0]:.3f} pairs/s wall, {c / (t[1] + t[2]):.3f} pairs per CPU-second, peak RSS {t[3] / 1024:.0f} MiB")
print(f"ratio lumenrig/numpy: {(c / o[0]) / (c / n[0]):.1f}x wall, {(n[1] + n[2]) / (o[1] + o[2]):.1f}x CPU, "
      f"peak RSS {o[3] / n[3]:.2f}x")
PY

echo "== peak RSS of lumenrig relight (${SIZE}x${SIZE}) =="
for lights in 40 156; do
  S=$S40; [ "$lights" = 156 ] && S=$S156
  for budget in 64M 256M; do
    line=$("$LR" relight "$S" --env "$WORK/envs/studio-softboxes.exr" --out "$WORK/r-$lights-$budget.exr" \
      --mem-budget $budget --threads "$THREADS" | tail -1)
    echo "lights $lights, --mem-budget $budget: $line"
  done
done
