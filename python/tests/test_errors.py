"""Errors reach Python as exceptions of a small hierarchy, with the CLI's one-line messages
and, for input errors, the file, row and column as attributes; no panic reaches Python."""

from __future__ import annotations

import pyarrow as pa
import pytest

import dovetail
from conftest import SAMPLE_CONFIG, sample_frames


@pytest.fixture(scope="module")
def small():
    return dovetail.synth(400, seed=7)


def test_hierarchy():
    for cls in (
        dovetail.ConfigError,
        dovetail.InputError,
        dovetail.OutputError,
        dovetail.InfeasibleError,
        dovetail.MemoryBudgetError,
    ):
        assert issubclass(cls, dovetail.DovetailError)
        assert cls.__module__ == "dovetail"
    assert issubclass(dovetail.DovetailError, Exception)


def test_unknown_key_gets_the_cli_suggestion(small, cli, tmp_path):
    cfg = small.config
    cfg["link"]["min_confidenc"] = 0.5
    with pytest.raises(dovetail.ConfigError) as e:
        dovetail.link(small.left, small.right, cfg)
    assert "unknown key `link.min_confidenc`; did you mean `min_confidence`?" in str(e.value)
    # The CLI says the same of the same key in a TOML file.
    toml = tmp_path / "c.toml"
    toml.write_text(
        SAMPLE_CONFIG.read_text()
        .replace("../sample-tables", str(SAMPLE_CONFIG.parent.parent / "sample-tables"))
        .replace("min_confidence", "min_confidenc")
    )
    done = cli("link", "--config", toml, "--out", tmp_path / "o", check=False)
    assert done.returncode != 0
    assert "did you mean `min_confidence`?" in done.stderr
    with pytest.raises(dovetail.ConfigError, match="did you mean `min_confidence`"):
        dovetail.link(None, None, toml)


def test_config_dict_none_and_wrong_types(small):
    cfg = small.config
    cfg["link"]["min_confidence"] = None
    with pytest.raises(dovetail.ConfigError, match="link.min_confidence"):
        dovetail.link(small.left, small.right, cfg)
    with pytest.raises(TypeError, match="config"):
        dovetail.link(small.left, small.right, 42)
    with pytest.raises(TypeError, match="left: give a pandas or polars DataFrame"):
        dovetail.link(42, small.right, small.config)
    with pytest.raises(ValueError, match="threads"):
        dovetail.link(small.left, small.right, small.config, threads=0)


def test_missing_column_names_the_frame(small):
    with pytest.raises(dovetail.InputError) as e:
        dovetail.link(small.left, small.right.drop_columns(["dob"]), small.config)
    assert e.value.file == "<right table>"
    assert "column `dob` not found" in str(e.value)


def test_duplicate_id_in_a_frame_names_row_and_column(small):
    left = small.left.to_pandas()
    left.loc[5, "rec_id"] = left.loc[4, "rec_id"]
    with pytest.raises(dovetail.InputError) as e:
        dovetail.link(left, small.right, small.config)
    err = e.value
    assert (err.file, err.row, err.place, err.column) == ("<left table>", 6, "row", "rec_id")
    assert str(err) == "<left table>: row 6: column rec_id: duplicate id (first seen on row 5)"


def test_bad_csv_file_names_file_line_and_column(tmp_path):
    left, right = sample_frames()
    bad = tmp_path / "left.csv"
    left.head(50).to_csv(bad, index=False)
    lines = bad.read_text().splitlines()
    lines[10] = lines[10] + ",extra"
    bad.write_text("\n".join(lines) + "\n")
    with pytest.raises(dovetail.InputError) as e:
        dovetail.link(bad, right, SAMPLE_CONFIG)
    assert e.value.file == str(bad)
    assert e.value.row == 11 and e.value.place == "line"
    assert "\n" not in str(e.value)


def test_missing_file(small, tmp_path):
    with pytest.raises(dovetail.InputError) as e:
        dovetail.link(tmp_path / "nowhere.csv", small.right, small.config)
    assert e.value.file == str(tmp_path / "nowhere.csv")


def test_nested_column_is_an_input_error_not_a_panic(small):
    left = small.left.append_column("nested", pa.array([[1]] * small.left.num_rows))
    cfg = small.config
    cfg["field"].append({"name": "nested", "method": "exact", "right": "town"})
    with pytest.raises(dovetail.InputError) as e:
        dovetail.link(left, small.right, cfg)
    assert e.value.column == "nested"


def test_empty_frame(small):
    with pytest.raises(dovetail.InputError, match="no records"):
        dovetail.link(small.left.slice(0, 0), small.right, small.config)


def test_memory_budget(small):
    with pytest.raises(dovetail.MemoryBudgetError, match="pass 1"):
        dovetail.link(small.left, small.right, small.config, memory_budget="1K")
    with pytest.raises(dovetail.ConfigError, match="is not a size"):
        dovetail.link(small.left, small.right, small.config, memory_budget="lots")


def test_infeasible_with_stop_if_infeasible(small):
    cfg = small.config
    cfg["field"] = [f for f in cfg["field"] if f["name"] == "sex"]
    cfg["block"] = [{"keys": ["sex"]}]
    cfg["link"]["stop_if_infeasible"] = True
    with pytest.raises(dovetail.InfeasibleError) as e:
        dovetail.link(small.left, small.right, cfg, memory_budget="none")
    # What the CLI writes when it stops (exit 3): summary.json and report.html, saying why.
    stopped = e.value.result
    assert sorted(stopped.files) == ["report.html", "summary.json"]
    assert stopped.summary["stopped_infeasible"] is True
    assert stopped.verdict == "infeasible"


def test_output_error_leaves_nothing_behind(small, tmp_path):
    result = dovetail.link(small.left, small.right, small.config)
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    with pytest.raises(dovetail.OutputError):
        result.write(blocker)
    assert blocker.read_text() == "not a folder"
