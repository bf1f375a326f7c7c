"""Python package against the CLI (issue 20): linking N x N synth records from pandas frames
in one process, against `dovetail link` on the same data as CSV files.

Wall time: the CLI's whole run (reading the CSV files included) against the `link()` call on
frames already in memory (the frames' conversion to Arrow included). Memory: the CLI's peak
resident set against the peak resident set of the Python process during the call minus its
resident set just before it (the frames themselves and the interpreter excluded): the peak is
reset by writing 5 to /proc/self/clear_refs, so pandas' own reading peak is not counted.

The variants alternate within one run (the machines are noisy); the table gives every run and
the medians. Needs the package installed (`pip install ./python`), pandas and GNU time.

Usage: python benches/python_frames.py [ROWS] [REPS]     (default 1000000 3)
Blocking: the scale benchmark's tight blocking (benches/scale.sh).
"""

from __future__ import annotations

import json
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
BIN = ROOT / "target" / "release" / "dovetail"

CHILD = r"""
import gc, json, sys, time
import pandas as pd
import dovetail

folder = sys.argv[1]
read = lambda p: pd.read_csv(p, dtype=str, keep_default_na=False)
left, right = read(f"{folder}/left.csv"), read(f"{folder}/right.csv")
gc.collect()

def status(key):
    for line in open("/proc/self/status"):
        if line.startswith(key):
            return int(line.split()[1]) * 1024
    raise KeyError(key)

with open("/proc/self/clear_refs", "w") as f:
    f.write("5")
before = status("VmRSS:")
start = time.perf_counter()
result = dovetail.link(left, right, f"{folder}/config.toml")
wall = time.perf_counter() - start
peak = status("VmHWM:")
print(json.dumps({"wall": wall, "beyond_frames": peak - before, "frames_rss": before,
                  "links": result.links.num_rows}))
"""


def cli_run(folder: Path, out: Path) -> dict:
    done = subprocess.run(
        ["/usr/bin/time", "-v", str(BIN), "link", "--config", str(folder / "config.toml"),
         "--out", str(out), "--quiet"],
        capture_output=True, text=True, check=True,
    )
    fields = {}
    for line in done.stderr.splitlines():
        line = line.strip()
        if line.startswith("Elapsed (wall clock)"):
            clock = line.rsplit(" ", 1)[1].split(":")
            fields["wall"] = sum(float(x) * 60 ** i for i, x in enumerate(reversed(clock)))
        if line.startswith("Maximum resident set size"):
            fields["peak"] = int(line.rsplit(" ", 1)[1]) * 1024
    fields["links"] = json.loads((out / "summary.json").read_text())["links"]
    return fields


def python_run(folder: Path) -> dict:
    done = subprocess.run([sys.executable, "-c", CHILD, str(folder)], capture_output=True,
                          text=True, check=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> None:
    rows = int(sys.argv[1]) if len(sys.argv) > 1 else 1_000_000
    reps = int(sys.argv[2]) if len(sys.argv) > 2 else 3
    subprocess.run(["cargo", "build", "--release", "--quiet"], cwd=ROOT, check=True)
    with tempfile.TemporaryDirectory() as work:
        folder = Path(work) / "data"
        subprocess.run([str(BIN), "synth", "--rows", str(rows), "--noise", "0.3", "--seed", "3",
                        "--out", str(folder)], check=True, capture_output=True)
        cfg = folder / "config.toml"
        cfg.write_text(cfg.read_text().replace('keys = ["surname:soundex", "birth:year"]',
                                               'keys = ["surname:nysiis", "birth"]'))
        cli, py = [], []
        for _ in range(reps):
            cli.append(cli_run(folder, Path(work) / "out"))
            py.append(python_run(folder))
        print(f"{rows:,} x {rows:,} rows, tight blocking, {reps} runs each (alternating)")
        print(f"{'run':<4} {'CLI wall s':>10} {'CLI peak MiB':>13} {'py wall s':>10} "
              f"{'py beyond-frames MiB':>21} {'py frames MiB':>14}")
        for i, (c, p) in enumerate(zip(cli, py)):
            print(f"{i + 1:<4} {c['wall']:>10.2f} {c['peak'] / 2**20:>13.0f} {p['wall']:>10.2f} "
                  f"{p['beyond_frames'] / 2**20:>21.0f} {p['frames_rss'] / 2**20:>14.0f}")
        cw = statistics.median(c["wall"] for c in cli)
        cp = statistics.median(c["peak"] for c in cli)
        pw = statistics.median(p["wall"] for p in py)
        pp = statistics.median(p["beyond_frames"] for p in py)
        print(f"{'med':<4} {cw:>10.2f} {cp / 2**20:>13.0f} {pw:>10.2f} {pp / 2**20:>21.0f}")
        print(f"python / CLI: wall {pw / cw:.3f} (goal <= 1.10), memory {pp / cp:.3f} "
              f"(goal <= 1.25); links {py[0]['links']} vs {cli[0]['links']}")
        if py[0]["links"] != cli[0]["links"]:
            sys.exit("the Python call and the CLI disagree on the number of links")


if __name__ == "__main__":
    main()
