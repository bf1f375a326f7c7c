"""The package's API: results as Arrow tables and dicts, every record in exactly one
output, the other commands against the CLI, progress, the GIL released while running."""

from __future__ import annotations

import json
import threading
import time

import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pytest

import dovetail
from conftest import SAMPLE_CONFIG, answer, folder_answer, sample_frames


@pytest.fixture(scope="module")
def linked():
    left, right = sample_frames()
    return left, right, dovetail.link(left, right, SAMPLE_CONFIG)


def test_every_record_in_exactly_one_output(linked):
    left, right, result = linked
    links = result.links.to_pandas()
    left_out = list(links["left_id"]) + list(result.unlinked_left.column("id").to_pylist())
    right_out = list(links["right_id"]) + list(
        result.unlinked_right.column("id").to_pylist()
    )
    assert sorted(left_out) == sorted(left["rec_id"])
    assert sorted(right_out) == sorted(right["rec_id"])
    assert links["left_id"].is_unique and links["right_id"].is_unique
    assert ((links["confidence"] >= 0) & (links["confidence"] <= 1)).all()


def test_summary_is_summary_json(linked):
    _, _, result = linked
    assert result.summary == json.loads(result.file("summary.json"))
    assert result.summary["links"] == result.links.num_rows
    assert result.verdict == result.summary["verdict"]
    assert f"{result.links.num_rows} links" in repr(result)
    assert "<html" in result.report_html[:200].lower()


def test_tables_equal_the_csv_files(linked):
    # pyarrow's own CSV reader on the bytes the CLI would write.
    _, _, result = linked
    for name, table in [("links.csv", result.links), ("review.csv", result.review)]:
        theirs = pacsv.read_csv(pa.BufferReader(result.file(name))).to_pandas()
        ours = table.to_pandas()
        assert list(ours.columns) == list(theirs.columns)
        assert len(ours) == len(theirs)
        for c in ("left_id", "right_id"):
            assert list(ours[c]) == list(theirs[c].astype(str))
        assert (ours["weight"] - theirs["weight"]).abs().max() == 0


def test_assess_as_the_cli(cli, tmp_path):
    out = tmp_path / "assess"
    done = cli("assess", "--config", SAMPLE_CONFIG, "--out", out)
    left, right = sample_frames()
    result = dovetail.assess(left, right, SAMPLE_CONFIG)
    assert isinstance(result, dovetail.Assessment)
    assert answer(result.summary) == folder_answer(out)
    assert result.text.strip() in done.stdout
    assert result.verdict in ("feasible", "borderline", "infeasible")


def test_tune_as_the_cli(cli, tmp_path):
    out = tmp_path / "tune"
    cli("tune", "--config", SAMPLE_CONFIG, "--out", out, "--sample", 400, "--quiet")
    result = dovetail.tune(None, None, SAMPLE_CONFIG, sample=400)
    theirs = pd.read_csv(out / "tune.csv")
    ours = result.table.to_pandas()
    assert list(ours.columns) == list(theirs.columns)
    timing = ["seconds", "memory_bytes"]  # measured, so they differ from run to run
    pd.testing.assert_frame_equal(
        ours.drop(columns=timing), theirs.drop(columns=timing), check_dtype=False
    )


def test_match_finds_the_optimum_and_agrees_with_the_cli(cli, tmp_path):
    # a-x 5, a-y 4, b-x 4, b-y 1: the optimum is a-y + b-x = 8, where taking the best pair
    # first (a-x) would give 5 + 1 = 6 (a hand-checked instance).
    pairs = pd.DataFrame(
        {
            "left_id": ["a", "a", "b", "b", "c"],
            "right_id": ["x", "y", "x", "y", "z"],
            "weight": [5, 4, 4, 1, -2],
        }
    )
    result = dovetail.match(pairs)
    assert result.total_weight == 8
    assert result.links.to_pylist() == [
        {"left_id": "a", "right_id": "y", "weight": 4.0},
        {"left_id": "b", "right_id": "x", "weight": 4.0},
    ]
    assert dovetail.match(pairs, min_weight=4).total_weight == 5
    path = tmp_path / "pairs.csv"
    pairs.to_csv(path, index=False)
    out = tmp_path / "m"
    cli("match", "--pairs", path, "--out", out)
    assert result.file("links.csv") == (out / "links.csv").read_bytes()
    assert dovetail.match(path).file("links.csv") == result.file("links.csv")


def test_synth_is_the_cli_synth(cli, tmp_path):
    s = dovetail.synth(800, seed=4, relatives=0.3, blank=["dob=0.2"])
    out = tmp_path / "cli"
    cli("synth", "--rows", 800, "--seed", 4, "--relatives", 0.3, "--blank", "dob=0.2", "--out", out)
    mine = tmp_path / "py"
    s.write(mine)
    for name in ("left.csv", "right.csv", "truth.csv", "config.toml"):
        assert (mine / name).read_bytes() == (out / name).read_bytes(), name
    assert s.left.num_rows == 800
    assert s.truth.column_names == ["left_id", "right_id"]
    assert s.right.column("dob").null_count > 0
    with pytest.raises(dovetail.ConfigError):
        dovetail.synth(100, overlap=1.5)


def test_progress_callback_hears_every_stage():
    heard = []
    dovetail.link(None, None, SAMPLE_CONFIG, progress=lambda kind, text: heard.append((kind, text)))
    stages = [t for k, t in heard if k == "stage"]
    assert stages[:4] == ["reading", "blocking", "comparing", "fitting"]
    assert "confidence" in stages
    assert any(k == "note" and "candidate pairs" in t for k, t in heard)


def test_the_gil_is_released_while_the_stages_run():
    s = dovetail.synth(50000, seed=2)
    ticks = 0
    done = threading.Event()

    def count():
        nonlocal ticks
        while not done.is_set():
            ticks += 1
            time.sleep(0.001)

    t = threading.Thread(target=count)
    t.start()
    start = time.perf_counter()
    dovetail.link(s.left, s.right, s.config, threads=1)
    elapsed = time.perf_counter() - start
    done.set()
    t.join()
    # A thread that sleeps 1 ms per tick gets hundreds of ticks a second only if the run
    # does not hold the GIL (it would get none until the run ended otherwise).
    assert elapsed > 0.2
    assert ticks > 100 * elapsed, (ticks, elapsed)
