"""The same tables and config give the same links, confidences and summary from the
command line on CSV, from the command line on Parquet and from Python on data frames
(the summary compared without the manifest's input descriptions)."""

from __future__ import annotations

import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import dovetail
from conftest import (
    LINK_TABLES,
    PARQUET,
    SAMPLE_CONFIG,
    answer,
    folder_answer,
    sample_frames,
)


def assert_same_as(cli_out, result: dovetail.Linkage) -> None:
    for name in LINK_TABLES:
        assert result.file(name) == (cli_out / name).read_bytes(), f"{name} differs"
    assert answer(result.summary) == folder_answer(cli_out)


def test_paths_in_the_config(cli_sample):
    assert_same_as(cli_sample, dovetail.link(None, None, SAMPLE_CONFIG))


def test_pandas_frames(cli_sample):
    left, right = sample_frames()
    assert_same_as(cli_sample, dovetail.link(left, right, SAMPLE_CONFIG))


def test_polars_frames(cli_sample):
    left, right = sample_frames()
    result = dovetail.link(pl.from_pandas(left), pl.from_pandas(right), SAMPLE_CONFIG)
    assert_same_as(cli_sample, result)


def test_arrow_tables_and_batch_readers(cli_sample):
    left, right = (pa.Table.from_pandas(f, preserve_index=False) for f in sample_frames())
    # Several batches on one side, a stream reader on the other.
    left = pa.Table.from_batches(left.to_batches(max_chunksize=700))
    right = pa.RecordBatchReader.from_batches(right.schema, right.to_batches(max_chunksize=999))
    assert_same_as(cli_sample, dovetail.link(left, right, SAMPLE_CONFIG))


def test_parquet_files_from_python(cli_sample):
    result = dovetail.link(
        PARQUET / "sample_left.parquet", PARQUET / "sample_right.parquet", SAMPLE_CONFIG
    )
    assert_same_as(cli_sample, result)


def test_cli_on_parquet(cli, cli_sample, tmp_path):
    text = SAMPLE_CONFIG.read_text()
    text = text.replace("../sample-tables/left.csv", str(PARQUET / "sample_left.parquet"))
    text = text.replace("../sample-tables/right.csv", str(PARQUET / "sample_right.parquet"))
    cfg = tmp_path / "pq.toml"
    cfg.write_text(text)
    out = tmp_path / "out"
    cli("link", "--config", cfg, "--out", out, "--quiet")
    for name in LINK_TABLES:
        assert (out / name).read_bytes() == (cli_sample / name).read_bytes(), name
    assert folder_answer(out) == folder_answer(cli_sample)
    # And the third pair: Python on frames against the CLI on Parquet.
    assert_same_as(out, dovetail.link(*sample_frames(), SAMPLE_CONFIG))


def test_write_gives_the_cli_files(cli_sample, tmp_path):
    left, right = sample_frames()
    written = dovetail.link(left, right, SAMPLE_CONFIG).write(tmp_path / "py")
    assert all(p.parent == tmp_path / "py" and p.is_file() for p in written)
    listing = lambda d: sorted(p.name for p in d.iterdir() if not p.name.startswith("."))  # noqa: E731
    assert listing(tmp_path / "py") == listing(cli_sample)
    assert "outputs.json" in listing(cli_sample)
    # report.html and outputs.json describe the inputs too (compared through summary.json).
    for name in LINK_TABLES:
        assert (tmp_path / "py" / name).read_bytes() == (cli_sample / name).read_bytes()
    assert folder_answer(tmp_path / "py") == folder_answer(cli_sample)


def test_write_parquet_as_the_cli(cli, tmp_path):
    cli_out = tmp_path / "cli"
    cli("link", "--config", SAMPLE_CONFIG, "--out", cli_out, "--quiet", "--parquet")
    py_out = tmp_path / "py"
    dovetail.link(None, None, SAMPLE_CONFIG).write(py_out, parquet=True)
    for name in LINK_TABLES:
        name = name.replace(".csv", ".parquet")
        assert pq.read_table(py_out / name).equals(pq.read_table(cli_out / name)), name


def test_synth_config_dict_and_tables_match_the_cli_on_its_files(cli, tmp_path):
    # synth's tables as Arrow (blank cells as nulls) and its config as a dict, against the
    # CLI on the files `dovetail synth` writes (blank cells as empty strings).
    s = dovetail.synth(1500, seed=11, noise=0.6)
    folder = tmp_path / "synth"
    cli("synth", "--rows", 1500, "--seed", 11, "--noise", 0.6, "--out", folder)
    out = tmp_path / "out"
    cli("link", "--config", folder / "config.toml", "--out", out, "--quiet")
    result = dovetail.link(s.left, s.right, s.config)
    for name in LINK_TABLES:
        assert result.file(name) == (out / name).read_bytes(), name
    assert answer(result.summary) == folder_answer(out)


@pytest.mark.parametrize("threads", [1, 2])
def test_thread_count_does_not_change_the_answer(cli_sample, threads):
    left, right = sample_frames()
    assert_same_as(cli_sample, dovetail.link(left, right, SAMPLE_CONFIG, threads=threads))

