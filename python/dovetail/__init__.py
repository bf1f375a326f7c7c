"""dovetail: one-to-one record linkage of two tables of people.

Links two extracts that share no reliable identifier (a register and a clinic list, two
customer bases) so that each person is linked at most once on each side, gives every link a
confidence, and says first whether the fields can support one-to-one linkage at all.

The functions here run the same stages as the ``dovetail`` command line, in this process:

* :func:`link` - the whole job: links, unlinked records, a clerical review list, a summary
  and a self-contained HTML report;
* :func:`assess` - the feasibility verdict and forecast only, without links;
* :func:`tune` - blocking schemes compared on a sample;
* :func:`match` - the maximum-weight one-to-one set of pairs you scored yourself;
* :func:`synth` - invented demo tables with their truth and a ready config.

Tables may be pandas or polars DataFrames, pyarrow Tables (anything with
``__arrow_c_stream__``), or paths to CSV or Parquet files. Results come back as pyarrow
Tables (``.to_pandas()``, ``polars.from_arrow``) and plain dicts.

Links are probabilistic. Review them before acting on any person, and follow local
data-protection law, approvals and disclosure rules for the data you link.
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path
from typing import Any, Callable, Dict, List, Mapping, Optional, Union

import pyarrow as pa

from . import _dovetail
from ._dovetail import (
    ConfigError,
    DovetailError,
    InfeasibleError,
    InputError,
    MemoryBudgetError,
    OutputError,
)

__version__ = _dovetail.__version__

__all__ = [
    "link",
    "assess",
    "tune",
    "match",
    "synth",
    "audit",
    "Linkage",
    "Assessment",
    "Tuning",
    "Matching",
    "Synthetic",
    "DovetailError",
    "ConfigError",
    "InputError",
    "OutputError",
    "InfeasibleError",
    "MemoryBudgetError",
]

for _cls in (
    DovetailError,
    ConfigError,
    InputError,
    OutputError,
    InfeasibleError,
    MemoryBudgetError,
):
    _cls.__module__ = "dovetail"

TableLike = Any
"""A pandas or polars DataFrame, a pyarrow Table or RecordBatchReader, any object with
``__arrow_c_stream__``, or a path (``str`` or ``os.PathLike``) to a CSV or Parquet file."""

ConfigLike = Union[Mapping[str, Any], str, "os.PathLike[str]"]
Progress = Union[None, bool, Callable[[str, str], Any]]


def _table_arg(x: Any, what: str) -> Any:
    """What the native side takes for a table: a path string or an Arrow stream object."""
    if x is None:
        return None
    if isinstance(x, (str, os.PathLike)):
        return os.fspath(x)
    pd = sys.modules.get("pandas")
    if pd is not None and isinstance(x, pd.DataFrame):
        # The index is the frame's, not the table's: it is never a column of the table.
        return pa.Table.from_pandas(x, preserve_index=False)
    if hasattr(x, "__arrow_c_stream__"):
        return x
    if hasattr(x, "to_arrow"):  # polars before the stream protocol
        return x.to_arrow()
    raise TypeError(
        f"{what}: give a pandas or polars DataFrame, a pyarrow Table or a file path "
        f"(CSV or Parquet), not {type(x).__name__}"
    )


def _config_args(config: ConfigLike) -> "tuple[Optional[str], Optional[str]]":
    """(config_path, config_json) for the native side."""
    if isinstance(config, (str, os.PathLike)):
        return os.fspath(config), None
    if isinstance(config, Mapping):
        try:
            return None, json.dumps(config, default=_json_default)
        except (TypeError, ValueError) as e:
            raise ConfigError(f"the config dict cannot be read: {e}") from None
    raise TypeError(
        f"config: give a dict shaped like the TOML config or a path to a TOML file, "
        f"not {type(config).__name__}"
    )


def _json_default(x: Any) -> Any:
    if isinstance(x, os.PathLike):
        return os.fspath(x)
    if isinstance(x, (tuple, set, frozenset)):
        return list(x)
    raise TypeError(f"{type(x).__name__} is not a config value")


def _progress_arg(progress: Progress) -> Optional[Callable[[str, str], Any]]:
    if progress is None or progress is False:
        return None
    if progress is True:
        return _print_progress
    if callable(progress):
        return progress
    raise TypeError("progress: give True, None or a function taking (kind, text)")


def _print_progress(kind: str, text: str) -> None:
    print(f"{kind}: {text}" if kind != "stage" else f"{text}...", file=sys.stderr)


def _arrow(stream: Any) -> pa.Table:
    return pa.RecordBatchReader.from_stream(stream).read_all()


class _Outputs:
    """What a command produced: its files in memory, its warnings and its printed text."""

    def __init__(self, native: Any) -> None:
        self._native = native
        self._tables: Dict[str, pa.Table] = {}

    @property
    def files(self) -> List[str]:
        """The names of the files :meth:`write` writes, in the command's order."""
        return list(self._native.names())

    def file(self, name: str) -> bytes:
        """The bytes of one output file, exactly as the command line writes it."""
        return self._native.file(name)

    @property
    def warnings(self) -> List[str]:
        """The run's warnings (the command line prints them on stderr)."""
        return list(self._native.warnings)

    @property
    def text(self) -> str:
        """What the command line prints on stdout for this command."""
        return self._native.text

    def _table(self, name: str) -> pa.Table:
        if name not in self._tables:
            self._tables[name] = _arrow(self._native.table(name))
        return self._tables[name]

    def write(self, folder: Union[str, "os.PathLike[str]"], *, parquet: bool = False) -> List[Path]:
        """Writes the command line's files into ``folder`` (created if missing), all or none,
        with the folder's record of what was written (``outputs.json``). With ``parquet``,
        the four link tables are written as Parquet as well. Returns the paths written."""
        return [Path(p) for p in self._native.write(os.fspath(folder), parquet)]


class Assessment(_Outputs):
    """The result of :func:`assess`: can these fields support one-to-one linkage?"""

    @property
    def summary(self) -> Dict[str, Any]:
        """summary.json as a dict: the verdict, the margin, the forecast mismatch rate."""
        return json.loads(self.file("summary.json"))

    @property
    def verdict(self) -> str:
        """"feasible", "borderline" or "infeasible" (see the report for what each means)."""
        return str(self.summary["verdict"])

    @property
    def report_html(self) -> str:
        """The self-contained HTML report (no network needed to view it)."""
        return self.file("report.html").decode("utf-8")

    def __repr__(self) -> str:
        return f"<dovetail.{type(self).__name__}: verdict {self.verdict}>"


class Linkage(Assessment):
    """The result of :func:`link`.

    Every record of each table is in exactly one of ``links`` (as its left or right side)
    and ``unlinked_left`` / ``unlinked_right``. ``review`` lists the pairs a clerk should
    look at. Links are probabilistic: review before acting on any person.
    """

    @property
    def links(self) -> pa.Table:
        """One row per link: the two ids, the weight, the one-to-one confidence and the
        agreement level of every field."""
        return self._table("links.csv")

    @property
    def unlinked_left(self) -> pa.Table:
        """Left records without a link, with the reason and the best candidate if any."""
        return self._table("unlinked_left.csv")

    @property
    def unlinked_right(self) -> pa.Table:
        """Right records without a link, with the reason and the best candidate if any."""
        return self._table("unlinked_right.csv")

    @property
    def review(self) -> pa.Table:
        """The pairs for clerical review, most uncertain first."""
        return self._table("review.csv")

    def __repr__(self) -> str:
        return f"<dovetail.Linkage: {self.links.num_rows} links, verdict {self.verdict}>"


class Tuning(_Outputs):
    """The result of :func:`tune`: one row per blocking scheme (tune.csv)."""

    @property
    def table(self) -> pa.Table:
        """tune.csv: pairs, completeness, margin, forecast error, time and memory per scheme."""
        return self._table("tune.csv")

    def __repr__(self) -> str:
        return f"<dovetail.Tuning: {self.table.num_rows} schemes>"


class Matching(_Outputs):
    """The result of :func:`match`."""

    @property
    def links(self) -> pa.Table:
        """The chosen pairs: left_id, right_id, weight."""
        return self._table("links.csv")

    @property
    def total_weight(self) -> float:
        """The sum of the chosen pairs' weights (the maximum possible)."""
        for line in self.text.splitlines():
            if line.startswith("total weight:"):
                return float(line.split(":", 1)[1])
        raise DovetailError("internal error: no total weight in the matching's text")

    def __repr__(self) -> str:
        return f"<dovetail.Matching: {self.links.num_rows} links, total weight {self.total_weight:.6g}>"


class Synthetic:
    """The result of :func:`synth`: two invented tables, the true pairs and a config."""

    def __init__(self, native: Any, config_json: str) -> None:
        self._native = native
        self._config = config_json
        self._tables: Dict[str, pa.Table] = {}

    def _text_table(self, name: str) -> pa.Table:
        if name not in self._tables:
            self._tables[name] = _arrow(self._native.table(name))
        return self._tables[name]

    @property
    def left(self) -> pa.Table:
        """The left table: every column as text, blank cells as nulls."""
        return self._text_table("left.csv")

    @property
    def right(self) -> pa.Table:
        """The right table: every column as text, blank cells as nulls."""
        return self._text_table("right.csv")

    @property
    def truth(self) -> pa.Table:
        """The true pairs: left_id, right_id."""
        return self._text_table("truth.csv")

    @property
    def config(self) -> Dict[str, Any]:
        """The config ``dovetail synth`` writes, as a dict; its tables name left.csv and
        right.csv, so pass frames to :func:`link` or write the files first."""
        return json.loads(self._config)

    @property
    def files(self) -> List[str]:
        return list(self._native.names())

    def write(self, folder: Union[str, "os.PathLike[str]"]) -> List[Path]:
        """Writes left.csv, right.csv, truth.csv and config.toml as ``dovetail synth`` does."""
        return [Path(p) for p in _dovetail.write_plain(self._native, os.fspath(folder))]

    def __repr__(self) -> str:
        return f"<dovetail.Synthetic: {self._native.text.strip()}>"


def _run_args(
    left: Optional[TableLike],
    right: Optional[TableLike],
    config: ConfigLike,
    threads: Optional[int],
    progress: Progress,
    memory_budget: Optional[str],
) -> tuple:
    path, text = _config_args(config)
    if threads is not None and (not isinstance(threads, int) or threads < 1):
        raise ValueError("threads: give a whole number of at least 1, or None for all cores")
    return (
        _table_arg(left, "left"),
        _table_arg(right, "right"),
        path,
        text,
        threads,
        _progress_arg(progress),
        None if memory_budget is None else str(memory_budget),
    )


def link(
    left: Optional[TableLike],
    right: Optional[TableLike],
    config: ConfigLike,
    *,
    threads: Optional[int] = None,
    progress: Progress = None,
    memory_budget: Optional[str] = None,
) -> Linkage:
    """Links ``left`` to ``right`` one-to-one, as ``dovetail link`` does.

    Args:
        left, right: the two tables (DataFrame, pyarrow Table or CSV/Parquet path); None
            takes the ``path`` of the config's ``left`` / ``right`` table.
        config: a dict with the same shape as the TOML config (its ``left`` and ``right``
            tables then need only the ``id`` column), or a path to a TOML file.
        threads: worker threads (default: all cores). The answer does not depend on it.
        progress: True prints the stages on stderr; a function gets ``(kind, text)`` with
            kind "stage" or "note"; None is quiet.
        memory_budget: e.g. "8G"; the run stops before blocking when its estimated peak
            is over it (default: a safe share of the machine's memory).

    Raises:
        ConfigError, InputError (with ``file``, ``row``, ``column``), MemoryBudgetError;
        InfeasibleError when the verdict is infeasible and the config sets
        ``stop_if_infeasible`` (its ``result`` holds summary.json and report.html, which
        say why, as the CLI writes them); KeyboardInterrupt when stopped with Ctrl-C.
    """
    args = _run_args(left, right, config, threads, progress, memory_budget)
    native = _dovetail.run_config("link", *args, 0, 0)
    if native.stopped:
        e = InfeasibleError(
            "the linkage is infeasible; no links were made (stop_if_infeasible is set); "
            "the exception's `result` (summary, report_html, write) says why"
        )
        e.result = Assessment(native)
        e.file = e.row = e.place = e.column = None
        raise e
    return Linkage(native)


def assess(
    left: Optional[TableLike],
    right: Optional[TableLike],
    config: ConfigLike,
    *,
    threads: Optional[int] = None,
    progress: Progress = None,
    memory_budget: Optional[str] = None,
) -> Assessment:
    """Says whether the fields can support one-to-one linkage, without making links:
    the verdict, the margin and the forecast mismatch rate (as ``dovetail assess``).
    Arguments as for :func:`link`."""
    args = _run_args(left, right, config, threads, progress, memory_budget)
    return Assessment(_dovetail.run_config("assess", *args, 0, 0))


def tune(
    left: Optional[TableLike],
    right: Optional[TableLike],
    config: ConfigLike,
    *,
    sample: int = 2000,
    replicates: int = 5,
    threads: Optional[int] = None,
    progress: Progress = None,
    memory_budget: Optional[str] = None,
) -> Tuning:
    """Compares blocking schemes (the config's ``[[scheme]]`` tables, or each pass alone and
    all together) on a sample of ``sample`` left records, as ``dovetail tune``."""
    if sample < 1 or replicates < 1:
        raise ValueError("sample and replicates must be at least 1")
    args = _run_args(left, right, config, threads, progress, memory_budget)
    return Tuning(_dovetail.run_config("tune", *args, int(sample), int(replicates)))


def match(
    pairs: TableLike,
    *,
    min_weight: float = 0.0,
    threads: Optional[int] = None,
) -> Matching:
    """The maximum-weight one-to-one set of scored pairs (columns ``left_id``,
    ``right_id``, ``weight``), as ``dovetail match``; pairs of weight at most
    ``min_weight`` are never chosen."""
    if threads is not None and (not isinstance(threads, int) or threads < 1):
        raise ValueError("threads: give a whole number of at least 1, or None for all cores")
    return Matching(_dovetail.match_pairs(_table_arg(pairs, "pairs"), float(min_weight), threads))


def synth(
    rows: int,
    *,
    overlap: float = 0.7,
    noise: float = 0.3,
    seed: int = 1,
    twins: Optional[float] = None,
    movers: Optional[float] = None,
    household_moves: float = 0.0,
    relatives: float = 0.0,
    duplicates: float = 0.0,
    blank: Optional[List[str]] = None,
) -> Synthetic:
    """Invents two tables of people (no real person) with known true pairs, as
    ``dovetail synth``: ``rows`` left records, ``overlap`` of them also on the right, typos
    and changes at ``noise`` (0 clean to 1 very noisy); the scenario options add movers,
    relatives and duplicates, and ``blank`` lists ``"COLUMN=RATE"`` items, e.g.
    ``["dob=0.5"]``. The same seed gives the same tables."""
    native, config_json = _dovetail.synth(
        int(rows),
        float(overlap),
        float(noise),
        int(seed),
        None if twins is None else float(twins),
        None if movers is None else float(movers),
        float(household_moves),
        float(relatives),
        float(duplicates),
        list(blank or []),
    )
    return Synthetic(native, config_json)


def audit(folder: Union[str, "os.PathLike[str]"]) -> Dict[str, Any]:
    """The precision of a finished run's links measured from the clerks' decisions on its
    audit sample, as ``dovetail audit``: the run needs ``audit_sample`` under ``[link]``, and
    ``decisions.csv`` in the folder (from ``dovetail review FOLDER --audit``). Returns
    audit.json as a dict (``measured`` holds the precision and its 95% interval,
    ``estimate_inside`` whether the run's own estimate lies in it) and adds the audit to the
    folder's report.html."""
    return json.loads(_dovetail.audit(os.fspath(folder)))
