"""The Spark entry point's blocking (issue 22), against the single-machine blocking.

The reference is the library's own blocking run on one machine (`local_candidate_pairs`:
keys, blocks, caps and the union of passes as `dovetail link` makes them); the Spark path
makes the same pairs from key texts by joins. The first tests need no Spark: they join the
keys with pandas. The Spark tests run Spark in local mode with several partitions; they are
skipped where pyspark or Java is missing, except when DOVETAIL_REQUIRE_SPARK=1 (.ci/run sets
it), where that is a failure.
"""

from __future__ import annotations

import os
import shutil
import sys

import pandas as pd
import pyarrow as pa
import pytest

from dovetail import _dovetail, spark
from dovetail.spark import config_text

from conftest import SAMPLE_CONFIG, SAMPLE_LEFT, SAMPLE_RIGHT

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    tomllib = None


def text_frame(path) -> pa.Table:
    """A CSV as text columns, empty cells as empty strings (as the CLI reads them)."""
    df = pd.read_csv(path, dtype=str, keep_default_na=False)
    return pa.Table.from_pandas(df, preserve_index=False)


def pair_set(t: pa.Table) -> set:
    d = t.to_pydict()
    return set(zip(d["left_id"], d["right_id"], (int(x) for x in d["passes"])))


def sample_dict(**block_changes) -> dict:
    if tomllib is None:
        pytest.skip("needs Python 3.11 (tomllib)")
    with open(SAMPLE_CONFIG, "rb") as f:
        cfg = tomllib.load(f)
    for b in cfg["block"]:
        b.update(block_changes)
    return cfg


def joined_with_pandas(left: pa.Table, right: pa.Table, cfg) -> set:
    """The candidate pairs from the library's key texts, joined by pandas."""
    cj = config_text(cfg)
    lk = pa.table(_dovetail.block_keys(left, None, cj, True)).to_pandas()
    rk = pa.table(_dovetail.block_keys(right, None, cj, False)).to_pandas()
    caps = dict(enumerate(c for _, c in _dovetail.block_passes(None, cj)))
    nl = lk.groupby(["pass", "key"]).size().rename("nl")
    nr = rk.groupby(["pass", "key"]).size().rename("nr")
    sizes = pd.concat([nl, nr], axis=1, join="inner").reset_index()
    kept = sizes[sizes.nl * sizes.nr <= sizes["pass"].map(caps)][["pass", "key"]]
    pairs = lk.merge(kept, on=["pass", "key"]).merge(rk, on=["pass", "key"], suffixes=("_l", "_r"))
    pairs["bit"] = 2 ** pairs["pass"].astype("int64")
    masks = pairs.groupby(["id_l", "id_r"])["bit"].sum()
    return {(a, b, int(m)) for (a, b), m in masks.items()}


def test_keys_joined_give_the_single_machine_pairs():
    left, right = text_frame(SAMPLE_LEFT), text_frame(SAMPLE_RIGHT)
    cfg = sample_dict()
    want = pair_set(spark.local_candidate_pairs(left, right, cfg))
    assert len(want) > 100
    assert {m for *_, m in want} >= {1, 2, 3}, "pairs from each pass and from both"
    assert joined_with_pandas(left, right, cfg) == want


def test_the_block_cap_drops_the_same_blocks():
    # A cap of 2 pairs a block drops most blocks of the sample tables; the same ones.
    left, right = text_frame(SAMPLE_LEFT), text_frame(SAMPLE_RIGHT)
    cfg = sample_dict(max_block_pairs=2)
    want = pair_set(spark.local_candidate_pairs(left, right, cfg))
    full = pair_set(spark.local_candidate_pairs(left, right, sample_dict()))
    assert 0 < len(want) < len(full)
    assert joined_with_pandas(left, right, cfg) == want


def test_keys_do_not_depend_on_how_a_table_is_split():
    left = text_frame(SAMPLE_LEFT)
    cj = config_text(sample_dict())
    whole = pa.table(_dovetail.block_keys(left, None, cj, True)).to_pandas()
    parts = pd.concat(
        pa.table(_dovetail.block_keys(left.slice(i, 37), None, cj, True)).to_pandas()
        for i in range(0, left.num_rows, 37)
    )
    key = ["id", "pass", "key"]
    assert whole.sort_values(key).reset_index(drop=True).equals(
        parts.sort_values(key).reset_index(drop=True)
    )


def test_a_window_pass_is_refused():
    cfg = sample_dict()
    cfg["block"][0]["window"] = 5
    with pytest.raises(_dovetail.ConfigError, match="sorted-neighbourhood"):
        pa.table(_dovetail.block_keys(text_frame(SAMPLE_LEFT), None, config_text(cfg), True))


@pytest.fixture(scope="module")
def session():
    required = os.environ.get("DOVETAIL_REQUIRE_SPARK") == "1"
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        if required:
            pytest.fail("pyspark is not installed and DOVETAIL_REQUIRE_SPARK=1")
        pytest.skip("pyspark is not installed")
    if shutil.which("java") is None and not os.environ.get("JAVA_HOME"):
        if required:
            pytest.fail("no Java found and DOVETAIL_REQUIRE_SPARK=1")
        pytest.skip("no Java")
    # The executors' Python is this one, which has the package.
    os.environ["PYSPARK_PYTHON"] = sys.executable
    s = (
        SparkSession.builder.master("local[2]")
        .appName("dovetail-tests")
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.sql.shuffle.partitions", "5")
        .getOrCreate()
    )
    s.sparkContext.setLogLevel("ERROR")
    yield s
    s.stop()


def sample_frames(session, left_parts: int, right_parts: int):
    """The sample tables read by Spark, split into partitions so that keys and joins cross
    them."""
    read = session.read.option("header", True)
    return (
        read.csv(str(SAMPLE_LEFT)).repartition(left_parts),
        read.csv(str(SAMPLE_RIGHT)).repartition(right_parts),
    )


def spark_and_local(session, cfg, left_parts: int, right_parts: int):
    """The Spark blocking's pairs and the single machine's."""
    left_df, right_df = sample_frames(session, left_parts, right_parts)
    got = {
        (r.left_id, r.right_id, int(r.passes))
        for r in spark.candidate_pairs(left_df, right_df, cfg).collect()
    }
    want = pair_set(
        spark.local_candidate_pairs(text_frame(SAMPLE_LEFT), text_frame(SAMPLE_RIGHT), cfg)
    )
    return got, want


def test_spark_blocking_gives_the_single_machine_pairs(session):
    got, want = spark_and_local(session, sample_dict(), 3, 4)
    assert len(want) > 100
    assert got == want


def test_spark_blocking_honours_the_cap(session):
    got, want = spark_and_local(session, sample_dict(max_block_pairs=2), 2, 3)
    assert got == want


def counts_of_pairs(pairs: pa.Table, left: pa.Table, right: pa.Table, cfg) -> dict:
    """Pattern counts of some pairs through the per-partition native piece, the records of
    each side taken once, as a partition of joined pairs gives them."""
    cj = config_text(cfg)
    lcols, rcols = _dovetail.read_columns(None, cj)
    d = pairs.to_pydict()
    lpos = {x: i for i, x in enumerate(left.column(lcols[0]).to_pylist())}
    rpos = {x: i for i, x in enumerate(right.column(rcols[0]).to_pylist())}
    lids = sorted(set(d["left_id"]))
    rids = sorted(set(d["right_id"]))
    lt = left.select(lcols).take([lpos[x] for x in lids])
    rt = right.select(rcols).take([rpos[x] for x in rids])
    li = {x: i for i, x in enumerate(lids)}
    ri = {x: i for i, x in enumerate(rids)}
    rows_l = [li[x] for x in d["left_id"]]
    rows_r = [ri[x] for x in d["right_id"]]
    return dict(_dovetail.pattern_counts(lt, rt, rows_l, rows_r, cj))


def test_pattern_counts_of_parts_add_up_to_the_single_machine_counts():
    left, right = text_frame(SAMPLE_LEFT), text_frame(SAMPLE_RIGHT)
    cfg = sample_dict()
    want = spark.local_pattern_counts(left, right, cfg)
    assert sum(want.values()) > 100 and len(want) > 10
    pairs = spark.local_candidate_pairs(left, right, cfg)
    half = pairs.num_rows // 3
    total: dict = {}
    for part in (pairs.slice(0, half), pairs.slice(half)):
        for k, n in counts_of_pairs(part, left, right, cfg).items():
            total[k] = total.get(k, 0.0) + n
    assert total == want


def test_spark_pattern_counts_equal_the_single_machine_counts(session):
    left_df, right_df = sample_frames(session, 3, 2)
    cfg = sample_dict()
    pairs = spark.candidate_pairs(left_df, right_df, cfg)
    got = {r.pattern: r.pairs for r in spark.pattern_counts(left_df, right_df, pairs, cfg).collect()}
    want = spark.local_pattern_counts(text_frame(SAMPLE_LEFT), text_frame(SAMPLE_RIGHT), cfg)
    assert got == want


def test_the_fit_from_counts_alone_is_the_single_machines_first_fit():
    left, right = text_frame(SAMPLE_LEFT), text_frame(SAMPLE_RIGHT)
    cfg = sample_dict()
    counts = spark.local_pattern_counts(left, right, cfg)
    want = spark.local_plain_fit(left, right, cfg)
    assert 0.0 < want["p"] < 1.0 and want["iterations"] > 1
    # In any order: the driver sorts the patterns as one machine does.
    shuffled = dict(sorted(counts.items(), key=lambda kv: (-kv[1], kv[0])))
    assert spark.fit_counts(shuffled, left.num_rows, right.num_rows, cfg) == want


def test_a_pattern_that_does_not_fit_the_config_is_an_error():
    with pytest.raises(_dovetail.InputError, match="does not fit"):
        spark.fit_counts({"0,1": 5.0}, 10, 10, sample_dict())


def test_spark_fit_equals_the_single_machine_first_fit(session):
    left_df, right_df = sample_frames(session, 3, 2)
    cfg = sample_dict()
    pairs = spark.candidate_pairs(left_df, right_df, cfg)
    counts = spark.pattern_counts(left_df, right_df, pairs, cfg)
    got = spark.fit_counts(counts, left_df.count(), right_df.count(), cfg)
    want = spark.local_plain_fit(text_frame(SAMPLE_LEFT), text_frame(SAMPLE_RIGHT), cfg)
    assert got == want


def union_find_components(pairs) -> set:
    """The components of a pair list as sets of pairs (a plain union-find: the reference)."""
    parent: dict = {}

    def find(x):
        while parent.setdefault(x, x) != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x

    for a, b in pairs:
        ra, rb = find(("L", a)), find(("R", b))
        if ra != rb:
            parent[ra] = rb
    groups: dict = {}
    for a, b in pairs:
        groups.setdefault(find(("L", a)), set()).add((a, b))
    return {frozenset(g) for g in groups.values()}


def test_union_find_in_one_task_gives_the_graphs_components():
    pairs = spark.local_candidate_pairs(text_frame(SAMPLE_LEFT), text_frame(SAMPLE_RIGHT), sample_dict())
    lid, rid = pairs.column("left_id").to_pylist(), pairs.column("right_id").to_pylist()
    # Row numbers: any increasing numbering of each table's records.
    lrow = {x: i for i, x in enumerate(sorted(set(lid)))}
    rrow = {x: i for i, x in enumerate(sorted(set(rid)))}
    t = pa.table({"lrow": pa.array([lrow[x] for x in lid], pa.int64()),
                  "rrow": pa.array([rrow[x] for x in rid], pa.int64())})
    label = pa.table(_dovetail.union_find_components(t)).column("component").to_pylist()
    groups: dict = {}
    for a, b, c in zip(lid, rid, label):
        groups.setdefault(c, set()).add((a, b))
    assert {frozenset(g) for g in groups.values()} == union_find_components(list(zip(lid, rid)))
    assert len(groups) > 100
    # Each label is the least node of its component (left row r as 2r, right as 2r + 1).
    for c, g in groups.items():
        assert c == min(min(2 * lrow[a] for a, _ in g), min(2 * rrow[b] + 1 for _, b in g))


def test_spark_components_are_the_graphs_components(session):
    left_df, right_df = sample_frames(session, 3, 2)
    cfg = sample_dict()
    pairs = spark.candidate_pairs(left_df, right_df, cfg)
    rows = spark.components(pairs).collect()
    got: dict = {}
    for r in rows:
        got.setdefault(r.component, set()).add((r.left_id, r.right_id))
    local = spark.local_candidate_pairs(text_frame(SAMPLE_LEFT), text_frame(SAMPLE_RIGHT), cfg)
    d = local.to_pydict()
    want = union_find_components(list(zip(d["left_id"], d["right_id"])))
    assert len(rows) == local.num_rows
    assert any(len(g) > 2 for g in want), "some component joins several pairs"
    assert {frozenset(g) for g in got.values()} == want
    # The label is the least node name of its component.
    for label, g in got.items():
        names = {"L" + a for a, _ in g} | {"R" + b for _, b in g}
        assert label == min(names)


def test_spark_checks_the_whole_tables(session):
    from pyspark.sql import functions as F

    left_df, right_df = sample_frames(session, 2, 2)
    cfg = sample_dict()
    # A duplicate id across partitions, which no partition sees alone.
    doubled = left_df.union(left_df.limit(1)).repartition(3)
    with pytest.raises(_dovetail.InputError, match="left table: duplicate id"):
        spark.candidate_pairs(doubled, right_df, cfg)
    first_right = right_df.first()["rec_id"]
    blank = right_df.withColumn(
        "rec_id", F.when(F.col("rec_id") == F.lit(first_right), F.lit(" ")).otherwise(F.col("rec_id"))
    )
    with pytest.raises(_dovetail.InputError, match="right table: empty id"):
        spark.candidate_pairs(left_df, blank, cfg)
    no_phone = left_df.withColumn("phone", F.lit(None).cast("string"))
    with pytest.raises(_dovetail.ConfigError, match="column `phone` is empty in every row"):
        spark.candidate_pairs(no_phone, right_df, cfg)


def test_the_spark_job_writes_the_linkage(session, tmp_path):
    import json as _json

    import pyarrow.parquet as pq

    import dovetail
    from dovetail import spark_job

    left, right = text_frame(SAMPLE_LEFT), text_frame(SAMPLE_RIGHT)
    pq.write_table(left, tmp_path / "left.parquet")
    pq.write_table(right, tmp_path / "right.parquet")
    out = tmp_path / "run"
    code = spark_job.main(
        ["--left", str(tmp_path / "left.parquet"), "--right", str(tmp_path / "right.parquet"),
         "--config", str(SAMPLE_CONFIG), "--out", str(out)]
    )
    assert code == 0
    assert sorted(p.name for p in out.iterdir()) == [
        "candidate_pairs", "links", "review", "summary.json", "unlinked_left", "unlinked_right"
    ]
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == [], "no work folder left"
    cfg = sample_dict()
    pairs = pq.read_table(out / "candidate_pairs")
    want = pair_set(spark.local_candidate_pairs(left, right, cfg))
    got = set(zip(*(pairs.column(c).to_pylist() for c in ("left_id", "right_id", "passes"))))
    assert got == want
    links = pq.read_table(out / "links")
    local = dovetail.link(left, right, cfg).links
    assert set(zip(links.column("left_id").to_pylist(), links.column("right_id").to_pylist())) == set(
        zip(local.column("left_id").to_pylist(), local.column("right_id").to_pylist())
    )
    summary = _json.loads((out / "summary.json").read_text())
    assert summary["candidate_pairs"] == len(want)
    assert summary["links"] == local.num_rows
    assert summary["laws"]["plain_fit"] == spark.local_plain_fit(left, right, cfg)
    # A second run into the same, now full, folder is refused and changes nothing.
    assert spark_job.main(
        ["--left", str(tmp_path / "left.parquet"), "--right", str(tmp_path / "right.parquet"),
         "--config", str(SAMPLE_CONFIG), "--out", str(out)]
    ) == 2


# The whole run on Spark against the single machine's (`dovetail.link` on the same tables and
# config: the library's own run, as the CLI makes it). The links must be the same pairs; the
# confidences agree to the single machine's six decimals (its links table rounds them, and
# caps them at 0.999999); the laws to 1e-9 (the partitions' sums are added in another order,
# and the refinement's BP judges its stopping rule per partition).


def local_and_spark(session, cfg, partitions: int, one_task_pairs: int = 50_000_000):
    """The sample tables linked by Spark, read in file order in several partitions (small
    file splits), and by one machine. In file order each record's row number follows the
    file, as one machine numbers them, so two pairs of exactly equal weight competing for a
    record are decided the same way (the matching breaks such ties by row order)."""
    import dovetail

    session.conf.set("spark.sql.files.maxPartitionBytes", "65536")
    try:
        read = session.read.option("header", True)
        left_df, right_df = read.csv(str(SAMPLE_LEFT)), read.csv(str(SAMPLE_RIGHT))
        assert left_df.rdd.getNumPartitions() > 1 and right_df.rdd.getNumPartitions() > 1
        # The row numbers are fixed (checkpointed) inside, while the setting holds.
        got = spark.link_spark(
            left_df, right_df, cfg, partitions=partitions, one_task_pairs=one_task_pairs
        )
    finally:
        session.conf.unset("spark.sql.files.maxPartitionBytes")
    want = dovetail.link(text_frame(SAMPLE_LEFT), text_frame(SAMPLE_RIGHT), cfg)
    return got, want


def rows(df, *cols) -> list:
    return [tuple(r[c] for c in cols) for r in df.collect()]


# One partition with the components by union-find in one task; four with them by label
# propagation.
@pytest.mark.parametrize("partitions, one_task_pairs", [(1, 50_000_000), (4, 0)])
def test_spark_links_equal_the_single_machine_links(session, partitions, one_task_pairs):
    cfg = sample_dict()
    got, want = local_and_spark(session, cfg, partitions, one_task_pairs)
    w = want.links.to_pydict()
    want_links = {(a, b): c for a, b, c in zip(w["left_id"], w["right_id"], w["confidence"])}
    got_links = {(a, b): c for a, b, c in rows(got.links, "left_id", "right_id", "confidence")}
    assert len(want_links) > 1000
    assert set(got_links) == set(want_links)
    worst = max(abs(min(got_links[k], 0.999999) - want_links[k]) for k in want_links)
    assert worst <= 1e-6 + 1e-12, worst
    # The laws: p and the prior log odds of every set of passes.
    laws, fit = got.summary["laws"], want.summary["fit"]
    assert abs(laws["fit"]["p"] - fit["p"]) < 1e-9
    want_odds = [s["link_log_odds"] for s in fit["per_pass"]] or [fit["link_log_odds"]]
    assert len(want_odds) == 3, "the sample config's passes give three sets of passes"
    assert max(abs(a - b) for a, b in zip(laws["link_log_odds"], want_odds)) < 1e-9
    # Every record is linked or unlinked, never both; the unlinked are the single machine's.
    for side, col in (("left", "left_id"), ("right", "right_id")):
        unlinked = {r[0] for r in rows(getattr(got, f"unlinked_{side}"), "id")}
        linked = {k[0 if side == "left" else 1] for k in got_links}
        assert not unlinked & linked
        assert len(unlinked) + len(linked) == got.summary[f"{side}_records"] == 3000
        local = set(getattr(want, f"unlinked_{side}").column("id").to_pylist())
        assert unlinked == local
    # The review list: the pairs whose confidence is in the review band.
    r = want.review.to_pydict()
    assert {(a, b) for a, b in rows(got.review, "left_id", "right_id")} == set(
        zip(r["left_id"], r["right_id"])
    )
    assert got.summary["links"] == len(want_links)
    # The separation figures the verdict weighs (besides the forecast): the same to 1e-9.
    sep, local = got.summary["laws"]["separation"], want.summary
    for key, local_key in (
        ("bhattacharyya", "bhattacharyya"),
        ("mean_false_degree", "mean_false_degree"),
        ("margin", "margin"),
        ("nats_needed", "separation_needed_nats"),
        ("nats_supplied", "separation_supplied_nats"),
    ):
        assert abs(sep[key] - local[local_key]) <= 1e-9 * max(1.0, abs(local[local_key])), key
    assert got.summary["laws"]["identified"] and got.summary["laws"]["problems"] == []
    # The forecast (the bootstrap over the whole graph, in one task) and the verdict.
    if one_task_pairs == 0:
        # Nothing may go to one task: no forecast, and the summary says so.
        assert got.summary["forecast"] is None and "forecast" in got.summary["not_on_spark"]
        return
    assert abs(got.summary["forecast"]["error_rate"] - local["forecast_error_rate"]) < 1e-9
    assert got.summary["forecast"]["interval"] == pytest.approx(local["forecast_interval"], abs=1e-9)
    assert got.summary["verdict"] == local["verdict"] == "feasible"
    assert got.summary["verdict_reasons"] == local["verdict_reasons"]


def test_spark_links_with_a_target_precision(session):
    cfg = sample_dict()
    cfg.setdefault("link", {})["target_precision"] = 0.995
    got, want = local_and_spark(session, cfg, 3)
    w = want.links.to_pydict()
    assert set(rows(got.links, "left_id", "right_id")) == set(zip(w["left_id"], w["right_id"]))
    assert abs(got.summary["cutoff"] - want.summary["confidence_cutoff"]) < 1e-6
