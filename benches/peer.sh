#!/usr/bin/env bash
# Peer benchmark: `dovetail link` against a careful, vectorised Python pipeline doing the same
# job on the same files (benches/peer.py: pandas + pyarrow, numpy, scipy, rapidfuzz). Not a
# test: numbers go in notes.
#
# Usage: bash benches/peer.sh ROWS [ROWS...]        (default: 20000)
#   PEER_BLOCKING=moderate  replace the pass `surname:soundex + birth:year` by
#                           `surname:nysiis + birth` (about 1-5 pairs per record)
#   PEER_REPS=3             timed runs of each tool per size, alternating peer / dovetail
#   PEER_PYTHON=python3     a Python that has the modules; else a venv is made in /tmp/peer-venv
#   PEER_KEEP=1             keep the work folder (printed) instead of removing it
#
# For each size: `dovetail synth --seed 3`, then PEER_REPS x (peer, dovetail) under
# /usr/bin/time -v, then both links.csv scored against truth.csv by the same code
# (peer.py --score). Printed: median wall seconds and median peak RSS of each, the ratios, the
# peer's own in-script total (without interpreter start-up and imports), precision and recall.
set -euo pipefail
cd "$(dirname "$0")/.."
root=$(pwd)
bin=$root/target/release/dovetail
reps=${PEER_REPS:-3}
blocking=${PEER_BLOCKING:-default}
[ -x /usr/bin/time ] || { echo "needs GNU time (Debian package: time)" >&2; exit 1; }
[ -x "$bin" ] || cargo build --release --quiet

modules="import numpy, pandas, pyarrow, pyarrow.csv, scipy.sparse.csgraph, scipy.optimize, rapidfuzz"
py=${PEER_PYTHON:-python3}
if ! "$py" -c "$modules" 2>/dev/null; then
  venv=/tmp/peer-venv
  if ! "$venv/bin/python" -c "$modules" 2>/dev/null; then
    echo "peer: installing pandas pyarrow numpy scipy rapidfuzz jellyfish into $venv" >&2
    python3 -m venv "$venv"
    "$venv/bin/python" -m pip install --quiet --disable-pip-version-check \
      pandas pyarrow numpy scipy rapidfuzz jellyfish
  fi
  py=$venv/bin/python
fi

work=$(mktemp -d /tmp/peer-bench.XXXXXX)
if [ "${PEER_KEEP:-0}" = 1 ]; then echo "work folder: $work" >&2; else trap 'rm -rf "$work"' EXIT; fi

# Wall seconds from GNU time's "h:mm:ss" or "m:ss.ss"; peak RSS in MiB.
wall_of() { grep 'Elapsed (wall clock)' "$1" | awk '{print $NF}' |
  awk -F: '{s=0; for (i=1;i<=NF;i++) s=s*60+$i; printf "%.2f\n", s}'; }
rss_of() { grep 'Maximum resident set size' "$1" | awk '{printf "%.0f\n", $NF/1024}'; }
median() { sort -g | awk '{a[NR]=$1} END {if (NR%2) print a[(NR+1)/2]; else printf "%.2f\n", (a[NR/2]+a[NR/2+1])/2}'; }
qual() { sed -n 's/^quality: precision \([0-9.]*\) recall \([0-9.]*\).*/\1 \2/p'; }

rows_list=("${@:-20000}")
table=()
for n in "${rows_list[@]}"; do
  d=$work/data-$n
  "$bin" synth --rows "$n" --seed 3 --out "$d" >/dev/null
  if [ "$blocking" = moderate ]; then
    sed -i 's/keys = \["surname:soundex", "birth:year"\]/keys = ["surname:nysiis", "birth"]/' \
      "$d/config.toml"
  fi
  : >"$work/pw" ; : >"$work/pm" ; : >"$work/pt" ; : >"$work/dw" ; : >"$work/dm"
  for r in $(seq "$reps"); do
    PEER_SCORE=0 /usr/bin/time -v "$py" benches/peer.py "$d" "$work/peer-$n" \
      >"$work/peer.out" 2>"$work/peer.err" || { cat "$work/peer.err" >&2; exit 1; }
    wall_of "$work/peer.err" >>"$work/pw"; rss_of "$work/peer.err" >>"$work/pm"
    sed -n 's/^time: total \([0-9.]*\)s/\1/p' "$work/peer.err" >>"$work/pt"
    /usr/bin/time -v "$bin" link --config "$d/config.toml" --out "$work/dove-$n" \
      >"$work/dove.out" 2>"$work/dove.err" || { cat "$work/dove.err" >&2; exit 1; }
    wall_of "$work/dove.err" >>"$work/dw"; rss_of "$work/dove.err" >>"$work/dm"
    echo "rows $n run $r: peer $(tail -1 "$work/pw") s, dovetail $(tail -1 "$work/dw") s" >&2
  done
  grep -E '^(peer:|time:)' "$work/peer.err" | sed 's/^/  peer   /' >&2
  grep -E '^time:' "$work/dove.err" | sed 's/^/  dovetail /' >&2
  pairs=$(grep -o '"candidate_pairs": [0-9]*' "$work/dove-$n/summary.json" | awk '{print $2}')
  read -r pp pr < <("$py" benches/peer.py --score "$work/peer-$n/links.csv" "$d/truth.csv" | qual)
  read -r dp dr < <("$py" benches/peer.py --score "$work/dove-$n/links.csv" "$d/truth.csv" | qual)
  pw=$(median <"$work/pw"); pm=$(median <"$work/pm"); pt=$(median <"$work/pt")
  dw=$(median <"$work/dw"); dm=$(median <"$work/dm")
  table+=("$(printf '%9s %-9s %10s | %8s %8s %8s %7s %7s | %8s %8s %7s %7s | %6s %6s' \
    "$n" "$blocking" "$pairs" "$pw" "$pt" "$pm" "$pp" "$pr" "$dw" "$dm" "$dp" "$dr" \
    "$(awk -v a="$pw" -v b="$dw" 'BEGIN {printf "%.1fx", a / b}')" \
    "$(awk -v a="$pm" -v b="$dm" 'BEGIN {printf "%.1fx", a / b}')")")
done

echo
echo "median of $reps runs each (wall s; peak RSS MiB; P/R against truth.csv); peer 'in' = its own"
echo "in-script total, without interpreter start-up and imports; ratio = peer / dovetail"
printf '%9s %-9s %10s | %8s %8s %8s %7s %7s | %8s %8s %7s %7s | %6s %6s\n' \
  rows blocking pairs "peer s" "peer in" "peer MiB" "peer P" "peer R" "dove s" "dove MiB" \
  "dove P" "dove R" wall mem
for line in "${table[@]}"; do echo "$line"; done
