"""The whole linkage on Spark (issue 22) against the CLI, on synth tables.

Usage: python benches/spark_link.py ROWS [PARTITIONS] [BLOCKING]   (PySpark, Java, the package)

Writes `dovetail synth --rows ROWS --seed 3` to a temporary folder (BLOCKING `demo`, the
default: synth's own config; `tight`: the scale bench's passes, about one pair per record),
links it with the CLI (`dovetail link`, timed, its peak RSS by /usr/bin/time), then with
`dovetail.spark.link_spark` in Spark local mode (`local[2]`, PARTITIONS partitions, default
8), the tables read in file order in about PARTITIONS splits each. Prints both wall times,
Spark's per-stage times, whether the links are the same pairs, the largest confidence
difference (against links.csv's six decimals), the Python driver's peak RSS and the Spark
JVM's (sampled; in local mode the JVM holds the executors too, so it is not the driver's
alone). Not a test: numbers go in notes.
"""

from __future__ import annotations

import csv
import json
import os
import resource
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

from dovetail import spark as ds

ROOT = Path(__file__).resolve().parents[1]
BIN = ROOT / "target/release/dovetail"

TIGHT = """
[[block]]
name = "surname code + birth date"
keys = [{ field = "surname", transform = "nysiis" }, { field = "birth" }]

[[block]]
name = "postcode + initial"
keys = [{ field = "postcode" }, { field = "given", transform = "initial" }]
"""


def rss_of_tree(pid: int) -> int:
    """Resident bytes of a process and its descendants (from /proc)."""
    total, todo = 0, [pid]
    while todo:
        p = todo.pop()
        try:
            with open(f"/proc/{p}/status") as f:
                for line in f:
                    if line.startswith("VmRSS:"):
                        total += int(line.split()[1]) * 1024
            with open(f"/proc/{p}/task/{p}/children") as f:
                todo.extend(int(c) for c in f.read().split())
        except OSError:
            pass
    return total


def main() -> None:
    rows = int(sys.argv[1]) if len(sys.argv) > 1 else 200_000
    parts = int(sys.argv[2]) if len(sys.argv) > 2 else 8
    blocking = sys.argv[3] if len(sys.argv) > 3 else "demo"
    work = Path(tempfile.mkdtemp(prefix="spark-link."))
    subprocess.run([str(BIN), "synth", "--rows", str(rows), "--seed", "3", "--out", str(work)],
                   check=True, stdout=subprocess.DEVNULL)
    config = work / "config.toml"
    if blocking == "tight":
        text = config.read_text()
        text = text[: text.index("[[block]]")] + TIGHT
        config.write_text(text)
    cfg = json.loads(ds.config_text(config))

    t = time.perf_counter()
    r = subprocess.run(["/usr/bin/time", "-f", "%M", str(BIN), "link", "--config", str(config),
                        "--out", str(work / "cli"), "--quiet"],
                       check=True, capture_output=True, text=True)
    cli_wall = time.perf_counter() - t
    cli_peak = int(r.stderr.strip().splitlines()[-1]) / 1024
    with open(work / "cli" / "links.csv") as f:
        want = {(x["left_id"], x["right_id"]): float(x["confidence"]) for x in csv.DictReader(f)}

    os.environ["PYSPARK_PYTHON"] = sys.executable
    from pyspark.sql import SparkSession

    t0 = time.perf_counter()
    split = max(1, os.path.getsize(work / "left.csv") // parts + 1)
    s = (
        SparkSession.builder.master("local[2]")
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.sql.shuffle.partitions", str(parts))
        .config("spark.sql.files.maxPartitionBytes", str(split))
        .config("spark.driver.memory", "6g")
        .getOrCreate()
    )
    s.sparkContext.setLogLevel("ERROR")
    jvm_peak = [0]
    stop = threading.Event()

    def sample() -> None:
        # The JVM is this process's child (pyspark's launcher); its Python workers too.
        while not stop.is_set():
            jvm_peak[0] = max(jvm_peak[0], rss_of_tree(os.getpid()) - rss_of_tree_self())
            time.sleep(0.5)

    def rss_of_tree_self() -> int:
        with open("/proc/self/status") as f:
            return next(int(l.split()[1]) * 1024 for l in f if l.startswith("VmRSS:"))

    threading.Thread(target=sample, daemon=True).start()
    start = time.perf_counter() - t0
    read = s.read.option("header", True)
    left, right = read.csv(str(work / "left.csv")), read.csv(str(work / "right.csv"))
    timings: dict = {}
    t = time.perf_counter()
    res = ds.link_spark(left, right, cfg, partitions=parts, timings=timings)
    got = {(x.left_id, x.right_id): x.confidence for x in res.links.collect()}
    spark_wall = time.perf_counter() - t
    stop.set()
    py_peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024

    same = set(got) == set(want)
    common = set(got) & set(want)
    worst = max((abs(min(got[k], 0.999999) - want[k]) for k in common), default=0.0)
    print(f"rows {rows}, blocking {blocking}, pairs {res.summary['candidate_pairs']}, "
          f"partitions {parts}, input splits {left.rdd.getNumPartitions()}+{right.rdd.getNumPartitions()}")
    print(f"CLI: {cli_wall:.1f} s wall, peak {cli_peak:.0f} MiB, {len(want)} links")
    print(f"Spark: {spark_wall:.1f} s wall (+{start:.1f} s start), {len(got)} links; "
          + ", ".join(f"{k} {v:.1f} s" for k, v in timings.items()))
    print(f"same links: {same} (only Spark {len(set(got) - set(want))}, only CLI "
          f"{len(set(want) - set(got))}); largest confidence difference {worst:.2e}")
    print(f"driver (Python) peak RSS {py_peak:.0f} MiB; Spark JVM + workers peak {jvm_peak[0] / 2**20:.0f} MiB")
    s.stop()


if __name__ == "__main__":
    main()
