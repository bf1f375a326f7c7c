#!/usr/bin/env bash
# Scale benchmark (issues 10 and 17): `dovetail synth` then `dovetail link` end to end, all
# stages, at several sizes; prints the per-stage seconds the tool reports, the wall time, the
# peak resident memory (GNU time), and per candidate pair: the nanoseconds of the stages after
# comparison and the peak bytes. Not a test: numbers go in the closing note.
#
# Usage: bash benches/scale.sh [ROWS ...]            (default: 100000 300000 1000000)
#        SCALE_BLOCKING=loose bash benches/scale.sh [ROWS ...]
#
# Tight (the default): the surname's NYSIIS code with the birth date, and the postcode +
# initial pass: a fixed blocking degree as rows grow. Loose: synth's own config (Soundex of
# the surname + birth year), whose pairs grow with the square of the table size.
# SCALE_REPS=3 repeats each size and prints every run (take the median).
set -euo pipefail
cd "$(dirname "$0")/.."
cargo build --release --quiet
bin=target/release/dovetail
if [ ! -x /usr/bin/time ]; then
  echo "needs GNU time (Debian package: time)"; exit 1
fi
blocking=${SCALE_BLOCKING:-tight}
reps=${SCALE_REPS:-1}
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
printf '%-8s %-6s %10s %8s %9s %9s %8s  %s\n' rows block pairs wall peak_MiB ns/pair B/pair stages
for n in ${@:-100000 300000 1000000}; do
  "$bin" synth --rows "$n" --noise 0.3 --seed 3 --out "$work/data-$n" >/dev/null
  if [ "$blocking" = tight ]; then
    sed -i 's/keys = \["surname:soundex", "birth:year"\]/keys = ["surname:nysiis", "birth"]/' \
      "$work/data-$n/config.toml"
  fi
  for rep in $(seq "$reps"); do
    /usr/bin/time -v "$bin" link --config "$work/data-$n/config.toml" --out "$work/out-$n" \
      >"$work/stdout-$n" 2>"$work/stderr-$n" || { cat "$work/stderr-$n"; exit 1; }
    wall=$(grep 'Elapsed (wall clock)' "$work/stderr-$n" | awk '{print $NF}')
    peak=$(grep 'Maximum resident set size' "$work/stderr-$n" | awk '{print $NF}')
    pairs=$(grep -o '"candidate_pairs": [0-9]*' "$work/out-$n/summary.json" | awk '{print $2}')
    stages=$(grep '^time:' "$work/stderr-$n" | sed 's/^time: //' | tr '\n' ' ')
    # Seconds of the stages after comparison (fitting onwards).
    after=$(grep '^time:' "$work/stderr-$n" \
      | awk '/fitting|duplicates|matching|assessing|confidence|completeness/ {gsub("s","",$3); s+=$3} END {print s}')
    awk -v n="$n" -v b="$blocking" -v p="$pairs" -v w="$wall" -v k="$peak" -v a="$after" -v st="$stages" \
      'BEGIN { printf "%-8s %-6s %10d %8s %9.0f %9.1f %8.0f  %s\n", n, b, p, w, k/1024, a*1e9/(p>0?p:1), k*1024/(p>0?p:1), st }'
  done
done
