"""Column types of data frames: each typed table must give byte for byte the outputs of the
same table as text (the CLI reads every cell as text; a typed cell's text is the one a CSV
writer would give it: integers in decimal, dates as YYYY-MM-DD, nulls as blank cells)."""

from __future__ import annotations

import datetime

import pandas as pd
import polars as pl
import pyarrow as pa
import pytest

import dovetail
from conftest import LINK_TABLES, SAMPLE_CONFIG, answer, sample_frames


@pytest.fixture(scope="module")
def frames():
    left, right = sample_frames()
    # Integer-like ids as text, so that the typed runs below have a text twin.
    left["rec_id"] = left["rec_id"].str[1:].astype(int).astype(str)
    right["rec_id"] = right["rec_id"].str[1:].astype(int).astype(str)
    # Year-only birth dates (a few in the sample) have no date type: blank them on both
    # twins, so that every date is a full YYYY-MM-DD or missing.
    for f, c in ((left, "birth_date"), (right, "dob")):
        f[c] = f[c].where(f[c].str.fullmatch(r"\d{4}-\d{2}-\d{2}"), "")
    return left, right


@pytest.fixture(scope="module")
def as_text(frames):
    return dovetail.link(*frames, SAMPLE_CONFIG)


def assert_same(result, as_text):
    for name in LINK_TABLES:
        assert result.file(name) == as_text.file(name), f"{name} differs"
    assert answer(result.summary) == answer(as_text.summary)


def test_integer_ids(frames, as_text):
    left, right = (f.copy() for f in frames)
    left["rec_id"] = left["rec_id"].astype("int64")
    right["rec_id"] = right["rec_id"].astype("int32")
    result = dovetail.link(left, right, SAMPLE_CONFIG)
    assert_same(result, as_text)
    assert result.links.schema.field("left_id").type == pa.string()


def test_nullable_strings(frames, as_text):
    left, right = (f.copy() for f in frames)
    for f in (left, right):
        for c in f.columns:
            f[c] = f[c].astype("string").mask(f[c] == "", pd.NA)
    assert right["phone"].isna().any()
    assert_same(dovetail.link(left, right, SAMPLE_CONFIG), as_text)


def test_categorical_columns(frames, as_text):
    left, right = (f.copy() for f in frames)
    for f in (left, right):
        for c in ("sex", "town", "postcode"):
            f[c] = f[c].astype("category")
    assert_same(dovetail.link(left, right, SAMPLE_CONFIG), as_text)


def test_dates_as_date_types(frames, as_text):
    left, right = (f.copy() for f in frames)
    left["birth_date"] = pd.to_datetime(left["birth_date"].replace("", None))  # datetime64
    table = pa.Table.from_pandas(right, preserve_index=False)
    dob = pa.array(
        [datetime.date.fromisoformat(d) if d else None for d in right["dob"]], pa.date32()
    )
    table = table.set_column(table.schema.get_field_index("dob"), "dob", dob)
    assert_same(dovetail.link(left, table, SAMPLE_CONFIG), as_text)


def test_polars_types(frames, as_text):
    left, right = (pl.from_pandas(f) for f in frames)
    left = left.with_columns(
        pl.col("rec_id").cast(pl.Int64),
        pl.col("town").cast(pl.Categorical),
        pl.when(pl.col("birth_date") == "")
        .then(None)
        .otherwise(pl.col("birth_date"))
        .str.to_date()
        .alias("birth_date"),
    )
    right = right.with_columns(
        pl.col("rec_id").cast(pl.UInt32),
        pl.when(pl.col("phone") == "").then(None).otherwise(pl.col("phone")).alias("phone"),
    )
    assert_same(dovetail.link(left, right, SAMPLE_CONFIG), as_text)


def test_a_pandas_index_is_not_a_column(frames, as_text):
    left, right = (f.copy() for f in frames)
    left.index = left.index * 7 + 3
    right = right.set_index("rec_id", drop=False)
    right.index.name = "rec_id_index"
    assert_same(dovetail.link(left, right, SAMPLE_CONFIG), as_text)


def test_results_convert_to_pandas_and_polars(as_text):
    links = as_text.links
    df = links.to_pandas()
    assert list(df.columns) == links.column_names
    assert df["confidence"].dtype == "float64"
    assert pl.from_arrow(links).height == links.num_rows
    review = as_text.review
    assert {"left_id", "right_id"} <= set(review.column_names)
