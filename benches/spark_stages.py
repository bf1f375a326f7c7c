"""The Spark entry point's stages so far (issue 22) against one machine, on synth tables.

Usage: python benches/spark_stages.py ROWS [PARTITIONS]     (PySpark, Java and the package)

Writes `dovetail synth --rows ROWS --seed 3` to a temporary folder, then in Spark local mode
(`local[2]`, PARTITIONS shuffle partitions, default 8): the whole-table checks, the candidate
pairs, their pattern counts and the driver's fit, each timed; then the same through the
single-machine references in this process. Prints the times, whether the pairs' count, the
pattern counts and the fit are equal, and the driver's peak RSS (this Python process; the JVM
holds Spark's executors in local mode, so its memory is not the driver's alone). Not a test:
numbers go in notes.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pyarrow.csv as pacsv

from dovetail import spark as ds

ROOT = Path(__file__).resolve().parents[1]


def main() -> None:
    rows = int(sys.argv[1]) if len(sys.argv) > 1 else 200_000
    parts = int(sys.argv[2]) if len(sys.argv) > 2 else 8
    work = Path(tempfile.mkdtemp(prefix="spark-stages."))
    subprocess.run(
        [str(ROOT / "target/release/dovetail"), "synth", "--rows", str(rows), "--seed", "3",
         "--out", str(work)],
        check=True, stdout=subprocess.DEVNULL,
    )
    cfg = json.loads(ds.config_text(work / "config.toml"))

    os.environ["PYSPARK_PYTHON"] = sys.executable
    from pyspark.sql import SparkSession

    t = time.perf_counter()
    s = (
        SparkSession.builder.master("local[2]")
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.sql.shuffle.partitions", str(parts))
        .config("spark.driver.memory", "4g")
        .getOrCreate()
    )
    s.sparkContext.setLogLevel("ERROR")
    start = time.perf_counter() - t
    read = s.read.option("header", True)
    left = read.csv(str(work / "left.csv")).repartition(parts).cache()
    right = read.csv(str(work / "right.csv")).repartition(parts).cache()
    n_left, n_right = left.count(), right.count()

    times = {}
    t = time.perf_counter()
    ds.check_tables(left, right, cfg)
    times["checks"] = time.perf_counter() - t
    t = time.perf_counter()
    pairs = ds.candidate_pairs(left, right, cfg, check=False).cache()
    n_pairs = pairs.count()
    times["blocking"] = time.perf_counter() - t
    t = time.perf_counter()
    counts = {r.pattern: r.pairs for r in ds.pattern_counts(left, right, pairs, cfg).collect()}
    times["comparing"] = time.perf_counter() - t
    t = time.perf_counter()
    fit = ds.fit_counts(counts, n_left, n_right, cfg)
    times["fit"] = time.perf_counter() - t

    opts = pacsv.ConvertOptions(strings_can_be_null=False, auto_dict_encode=False)
    lt = pacsv.read_csv(work / "left.csv", convert_options=opts)
    rt = pacsv.read_csv(work / "right.csv", convert_options=opts)
    lt = lt.cast(__import__("pyarrow").schema([(f.name, "string") for f in lt.schema]))
    rt = rt.cast(__import__("pyarrow").schema([(f.name, "string") for f in rt.schema]))
    t = time.perf_counter()
    local_counts = ds.local_pattern_counts(lt, rt, cfg)
    local_compare = time.perf_counter() - t
    t = time.perf_counter()
    local_fit = ds.local_plain_fit(lt, rt, cfg)
    local_fit_s = time.perf_counter() - t

    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"rows {rows}, partitions {parts}, pairs {n_pairs}, Spark start {start:.1f} s")
    print("spark: " + ", ".join(f"{k} {v:.2f} s" for k, v in times.items()))
    print(f"one machine: read + block + compare {local_compare:.2f} s; "
          f"read + block + compare + whole fit {local_fit_s:.2f} s")
    print(f"pairs equal: {n_pairs == sum(local_counts.values())}; "
          f"pattern counts equal: {counts == local_counts}; first fit equal: {fit == local_fit}")
    print(f"driver (Python) peak RSS {peak:.0f} MiB")
    s.stop()


if __name__ == "__main__":
    main()
