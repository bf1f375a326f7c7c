"""A spark-submit job: the Spark entry point's stages from Parquet (or CSV) tables to files.

    spark-submit "$(python -c 'import dovetail.spark_job as j; print(j.__file__)')" \\
        --left left.parquet --right right.parquet --config link.toml --out run-spark

Work in progress (issue 22): it runs the stages that are on Spark so far and writes, into
``--out`` (a new folder, or an empty one):

* ``candidate_pairs/`` - Parquet: ``left_id``, ``right_id``, ``passes`` (bit p for pass p),
  ``component`` (the pair's connected component);
* ``pattern_counts/`` - Parquet: ``pattern`` (levels joined with ``,``, ``m`` = missing),
  ``pairs``;
* ``fit.json`` - the fit's first step (EM) from those counts, with the record and pair counts.

Links, confidences and the verdict are not on Spark yet: run ``dovetail link`` for them. On a
local file system the folder appears whole or not at all (written beside it, then renamed).

Links are probabilistic. Review them before acting on any person, and follow local
data-protection law, approvals and disclosure rules for the data you link.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
from pathlib import Path
from typing import List, Optional


def _read(spark, path: str):
    if path.lower().endswith(".csv"):
        return spark.read.option("header", True).csv(path)
    return spark.read.parquet(path)


def main(argv: Optional[List[str]] = None) -> int:
    ap = argparse.ArgumentParser(prog="dovetail-spark", description=__doc__.split("\n\n")[0])
    ap.add_argument("--left", required=True, help="the left table: Parquet, or CSV with a header")
    ap.add_argument("--right", required=True, help="the right table: Parquet, or CSV")
    ap.add_argument("--config", required=True, help="the TOML config, as for `dovetail link`")
    ap.add_argument("--out", required=True, help="a new or empty folder for the outputs")
    args = ap.parse_args(argv)

    out = Path(args.out)
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        print(f"error: {out}: exists and is not an empty folder", file=sys.stderr)
        return 2
    from pyspark.sql import SparkSession

    from dovetail import spark as ds

    cfg = json.loads(ds.config_text(args.config))
    session = SparkSession.builder.appName("dovetail").getOrCreate()
    left, right = _read(session, args.left), _read(session, args.right)
    pairs = ds.candidate_pairs(left, right, cfg).cache()
    counts = ds.pattern_counts(left, right, pairs, cfg).cache()
    n_left, n_right = left.count(), right.count()
    fit = ds.fit_counts(counts, n_left, n_right, cfg)
    with_component = pairs.join(
        ds.components(pairs).select("left_id", "right_id", "component"), ["left_id", "right_id"]
    )

    parent = out.resolve().parent
    parent.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix=f".{out.name}.", dir=parent))
    try:
        with_component.write.parquet(str(work / "candidate_pairs"))
        counts.write.parquet(str(work / "pattern_counts"))
        summary = {
            "left_records": n_left,
            "right_records": n_right,
            "candidate_pairs": int(sum(r["pairs"] for r in counts.collect())),
            "passes": [name for name, _ in ds.passes(cfg)],
            "first_fit": fit,
        }
        (work / "fit.json").write_text(json.dumps(summary, indent=2) + "\n")
        if out.exists():
            out.rmdir()
        os.replace(work, out)
    except BaseException:
        shutil.rmtree(work, ignore_errors=True)
        raise
    print(f"wrote {out}: {summary['candidate_pairs']} candidate pairs, first fit p = {fit['p']:.4f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
