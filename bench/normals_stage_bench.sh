#!/bin/sh
# Full-view normals stage benchmark: peak RSS under --mem-budget and time
# relative to decoding the frames, on a generated session kept out of the repo.
#
#   bench/normals_stage_bench.sh BUILD_DIR [SIZE] [LIGHTS] [THREADS]
#
# Defaults: a 2048x2048 view with 156 lights (half ZIP EXR, about 2 GB in
# /tmp/lumenrig-normals-bench; a sphere on a plane, no mask, so depth is
# Frankot-Chellappa). SESSION=DIR uses an existing session instead (its first
# camera), e.g. one from `lumenrig simulate --size 2048x2048 --lights 156`,
# whose bust has a mask (depth by masked Poisson). For 1G and 4G budgets and
# both methods: the decode times right before the run (every frame read
# through io::BandReader, to float and to half), the stage's own summary, its
# peak RSS, and the ratios of the stage's time to the decode times.
set -eu
build=$1
size=${2:-2048}
lights=${3:-156}
threads=${4:-2}
dir=${SESSION:-/tmp/lumenrig-normals-bench/view${size}x${lights}}
out=/tmp/lumenrig-normals-bench/out
mkdir -p /tmp/lumenrig-normals-bench
[ -f "$dir/session.json" ] || "$build/bench/normals_bench" --make-session "$dir" "$size" "$lights"
du -sh "$dir"
# Two decode floors, with the allocator setting the CLI uses (cli/main.cpp):
# to float (what the solve consumes), and to the stored half floats (the
# cheapest decode; the stage now keeps half frames as half). Both inflate
# with libdeflate as the stage does (capture_io/zlib_libdeflate.h); the last
# lines repeat one configuration with zlib (OpenEXR's stock codec,
# LUMENRIG_LIBDEFLATE=0) for decode and stage alike.
export GLIBC_TUNABLES=glibc.malloc.hugetlb=1
# This machine's speed drifts over minutes, so each stage run is paired with
# decodes measured right before it.
decode_floors() {
  line=$("$build/bench/normals_bench" --decode "$dir" "$threads" 16)
  echo "$line"
  decode=$(echo "$line" | sed -n 's/.*wall \([0-9.]*\) s$/\1/p')
  decode_cpu=$(echo "$line" | sed -n 's/.*cpu \([0-9.]*\) s,.*/\1/p')
  hline=$("$build/bench/normals_bench" --decode "$dir" "$threads" 16 half)
  echo "$hline"
  hdecode=$(echo "$hline" | sed -n 's/.*wall \([0-9.]*\) s$/\1/p')
}
for method in lsq robust; do
  for budget in 1G 4G; do
    decode_floors
    log=$(NO_COLOR=1 "$build/cli/lumenrig" normals "$dir" --out "$out" --method "$method" --mem-budget "$budget" \
          --threads "$threads" --force)
    echo "$log" | tail -3
    wall=$(echo "$log" | sed -n 's/^normals: wall \([0-9.]*\) s.*/\1/p')
    rcpu=$(echo "$log" | sed -n 's/^cpu time: read \([0-9.]*\) s, solve \([0-9.]*\) s.*/\1/p')
    scpu=$(echo "$log" | sed -n 's/^cpu time: read \([0-9.]*\) s, solve \([0-9.]*\) s.*/\2/p')
    tcpu=$(echo "$log" | sed -n 's/^cpu time: .*, stage \([0-9.]*\) s$/\1/p')
    echo "  -> $method, budget $budget: whole stage wall / decode wall = $(echo "$wall / $decode" | bc -l | cut -c1-5)" \
         "(to half: $(echo "$wall / $hdecode" | bc -l | cut -c1-5));" \
         "whole stage cpu / decode cpu = $(echo "$tcpu / $decode_cpu" | bc -l | cut -c1-5);" \
         "(read + solve) cpu / decode cpu = $(echo "($rcpu + $scpu) / $decode_cpu" | bc -l | cut -c1-5)"
  done
done

# Side by side: zlib (OpenEXR's stock codec) for decode and stage.
export LUMENRIG_LIBDEFLATE=0
zline=$("$build/bench/normals_bench" --decode "$dir" "$threads" 16 half)
echo "zlib: $zline"
zdecode=$(echo "$zline" | sed -n 's/.*wall \([0-9.]*\) s$/\1/p')
zlog=$(NO_COLOR=1 "$build/cli/lumenrig" normals "$dir" --out "$out" --method robust --mem-budget 4G \
       --threads "$threads" --force)
echo "$zlog" | tail -3
zwall=$(echo "$zlog" | sed -n 's/^normals: wall \([0-9.]*\) s.*/\1/p')
echo "  -> robust, budget 4G, zlib: whole stage wall / half decode wall = $(echo "$zwall / $zdecode" | bc -l | cut -c1-5)"
unset LUMENRIG_LIBDEFLATE
