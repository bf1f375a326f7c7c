#!/usr/bin/env bash
# Scale benchmark (issue 10): `dovetail synth` then `dovetail link` end to end, all stages, at
# several sizes; prints the per-stage seconds the tool reports, the wall time and the peak
# resident memory (GNU time). Not a test: numbers go in the closing note.
# Usage: bash benches/scale.sh [ROWS ...]      (default: 100000 300000 1000000)
set -euo pipefail
cd "$(dirname "$0")/.."
cargo build --release --quiet
bin=target/release/dovetail
if [ ! -x /usr/bin/time ]; then
  echo "needs GNU time (Debian package: time)"; exit 1
fi
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
for rows in "${@:-100000 300000 1000000}"; do
  for n in $rows; do
    "$bin" synth --rows "$n" --noise 0.3 --seed 3 --out "$work/data-$n" >/dev/null
    # A fixed blocking degree as rows grow: the surname's NYSIIS code with the birth date
    # (with Soundex or a birth year alone, common surnames make blocks grow with the
    # population), and the generated postcode + initial pass.
    sed -i 's/keys = \["surname:soundex", "birth:year"\]/keys = ["surname:nysiis", "birth"]/' \
      "$work/data-$n/config.toml"
    /usr/bin/time -v "$bin" link --config "$work/data-$n/config.toml" --out "$work/out-$n" \
      >"$work/stdout-$n" 2>"$work/stderr-$n" || { cat "$work/stderr-$n"; exit 1; }
    wall=$(grep 'Elapsed (wall clock)' "$work/stderr-$n" | awk '{print $NF}')
    peak=$(grep 'Maximum resident set size' "$work/stderr-$n" | awk '{printf "%.0f MiB", $NF/1024}')
    pairs=$(grep -o '"candidate_pairs": [0-9]*' "$work/out-$n/summary.json" | awk '{print $2}')
    stages=$(grep '^time:' "$work/stderr-$n" | sed 's/^time: //' | tr '\n' ' ')
    echo "rows $n x $n: candidate pairs $pairs; wall $wall; peak $peak; stages: $stages"
  done
done
