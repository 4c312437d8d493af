#!/usr/bin/env bash
# Reproduce the performance figures: assay against the independent NumPy implementation of
# the same static sampler, side by side in one session; the runner's scaling from 1 to 2
# threads; peak memory against the number of runs; cost against N, iterations and d.
#
#   bash configs/bench/measure.sh [PATH/TO/numpy_static_smc.py] [--quick]
#
# The NumPy script defaults to ../shared/reference/numpy_static_smc.py relative to the repo
# root. The two comparisons (assay against NumPy, --threads 1 against --threads 2) run their
# two commands alternately, 20 pairs after one warm-up each (paired.py), and report the median
# of the per-pair ratios with its lowest and highest: on a shared machine both sides of a pair
# see the same load. Other wall times are medians of 5 whole-process runs (hyperfine --warmup 1
# when installed, else a loop with /usr/bin/time). --quick: 3 pairs and 3 runs.
set -euo pipefail
root="$(cd "$(dirname "$0")/../.." && pwd)"
cd "$root"

ref="$root/../shared/reference/numpy_static_smc.py"
runs=5
pairs=20
for a in "$@"; do
    case "$a" in
        --quick) runs=3; pairs=3 ;;
        *) ref="$a" ;;
    esac
done
[ -f "$ref" ] || { echo "NumPy reference not found: $ref" >&2; exit 1; }
command -v python3 >/dev/null || { echo "python3 is needed" >&2; exit 1; }

# Progress on stderr when it is a terminal; the report itself goes to stdout.
note() { if [ -t 2 ]; then printf 'measure.sh: %s\n' "$*" >&2; fi; }

note "building (release)"
cargo build --release -q
bin="$root/target/release/assay"
tmp="$(mktemp -d)"
trap 'rm -rf "$tmp"' EXIT

# median_wall CMD...: median wall-clock seconds of $runs runs (after one warm-up).
median_wall() {
    if command -v hyperfine >/dev/null; then
        hyperfine -N --warmup 1 --runs "$runs" --export-json "$tmp/h.json" "$*" >/dev/null 2>&1
        python3 -c 'import json,statistics,sys; print("%.4f" % statistics.median(json.load(open(sys.argv[1]))["results"][0]["times"]))' "$tmp/h.json"
    else
        "$@" >/dev/null 2>&1
        : >"$tmp/t.txt"
        for _ in $(seq "$runs"); do
            /usr/bin/time -f %e -a -o "$tmp/t.txt" "$@" >/dev/null 2>&1
        done
        python3 -c 'import statistics,sys; print("%.4f" % statistics.median(float(l) for l in open(sys.argv[1]) if l.strip()))' "$tmp/t.txt"
    fi
}

echo "## Machine"
echo
echo "- nproc: $(nproc); CPU: $(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2 | sed 's/^ //')"
echo "- numpy $(python3 -c 'import numpy; print(numpy.__version__)'); pairs per comparison: $pairs; runs per other figure: $runs (median)"
echo

echo "## assay against NumPy (d = 10 AR(1) Gaussian, N = 1000, 50 iterations, 20 replicates)"
echo
echo "| backward kernel | assay --threads 1 (s) | NumPy (s) | ratio (median of pairs) | lowest | highest |"
echo "| --- | --- | --- | --- | --- | --- |"
np="env OMP_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 python3 $ref --reps 20"
for pair in "proposal forward" "gaussian-optimal optimal"; do
    set -- $pair
    note "assay against NumPy, $1: $pairs alternating pairs"
    read -r a n r lo hi < <(python3 configs/bench/paired.py "$pairs" \
        "$bin run configs/bench/numpy-$1.toml --threads 1 --quiet --replace --out $tmp/x.jsonl" \
        "$np --lkernel $2")
    echo "| $1 | $a | $n | ${r}x | ${lo}x | ${hi}x |"
done
echo

echo "## Runner: threads (configs/bench/many-runs.toml, 3600 runs)"
echo
note "--threads 1 against --threads 2: $pairs alternating pairs"
# A = --threads 2, B = --threads 1: the per-pair ratio B / A is the speed-up.
read -r s2 s1 r lo hi < <(python3 configs/bench/paired.py "$pairs" \
    "$bin run configs/bench/many-runs.toml --threads 2 --quiet --replace --out $tmp/m.jsonl" \
    "$bin run configs/bench/many-runs.toml --threads 1 --quiet --replace --out $tmp/m.jsonl")
echo "| --threads 1 (s) | --threads 2 (s) | speed-up (median of pairs) | lowest | highest |"
echo "| --- | --- | --- | --- | --- |"
echo "| $s1 | $s2 | ${r}x | ${lo}x | ${hi}x |"
echo

echo "## Peak memory (max RSS, --threads 2) against the number of runs"
echo
echo "| study | runs | max RSS (MiB) |"
echo "| --- | --- | --- |"
note "peak memory"
for reps in 200 2000; do
    sed "s/^replicates = .*/replicates = $reps/" configs/bench/many-runs.toml >"$tmp/many-$reps.toml"
    /usr/bin/time -f %M -o "$tmp/rss.txt" "$bin" run "$tmp/many-$reps.toml" --threads 2 --quiet --replace --out "$tmp/m.jsonl"
    echo "| many-runs | $((reps * 18)) | $(python3 -c "print('%.1f' % (int(open('$tmp/rss.txt').read().split()[-1]) / 1024))") |"
done
for n in 1000 10000; do
    sed "s/^particles = .*/particles = $n/; s/^replicates = .*/replicates = 2/" configs/bench/numpy-gaussian-optimal.toml >"$tmp/mem-$n.toml"
    /usr/bin/time -f %M -o "$tmp/rss.txt" "$bin" run "$tmp/mem-$n.toml" --threads 1 --quiet --replace --out "$tmp/m.jsonl"
    echo "| numpy-gaussian-optimal, N = $n | 2 | $(python3 -c "print('%.1f' % (int(open('$tmp/rss.txt').read().split()[-1]) / 1024))") |"
done
echo

echo "## Cost against N, iterations and d (--threads 1, 5 replicates; ns per particle-step)"
echo
# study KERNEL N T D -> a study file (5 replicates) on the d-dim AR(1) Gaussian.
study() {
    local f="$tmp/s-$1-$2-$3-$4.toml"
    sed "s/^particles = .*/particles = $2/; s/^iterations = .*/iterations = $3/; s/^dim = .*/dim = $4/; s/^replicates = .*/replicates = 5/" \
        "configs/bench/numpy-$1.toml" >"$f"
    echo "$f"
}
nsps() { python3 -c "import sys; print('%.0f' % (float(sys.argv[1]) * 1e9 / (5 * int(sys.argv[2]) * int(sys.argv[3]))))" "$@"; }
echo "| varied | N | iterations | d | proposal (s) | ns/particle-step | gaussian-optimal (s) | ns/particle-step |"
echo "| --- | --- | --- | --- | --- | --- | --- | --- |"
row() {
    local p o
    p=$(median_wall "$bin" run "$(study proposal "$2" "$3" "$4")" --threads 1 --quiet --replace --out "$tmp/s.jsonl")
    o=$(median_wall "$bin" run "$(study gaussian-optimal "$2" "$3" "$4")" --threads 1 --quiet --replace --out "$tmp/s.jsonl")
    echo "| $1 | $2 | $3 | $4 | $p | $(nsps "$p" "$2" "$3") | $o | $(nsps "$o" "$2" "$3") |"
}
note "cost against N, iterations and d (24 figures)"
for n in 250 1000 4000 16000; do row N "$n" 50 10; done
for t in 25 100 400; do row iterations 1000 "$t" 10; done
for d in 2 5 20 50 100; do row d 1000 50 "$d"; done
