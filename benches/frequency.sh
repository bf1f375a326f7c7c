#!/usr/bin/env bash
# Value-frequency weighting on synth data (issue 4): F1 of `dovetail link` with
# `frequency = true` on the given fields against the same run without, per noise level and
# seed, then per noise level the mean change over the seeds, its standard deviation and the
# runs where F1 fell. Usage: bash benches/frequency.sh [rows] [fields] [noise levels] [seeds]
# [twins] (defaults: 20000, given,surname, "0.2 0.5 0.8 1.0", "5 6 7 8 9 10 11 12", synth's
# realistic twin rate; twins 0.5 is the stress case with ten times the real share of twins).
# About a minute. One link is 0.00007 of F1 at 20,000 rows, and single runs move by a few
# links either way, hence the seeds.
# Needs python3 (standard library only) to edit the config and score the links.
set -euo pipefail
cd "$(dirname "$0")/.."
cargo build --release --quiet
rows=${1:-20000}
fields=${2:-given,surname}
noises=${3:-0.2 0.5 0.8 1.0}
seeds=${4:-5 6 7 8 9 10 11 12}
twins=${5:+--twins $5}
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
for noise in $noises; do
  for seed in $seeds; do
    d="$work/n${noise}_s${seed}"
    target/release/dovetail synth --rows "$rows" --noise "$noise" --seed "$seed" $twins --out "$d" >/dev/null
    python3 - "$d" "$fields" "$noise" "$seed" <<'PY'
import csv, re, subprocess, sys
d, fields, noise, seed = sys.argv[1], sys.argv[2].split(","), sys.argv[3], sys.argv[4]
base = open(d + "/config.toml").read()
truth = {(r["left_id"], r["right_id"]) for r in csv.DictReader(open(d + "/truth.csv"))}

def with_frequency(text):
    parts = text.split("[[field]]")
    for i, p in enumerate(parts):
        m = re.search(r'name = "(\w+)"', p)
        if m and m.group(1) in fields:
            parts[i] = p.replace("\nmethod", "\nfrequency = true\nmethod", 1)
    return "[[field]]".join(parts)

scores = []
for on in (False, True):
    cfg = f"{d}/config_{int(on)}.toml"
    open(cfg, "w").write(with_frequency(base) if on else base)
    out = f"{d}/out_{int(on)}"
    subprocess.run(["target/release/dovetail", "link", "--config", cfg, "--out", out, "--quiet"], check=True)
    links = {(r["left_id"], r["right_id"]) for r in csv.DictReader(open(out + "/links.csv"))}
    tp = len(links & truth)
    p, r = tp / max(1, len(links)), tp / len(truth)
    scores.append((p, r, 2 * p * r / (p + r)))
(p0, r0, f0), (p1, r1, f1) = scores
print(f"noise {noise} seed {seed}: off P {p0:.4f} R {r0:.4f} F1 {f0:.4f} | on P {p1:.4f} R {r1:.4f} F1 {f1:.4f} | change {f1 - f0:+.4f}")
print(f"{noise} {f1 - f0:.6f}", file=open(d + "/../changes.txt", "a"))
PY
  done
done
python3 - "$work/changes.txt" <<'PY'
import statistics, sys
by = {}
for line in open(sys.argv[1]):
    noise, change = line.split()
    by.setdefault(noise, []).append(float(change))
for noise, c in by.items():
    sd = statistics.stdev(c) if len(c) > 1 else 0.0
    falls = sum(x < 0 for x in c)
    print(f"noise {noise}: mean change {statistics.mean(c):+.5f} (sd {sd:.5f}, {len(c)} seeds); "
          f"F1 fell in {falls} runs, by at most {max(0.0, -min(c)):.4f}")
PY
