#!/usr/bin/env bash
# Races a study and runs its full grid (race = false, same seed and replicates) on several
# master seeds; prints, per seed, the runs and wall time of each and whether the top-ranked
# cell of every target, and the recommended configuration, agree. Usage (from the repository
# root, after `cargo build --release`):
#   bash configs/race/compare.sh configs/large-grid.toml [METRIC] [SEEDS...]
# METRIC defaults to variance_ess, SEEDS to 1 2 3. Files go to a temporary directory.
# RACE_ARGS="--shard 1/1" races without the recommendation clause (one target at a time).
set -euo pipefail
study=${1:?usage: compare.sh STUDY.toml [METRIC] [SEEDS...]}
metric=${2:-variance_ess}
shift $(( $# >= 2 ? 2 : 1 ))
seeds=("$@")
[ ${#seeds[@]} -gt 0 ] || seeds=(1 2 3)
assay=${ASSAY:-target/release/assay}
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

# Target and settings of every rank-1 row of a results file's CSV table, one per line.
top_cells() {
  "$assay" table "$1" --rank-by "$metric" --format csv | awk -F, '
    NR == 1 { for (i = 1; i <= NF; i++) if ($i == "rank") r = i; next }
    $r == 1 { line = $1; for (i = 2; i < r; i++) line = line " " $i; print line }'
}

# The recommended configuration of a results file (the table's "Recommended:" line).
recommended() {
  "$assay" table "$1" --rank-by "$metric" | grep -m1 '^\*\*Recommended:\*\*' | sed -e 's/ (.*//'
}

printf '| seed | raced runs | full-grid runs | fewer | raced s | full s | same top cell | same recommendation |\n'
printf '| --- | --- | --- | --- | --- | --- | --- | --- |\n'
for seed in "${seeds[@]}"; do
  sed -e "s/^seed = .*/seed = $seed/" "$study" > "$work/raced.toml"
  sed -e "s/^race = true/race = false/" "$work/raced.toml" > "$work/full.toml"
  t0=$(date +%s.%N)
  # shellcheck disable=SC2086 # RACE_ARGS: extra arguments of the race, e.g. "--shard 1/1"
  "$assay" run "$work/raced.toml" --rank-by "$metric" --quiet --replace --out "$work/raced.jsonl" ${RACE_ARGS:-}
  t1=$(date +%s.%N)
  "$assay" run "$work/full.toml" --quiet --replace --out "$work/full.jsonl"
  t2=$(date +%s.%N)
  raced=$(grep -c '"replicate"' "$work/raced.jsonl")
  full=$(grep -c '"replicate"' "$work/full.jsonl")
  a=$(top_cells "$work/raced.jsonl")
  b=$(top_cells "$work/full.jsonl")
  targets=$(printf '%s\n' "$b" | wc -l)
  ra=$(recommended "$work/raced.jsonl")
  rb=$(recommended "$work/full.jsonl")
  if [ "$ra" = "$rb" ]; then rec=yes; else rec=no; fi
  same=$(comm -12 <(printf '%s\n' "$a" | sort) <(printf '%s\n' "$b" | sort) | wc -l)
  printf '| %s | %s | %s | %.2fx | %.1f | %.1f | %s of %s targets | %s |\n' "$seed" "$raced" \
    "$full" "$(echo "$full / $raced" | bc -l)" "$(echo "$t1 - $t0" | bc -l)" \
    "$(echo "$t2 - $t1" | bc -l)" "$same" "$targets" "$rec"
  if [ "$same" != "$targets" ]; then
    printf '  raced top cells:\n%s\n  full-grid top cells:\n%s\n' "$a" "$b" >&2
  fi
  if [ "$rec" = no ]; then
    printf '  raced: %s\n  full grid: %s\n' "$ra" "$rb" >&2
  fi
done
