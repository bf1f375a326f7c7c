"""Shared helpers of the Python package's tests.

The tests compare the package against the command-line tool built from the same tree
(`cargo build --release` first; .ci/run does it), so every "same answer" check is against
a program that does not go through the package at all.
"""

from __future__ import annotations

import json
import os
import subprocess
from pathlib import Path

import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[2]
SAMPLE_CONFIG = ROOT / "config-examples" / "sample.toml"
SAMPLE_LEFT = ROOT / "sample-tables" / "left.csv"
SAMPLE_RIGHT = ROOT / "sample-tables" / "right.csv"
PARQUET = ROOT / "tests" / "reference" / "parquet"
LINK_TABLES = ["links.csv", "unlinked_left.csv", "unlinked_right.csv", "review.csv"]


def cli_path() -> Path:
    if os.environ.get("DOVETAIL_BIN"):
        return Path(os.environ["DOVETAIL_BIN"])
    target = Path(os.environ.get("CARGO_TARGET_DIR", ROOT / "target"))
    if not target.is_absolute():
        target = ROOT / target
    return target / "release" / "dovetail"


@pytest.fixture(scope="session")
def cli():
    """Runs the command-line tool; fails (never skips) when it has not been built."""
    path = cli_path()
    if not path.exists():
        pytest.fail(f"{path} not found: run `cargo build --release` first (or set DOVETAIL_BIN)")

    def run(*args: str, check: bool = True) -> subprocess.CompletedProcess:
        done = subprocess.run([str(path), *map(str, args)], capture_output=True, text=True)
        if check and done.returncode != 0:
            raise AssertionError(f"dovetail {' '.join(map(str, args))}: {done.stderr}")
        return done

    return run


def answer(summary: dict) -> dict:
    """summary.json without what describes the inputs rather than the answer: the
    manifest (paths, hashes, sizes, times) and the memory estimate (which counts the input
    files' bytes)."""
    return {k: v for k, v in summary.items() if k not in ("manifest", "memory_estimate")}


def folder_answer(folder: Path) -> dict:
    return answer(json.loads((folder / "summary.json").read_text()))


def sample_frames() -> "tuple[pd.DataFrame, pd.DataFrame]":
    """The sample tables as pandas frames of text, blank cells as empty strings."""
    read = lambda p: pd.read_csv(p, dtype=str, keep_default_na=False)  # noqa: E731
    return read(SAMPLE_LEFT), read(SAMPLE_RIGHT)


@pytest.fixture(scope="session")
def cli_sample(cli, tmp_path_factory) -> Path:
    """The CLI's outputs for the sample config, in a folder."""
    out = tmp_path_factory.mktemp("cli") / "out"
    cli("link", "--config", SAMPLE_CONFIG, "--out", out, "--quiet")
    return out
