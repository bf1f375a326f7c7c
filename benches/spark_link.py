"""The whole linkage on Spark (issue 22) against the CLI, on synth tables.

Usage: python benches/spark_link.py ROWS [PARTITIONS] [BLOCKING]   (PySpark, Java, the package)

Writes `dovetail synth --rows ROWS --seed 3` to a temporary folder (BLOCKING `demo`, the
default: synth's own config; `tight`: the scale bench's passes, about one pair per record),
links it with the CLI (`dovetail link`, timed, its peak RSS by /usr/bin/time), then with
`dovetail.spark.link_spark` in Spark local mode (`local[2]`, or $SPARK_MASTER; PARTITIONS
partitions, default 8), the tables read in file order in about PARTITIONS splits each. Prints both wall times,
Spark's per-stage times, whether the links are the same pairs, the largest confidence
difference (against links.csv's six decimals), the Python driver's peak RSS, the driver
JVM's and the executors' with their Python workers (sampled; in local mode the driver JVM
holds the executors too: use SPARK_MASTER="local-cluster[2,1,3072]" with SPARK_HOME set to
the pyspark package's folder to run them apart, and SPARK_DRIVER_MEMORY for the driver's
heap, 6g by default). Not a test: numbers go in notes.
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



def rss(pid: int) -> int:
    """Resident bytes of one process (from /proc; 0 once it is gone)."""
    try:
        with open(f"/proc/{pid}/status") as f:
            return next(int(l.split()[1]) * 1024 for l in f if l.startswith("VmRSS:"))
    except (OSError, StopIteration):
        return 0


def children(pid: int) -> list:
    """Every thread's children (a JVM starts its executors from other threads than its
    first)."""
    out = []
    try:
        tasks = os.listdir(f"/proc/{pid}/task")
    except OSError:
        return out
    for t in tasks:
        try:
            with open(f"/proc/{pid}/task/{t}/children") as f:
                out.extend(int(c) for c in f.read().split())
        except OSError:
            pass
    return out


def tree(pid: int) -> list:
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        out.append(p)
        todo.extend(children(p))
    return out


def main() -> None:
    rows = int(sys.argv[1]) if len(sys.argv) > 1 else 200_000
    parts = int(sys.argv[2]) if len(sys.argv) > 2 else 8
    blocking = sys.argv[3] if len(sys.argv) > 3 else "demo"
    work = Path(tempfile.mkdtemp(prefix="spark-link."))
    subprocess.run([str(BIN), "synth", "--rows", str(rows), "--seed", "3", "--out", str(work)],
                   check=True, stdout=subprocess.DEVNULL)
    config = work / "config.toml"
    if blocking == "tight":
        # As benches/scale.sh: the surname's NYSIIS code with the whole birth date.
        text = config.read_text()
        loose = 'keys = ["surname:soundex", "birth:year"]'
        assert loose in text
        config.write_text(text.replace(loose, 'keys = ["surname:nysiis", "birth"]'))
    cfg = json.loads(ds.config_text(config))

    t = time.perf_counter()
    r = subprocess.run(["/usr/bin/time", "-f", "%M", str(BIN), "link", "--config", str(config),
                        "--out", str(work / "cli"), "--quiet"],
                       check=True, capture_output=True, text=True)
    cli_wall = time.perf_counter() - t
    cli_peak = int(r.stderr.strip().splitlines()[-1]) / 1024

    os.environ["PYSPARK_PYTHON"] = sys.executable
    from pyspark.sql import SparkSession

    t0 = time.perf_counter()
    split = max(1, os.path.getsize(work / "left.csv") // parts + 1)
    s = (
        SparkSession.builder.master(os.environ.get("SPARK_MASTER", "local[2]"))
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.sql.shuffle.partitions", str(parts))
        .config("spark.sql.files.maxPartitionBytes", str(split))
        .config("spark.driver.memory", os.environ.get("SPARK_DRIVER_MEMORY", "6g"))
        .getOrCreate()
    )
    s.sparkContext.setLogLevel("ERROR")
    py_start = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    # This process's children: the driver JVM (pyspark's launcher) and, under it, the Python
    # workers and, with local-cluster, the executor JVMs.
    jvm_peak, rest_peak = [0], [0]
    stop = threading.Event()

    def sample() -> None:
        me = os.getpid()
        while not stop.is_set():
            kids = children(me)
            jvm_peak[0] = max(jvm_peak[0], sum(rss(k) for k in kids))
            rest = sum(rss(p) for k in kids for p in tree(k) if p != k)
            rest_peak[0] = max(rest_peak[0], rest)
            time.sleep(0.5)

    threading.Thread(target=sample, daemon=True).start()
    start = time.perf_counter() - t0
    read = s.read.option("header", True)
    left, right = read.csv(str(work / "left.csv")), read.csv(str(work / "right.csv"))
    timings: dict = {}
    t = time.perf_counter()
    res = ds.link_spark(left, right, cfg, partitions=parts, timings=timings)
    spark_wall = time.perf_counter() - t
    stop.set()
    # The driver's own peak, before this bench collects the links to compare them.
    py_peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    got = {(x.left_id, x.right_id): x.confidence for x in res.links.toLocalIterator()}
    with open(work / "cli" / "links.csv") as f:
        want = {(x["left_id"], x["right_id"]): float(x["confidence"]) for x in csv.DictReader(f)}

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
    cli_summary = json.loads((work / "cli" / "summary.json").read_text())
    fc = res.summary["forecast"]
    print(f"verdict: Spark {res.summary['verdict']}, CLI {cli_summary['verdict']}; forecast: "
          f"Spark {fc['error_rate'] if fc else None}, CLI {cli_summary['forecast_error_rate']}")
    print(f"driver (Python) peak RSS {py_peak:.0f} MiB ({py_start:.0f} MiB once Spark had started); "
          f"driver JVM peak {jvm_peak[0] / 2**20:.0f} MiB (in local mode it holds the executors "
          f"too); executor JVMs and Python workers peak {rest_peak[0] / 2**20:.0f} MiB")
    s.stop()


if __name__ == "__main__":
    main()
