"""dovetail on Apache Spark: the stages mapped onto Spark, each piece done by the library.

Work in progress (issue 22). What is here is the blocking stage:

* :func:`blocking_keys` - one table's key text per record and blocking pass, computed on the
  executors by the library's own transforms (``mapInArrow``), so they equal the keys of a
  single-machine run;
* :func:`candidate_pairs` - the candidate pairs as Spark joins on those keys, each pass's
  blocks over its ``max_block_pairs`` cap dropped as on one machine, the passes' pairs united
  with the mask of the passes that found each (bit p for pass p).

* :func:`pattern_counts` - the candidate pairs compared on the executors (each pair joined
  with both records' needed columns, levels by the library's comparators), as
  agreement-pattern counts summed by Spark: the sufficient statistic of the fit.

* :func:`fit_counts` - the fit's first step (EM) on the driver from those counts alone,
  the same laws as a single-machine run's first fit.

* :func:`components` - the connected components of the pair graph, by label propagation,
  for the per-component stages.

The one-to-one refinement of the fit, the confidences and the matching per connected
component come next; see DEVELOPERS.md ("The Python package").

The executors need the ``dovetail`` package and pyarrow installed in the Python that Spark
runs (``spark.pyspark.python`` / ``PYSPARK_PYTHON``). The config is sent to them as text, so
it needs no shared file system.

Links are probabilistic. Review them before acting on any person, and follow local
data-protection law, approvals and disclosure rules for the data you link.
"""

from __future__ import annotations

import json
import os
from typing import TYPE_CHECKING, Any, Iterator, List, Mapping, Tuple, Union

import pyarrow as pa

from . import _dovetail, _json_default

if TYPE_CHECKING:  # pragma: no cover
    from pyspark.sql import DataFrame

KEY_SCHEMA = "id string, pass short, key string"
"""The schema of :func:`blocking_keys`: record id, pass position (from 0), key text."""


def config_text(config: Union[str, "os.PathLike[str]", Mapping[str, Any]]) -> str:
    """The config as JSON text for the executors: a dict as given, a TOML file read here.

    Paths inside it (``[link] decisions``, ``[model] labelled``) are not used by the stages
    that run on the executors.
    """
    if isinstance(config, Mapping):
        return json.dumps(config, default=_json_default)
    try:
        import tomllib
    except ImportError:  # Python < 3.11
        raise TypeError("on Python < 3.11 give the config as a dict") from None
    with open(os.fspath(config), "rb") as f:
        return json.dumps(tomllib.load(f))


def _keys_of_partition(config_json: str, left: bool):
    def run(batches: Iterator[pa.RecordBatch]) -> Iterator[pa.RecordBatch]:
        from dovetail import _dovetail as native

        for b in batches:
            if b.num_rows == 0:
                continue
            keys = pa.table(native.block_keys(pa.Table.from_batches([b]), None, config_json, left))
            yield from keys.to_batches()

    return run


def blocking_keys(df: "DataFrame", config: Any, *, left: bool) -> "DataFrame":
    """One table's blocking keys (:data:`KEY_SCHEMA`), one row per record and pass with a key.

    ``left`` says which table of the config ``df`` is: its ``[left]`` or ``[right]`` id and
    columns are read. A record whose key has a missing part has no row for that pass.
    """
    return _keys(df, config_text(config), left)


def _keys(df: "DataFrame", config_json: str, left: bool) -> "DataFrame":
    return df.mapInArrow(_keys_of_partition(config_json, left), KEY_SCHEMA)


def passes(config: Any) -> List[Tuple[str, int]]:
    """Each blocking pass of the config: (name, its cap on one block's pairs)."""
    return [(n, int(c)) for n, c in _dovetail.block_passes(None, config_text(config))]


def check_tables(left_df: "DataFrame", right_df: "DataFrame", config: Any) -> None:
    """What one machine checks of a whole table, which no partition can see: every id present
    and unique (``InputError`` naming the id), and no needed column empty in every row
    (``ConfigError``: a single-machine run leaves such a field out, with a warning; here take
    it out of the config). Two Spark aggregations per table.
    """
    from pyspark.sql import functions as F

    from . import ConfigError, InputError

    lcols, rcols = _dovetail.read_columns(None, config_text(config))
    for side, df, cols in (("left", left_df, lcols), ("right", right_df, rcols)):
        id_col = F.trim(F.col(cols[0]).cast("string"))
        if df.where(id_col.isNull() | (id_col == "")).limit(1).count():
            raise InputError(f"{side} table: empty id in column `{cols[0]}`")
        dup = df.groupBy(id_col.alias("id")).count().where(F.col("count") > 1).limit(1).collect()
        if dup:
            raise InputError(f"{side} table: duplicate id `{dup[0]['id']}` in column `{cols[0]}`")
        longest = df.agg(
            *[F.max(F.length(F.trim(F.col(c).cast("string")))).alias(c) for c in cols[1:]]
        ).collect()[0]
        empty = [c for c in cols[1:] if not longest[c]]
        if empty:
            raise ConfigError(
                f"{side} table: column `{empty[0]}` is empty in every row; a single-machine "
                "run leaves its field out, with a warning: take it out of the config for Spark"
            )


def candidate_pairs(
    left_df: "DataFrame", right_df: "DataFrame", config: Any, *, check: bool = True
) -> "DataFrame":
    """The candidate pairs of the config's blocking, by Spark joins on the library's keys.

    Returns ``left_id``, ``right_id`` and ``passes`` (bit p set when pass p found the pair),
    one row per pair: the same pairs and masks as a single-machine run. Per pass, a block
    (records sharing a key) whose left x right records exceed the pass's ``max_block_pairs``
    is dropped, as on one machine. Sorted-neighbourhood passes (``window``) are refused.
    With ``check``, the tables are first checked as a whole (:func:`check_tables`).
    """
    from pyspark.sql import functions as F

    if check:
        check_tables(left_df, right_df, config)
    cj = config_text(config)
    spark = left_df.sparkSession
    caps = spark.createDataFrame(
        [(i, cap) for i, (_, cap) in enumerate(passes(config))], "pass short, cap long"
    )
    lk = _keys(left_df, cj, True)
    rk = _keys(right_df, cj, False)
    size_l = lk.groupBy("pass", "key").agg(F.count(F.lit(1)).alias("nl"))
    size_r = rk.groupBy("pass", "key").agg(F.count(F.lit(1)).alias("nr"))
    kept = (
        size_l.join(size_r, ["pass", "key"])
        .join(F.broadcast(caps), "pass")
        .where(F.col("nl") * F.col("nr") <= F.col("cap"))
        .select("pass", "key")
    )
    pairs = (
        lk.withColumnRenamed("id", "left_id")
        .join(kept, ["pass", "key"])
        .join(rk.withColumnRenamed("id", "right_id"), ["pass", "key"])
    )
    # Each pass gives a pair at most once (one key per record and pass), so the sum of the
    # passes' bits is their union.
    return pairs.groupBy("left_id", "right_id").agg(
        F.sum(F.expr("shiftleft(CAST(1 AS BIGINT), CAST(pass AS INT))")).alias("passes")
    )


PATTERN_SCHEMA = "pattern string, pairs double"
"""The schema of :func:`pattern_counts`: the levels joined with ``,`` (``m`` = missing)."""


def _split_sides(batch: pa.RecordBatch, lcols: List[str], rcols: List[str]):
    """One partition's joined pairs as (left records, right records, left rows, right rows),
    each record once: a record in several pairs is one row of its table."""
    import pyarrow.compute as pc

    table = pa.Table.from_batches([batch])
    out = []
    for prefix, cols in (("l__", lcols), ("r__", rcols)):
        ids = table.column(prefix + cols[0])
        # The records in first-seen order; per pair its record's row; per record the first
        # batch row holding it (index_in gives the first match).
        uniq = pc.unique(ids)
        rows = pc.index_in(ids, value_set=uniq).to_pylist()
        first = pc.index_in(uniq, value_set=ids)
        side = table.select([prefix + c for c in cols]).take(first)
        out.append((side.rename_columns(cols), rows))
    (lt, lrows), (rt, rrows) = out
    return lt, rt, lrows, rrows


def pattern_counts(
    left_df: "DataFrame", right_df: "DataFrame", pairs_df: "DataFrame", config: Any
) -> "DataFrame":
    """The agreement-pattern counts of the pairs ``pairs_df`` (``left_id``, ``right_id``, as
    :func:`candidate_pairs` gives), compared on the executors: :data:`PATTERN_SCHEMA`, one
    row per pattern seen. For the candidate pairs these equal a single-machine run's counts.
    A field empty in a whole table (which a single-machine run leaves out) must be taken out
    of the config first.
    """
    from pyspark.sql import functions as F

    cj = config_text(config)
    lcols, rcols = _dovetail.read_columns(None, cj)
    left = left_df.select([F.col(c).cast("string").alias("l__" + c) for c in lcols])
    right = right_df.select([F.col(c).cast("string").alias("r__" + c) for c in rcols])
    joined = (
        pairs_df.select("left_id", "right_id")
        .join(left, F.col("left_id") == F.col("l__" + lcols[0]))
        .join(right, F.col("right_id") == F.col("r__" + rcols[0]))
    )

    def run(batches: Iterator[pa.RecordBatch]) -> Iterator[pa.RecordBatch]:
        from dovetail import _dovetail as native

        for b in batches:
            if b.num_rows == 0:
                continue
            lt, rt, lrows, rrows = _split_sides(b, lcols, rcols)
            counts = native.pattern_counts(lt, rt, lrows, rrows, cj)
            yield pa.RecordBatch.from_pydict(
                {"pattern": [k for k, _ in counts], "pairs": [float(n) for _, n in counts]}
            )

    per_partition = joined.mapInArrow(run, PATTERN_SCHEMA)
    return per_partition.groupBy("pattern").agg(F.sum("pairs").alias("pairs"))


def fit_counts(counts: Any, n_left: int, n_right: int, config: Any) -> dict:
    """The fit's first step, EM over the pattern counts, on the driver: a dict of ``p``,
    ``m``, ``u`` (per field, per level), ``m_missing``, ``u_missing``, ``loglik``,
    ``iterations``, ``converged``, ``switched``. ``counts`` is :func:`pattern_counts`'s
    DataFrame (collected: one row per pattern) or a dict {pattern: pairs}; ``n_left`` and
    ``n_right`` are the tables' record counts. Equal to a single-machine run's first fit.
    """
    if isinstance(counts, Mapping):
        items = [(str(k), float(v)) for k, v in counts.items()]
    else:
        items = [(r["pattern"], float(r["pairs"])) for r in counts.collect()]
    return json.loads(_dovetail.fit_counts(items, int(n_left), int(n_right), config_text(config)))


def local_plain_fit(left: Any, right: Any, config: Any) -> dict:
    """The single machine's first fit (before the one-to-one refinement), as
    :func:`fit_counts` gives it: the reference it is tested against."""
    from . import _config_args, _table_arg

    path, cj = _config_args(config)
    return json.loads(
        _dovetail.local_plain_fit(_table_arg(left, "left"), _table_arg(right, "right"), path, cj)
    )


def components(pairs_df: "DataFrame", *, max_rounds: int = 200) -> "DataFrame":
    """Each pair's connected component in the graph whose nodes are the records and whose
    edges are the pairs: ``left_id``, ``right_id`` and ``component`` (the least node name of
    the component, a left record as ``L<id>``, a right one as ``R<id>``).

    Label propagation: every node starts with its own name and takes, round after round, the
    least label among itself and its neighbours, until no label changes (rounds: the
    component's diameter plus one). Each round's labels are checkpointed, so the plan does not
    grow with the rounds. More than ``max_rounds`` rounds is an error (a chain of records that
    long is not a blocking graph's).
    """
    from pyspark.sql import functions as F

    e = pairs_df.select(
        F.concat(F.lit("L"), F.col("left_id")).alias("a"),
        F.concat(F.lit("R"), F.col("right_id")).alias("b"),
    )
    edges = e.union(e.select(F.col("b").alias("a"), F.col("a").alias("b"))).localCheckpoint()
    labels = edges.select(F.col("a").alias("node")).distinct().withColumn("c", F.col("node"))
    labels = labels.localCheckpoint()
    for _ in range(max_rounds):
        heard = edges.join(labels.withColumnRenamed("node", "b"), "b").select(
            F.col("a").alias("node"), "c"
        )
        new = labels.union(heard).groupBy("node").agg(F.min("c").alias("c")).localCheckpoint()
        changed = (
            new.alias("n")
            .join(labels.alias("o"), "node")
            .where(F.col("n.c") != F.col("o.c"))
            .limit(1)
            .count()
        )
        labels = new
        if changed == 0:
            break
    else:
        raise RuntimeError(f"components: labels still changing after {max_rounds} rounds")
    left_label = labels.select(
        F.expr("substring(node, 2)").alias("left_id"), F.col("c").alias("component")
    ).where(F.col("node").startswith("L"))
    return pairs_df.select("left_id", "right_id").join(left_label, "left_id")


def local_pattern_counts(left: Any, right: Any, config: Any) -> dict:
    """The single machine's pattern counts of the config's candidate pairs, {pattern: pairs}:
    the reference :func:`pattern_counts` is tested against."""
    from . import _config_args, _table_arg

    path, cj = _config_args(config)
    return dict(
        _dovetail.local_pattern_counts(_table_arg(left, "left"), _table_arg(right, "right"), path, cj)
    )


def local_candidate_pairs(left: Any, right: Any, config: Any) -> pa.Table:
    """The single-machine blocking's pairs (``left_id``, ``right_id``, ``passes``), the
    reference :func:`candidate_pairs` is tested against. Tables as :func:`dovetail.link`
    takes them."""
    from . import _config_args, _table_arg

    path, cj = _config_args(config)
    return pa.table(
        _dovetail.candidate_pairs(
            _table_arg(left, "left"), _table_arg(right, "right"), path, cj
        )
    )
