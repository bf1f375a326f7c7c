"""Writes the Parquet fixtures of tests/it/parquet.rs with pyarrow, a Parquet writer
independent of the Rust one the tool uses, so reading them tests the tool against files made
elsewhere.

Run from the repository root: python3 tests/reference/parquet_fixtures.py
Writes tests/reference/parquet/*.parquet and types.json (what each typed value must read as).
"""
import datetime as dt
import decimal
import json
import pathlib

import pyarrow as pa
import pyarrow.csv as pc
import pyarrow.parquet as pq

OUT = pathlib.Path("tests/reference/parquet")
OUT.mkdir(parents=True, exist_ok=True)

# 1. The bundled sample tables, every column as text (as a CSV reader without type guessing
#    gives them), Snappy for the left table and zstd with dictionary pages for the right.
for side, codec in [("left", "snappy"), ("right", "zstd")]:
    table = pc.read_csv(
        f"sample-tables/{side}.csv",
        convert_options=pc.ConvertOptions(
            column_types={},
            strings_can_be_null=False,
            auto_dict_encode=False,
        ),
        read_options=pc.ReadOptions(autogenerate_column_names=False),
        parse_options=pc.ParseOptions(),
    )
    # pyarrow guesses types; force text so the values are exactly the CSV's.
    table = table.cast(pa.schema([pa.field(f.name, pa.string()) for f in table.schema]))
    pq.write_table(table, OUT / f"sample_{side}.parquet", compression=codec,
                   row_group_size=700)

# 2. One table of typed columns and what each value must read as (the CSV text of it).
rows = [
    # id (int64), name (dictionary), born (date32), seen (timestamp[ns]), score (float64),
    # small (int8 with a null), amount (decimal128(9,2)), flag (bool), note (large_string)
    (1, "ann", dt.date(1970, 1, 1), dt.datetime(2001, 3, 4), 1.0, 5, decimal.Decimal("12.30"), True, " padded "),
    (2, "bob", dt.date(1999, 12, 31), dt.datetime(2001, 3, 4, 10, 30, 0), 2.5, None, decimal.Decimal("-0.05"), False, None),
    (30, None, None, None, float("nan"), -7, None, None, "x"),
]
cols = list(zip(*rows))
table = pa.table({
    "id": pa.array(cols[0], pa.int64()),
    "name": pa.array(cols[1], pa.string()).dictionary_encode(),
    "born": pa.array(cols[2], pa.date32()),
    "seen": pa.array(cols[3], pa.timestamp("ns")),
    "score": pa.array(cols[4], pa.float64()),
    "small": pa.array(cols[5], pa.int8()),
    "amount": pa.array(cols[6], pa.decimal128(9, 2)),
    "flag": pa.array(cols[7], pa.bool_()),
    "note": pa.array(cols[8], pa.large_string()),
})
pq.write_table(table, OUT / "types.parquet")
# What the tool must read: the text a CSV file would hold (floats in shortest form, dates ISO,
# midnight timestamps as dates, nulls and NaN as missing, text trimmed). Written by hand from
# the values above.
expected = {
    "id": ["1", "2", "30"],
    "name": ["ann", "bob", ""],
    "born": ["1970-01-01", "1999-12-31", ""],
    "seen": ["2001-03-04", "2001-03-04 10:30:00", ""],
    "score": ["1", "2.5", ""],
    "small": ["5", "", "-7"],
    "amount": ["12.30", "-0.05", ""],
    "flag": ["true", "false", ""],
    "note": ["padded", "", "x"],
}
(OUT / "types.json").write_text(json.dumps(expected, indent=1) + "\n")

# 3. A table whose ids repeat (row 3 repeats row 1), and one with a column of lists.
pq.write_table(pa.table({"id": ["a", "b", "a"], "v": ["1", "2", "3"]}), OUT / "duplicate_ids.parquet")
pq.write_table(pa.table({"id": ["a", "b"], "v": [[1, 2], [3]]}), OUT / "list_column.parquet")
print("wrote", sorted(p.name for p in OUT.iterdir()))
