"""A spark-submit job: the Spark entry point's stages from Parquet (or CSV) tables to files.

    spark-submit "$(python -c 'import dovetail.spark_job as j; print(j.__file__)')" \\
        --left left.parquet --right right.parquet --config link.toml --out run-spark

It links the two tables on Spark (:func:`dovetail.spark.link_spark`) and writes, into
``--out`` (a new folder, or an empty one), Parquet folders of Spark's parts:

* ``links/`` - ``left_id``, ``right_id``, ``weight``, ``confidence``: one row per link;
* ``unlinked_left/``, ``unlinked_right/`` - ``id``: the records without a link;
* ``review/`` - ``left_id``, ``right_id``, ``weight``, ``confidence``, ``linked``: the pairs
  whose confidence is in the config's review band, for clerical review;
* ``candidate_pairs/`` - every candidate pair: ``left_id``, ``right_id``, ``passes`` (bit p
  for pass p), ``weight``, ``theta``, ``confidence``, ``chosen``, ``linked``;
* ``summary.json`` - record, pair and link counts, the laws (EM's and the refined), the
  cut-off, and what is not computed on Spark yet (the verdict and forecast among them: run
  ``dovetail assess`` on one machine for them while that is so).

On a local file system the folder appears whole or not at all (written beside it, then
renamed).

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
    result = ds.link_spark(left, right, cfg)

    parent = out.resolve().parent
    parent.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix=f".{out.name}.", dir=parent))
    try:
        for name in ("links", "unlinked_left", "unlinked_right", "review"):
            getattr(result, name).write.parquet(str(work / name))
        result.pairs.write.parquet(str(work / "candidate_pairs"))
        summary = dict(result.summary, passes=[name for name, _ in ds.passes(cfg)])
        (work / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
        if out.exists():
            out.rmdir()
        os.replace(work, out)
    except BaseException:
        shutil.rmtree(work, ignore_errors=True)
        raise
    print(
        f"wrote {out}: {summary['links']} links among {summary['candidate_pairs']} candidate "
        f"pairs (links are probabilistic: review before acting on any person)"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
