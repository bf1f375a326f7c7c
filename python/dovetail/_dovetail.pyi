"""Type stubs of the native half of the package (``dovetail._dovetail``). Use the functions
of ``dovetail`` itself; these take normalised arguments (see ``dovetail/__init__.py``)."""

from typing import Any, Callable, List, Optional, Tuple

__version__: str

class DovetailError(Exception):
    file: Optional[str]
    row: Optional[int]
    place: Optional[str]
    column: Optional[str]
    message: str

class ConfigError(DovetailError): ...
class InputError(DovetailError): ...
class OutputError(DovetailError): ...
class InfeasibleError(DovetailError):
    result: Any  # dovetail.Assessment of the stopped run
class MemoryBudgetError(DovetailError): ...

class Stream:
    """One Arrow table, handed over by the Arrow C stream interface."""

    def __arrow_c_stream__(self, requested_schema: Optional[object] = None) -> object: ...

class Outputs:
    warnings: List[str]
    stopped: bool
    text: str
    def names(self) -> List[str]: ...
    def file(self, name: str) -> bytes: ...
    def table(self, name: str) -> Stream: ...
    def write(self, folder: str, parquet: bool = False) -> List[str]: ...

_Table = Any  # a path string or an object with __arrow_c_stream__
_Progress = Optional[Callable[[str, str], Any]]

def run_config(
    command: str,  # "link", "assess" or "tune"
    left: Optional[_Table],
    right: Optional[_Table],
    config_path: Optional[str],
    config_json: Optional[str],
    threads: Optional[int],
    progress: _Progress,
    memory_budget: Optional[str],
    sample: int,
    replicates: int,
) -> Outputs: ...
def match_pairs(pairs: _Table, min_weight: float, threads: Optional[int]) -> Outputs: ...
def synth(
    rows: int,
    overlap: float,
    noise: float,
    seed: int,
    twins: Optional[float],
    movers: Optional[float],
    household_moves: float,
    relatives: float,
    duplicates: float,
    blank: List[str],
) -> Tuple[Outputs, str]: ...
def write_plain(outputs: Outputs, folder: str) -> List[str]: ...
def audit(folder: str) -> str: ...
def block_keys(
    table: _Table, config_path: Optional[str], config_json: Optional[str], left: bool
) -> Any: ...  # an Arrow stream: id, pass, key
def block_passes(config_path: Optional[str], config_json: Optional[str]) -> List[Tuple[str, int]]: ...
def candidate_pairs(
    left: Optional[_Table],
    right: Optional[_Table],
    config_path: Optional[str],
    config_json: Optional[str],
) -> Any: ...  # an Arrow stream: left_id, right_id, passes
def read_columns(config_path: Optional[str], config_json: Optional[str]) -> Tuple[List[str], List[str]]: ...
def pattern_counts(
    left: _Table, right: _Table, left_rows: List[int], right_rows: List[int], config_json: str
) -> List[Tuple[str, float]]: ...
def local_pattern_counts(
    left: Optional[_Table],
    right: Optional[_Table],
    config_path: Optional[str],
    config_json: Optional[str],
) -> List[Tuple[str, float]]: ...
def fit_counts(patterns: List[Tuple[str, float]], n_left: int, n_right: int, config_json: str) -> str: ...
def local_plain_fit(
    left: Optional[_Table],
    right: Optional[_Table],
    config_path: Optional[str],
    config_json: Optional[str],
) -> str: ...
