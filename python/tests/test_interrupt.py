"""Stopping a run from Python: Ctrl-C (SIGINT) in the middle of a long stage, and a progress
callback that raises, both end the call with KeyboardInterrupt at once, and the package
stays usable."""

from __future__ import annotations

import subprocess
import sys
import textwrap
import time

import pytest

import dovetail
from conftest import SAMPLE_CONFIG

CHILD = textwrap.dedent(
    """
    import signal, sys, time
    import dovetail
    # A child started by a non-interactive shell may inherit SIGINT ignored.
    signal.signal(signal.SIGINT, signal.default_int_handler)
    s = dovetail.synth(200000, seed=3)
    def progress(kind, text):
        print(kind, text, flush=True)
    try:
        dovetail.link(s.left, s.right, s.config, progress=progress)
        print("finished", flush=True)
    except KeyboardInterrupt:
        print("interrupted", time.monotonic(), flush=True)
    # The package still works after the interrupt.
    small = dovetail.synth(300, seed=1)
    print("again", dovetail.link(small.left, small.right, small.config).links.num_rows > 0)
    """
)


def test_ctrl_c_stops_a_long_run():
    child = subprocess.Popen(
        [sys.executable, "-c", CHILD], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
    )
    assert child.stdout is not None
    lines = []
    sent = None
    for line in child.stdout:
        lines.append(line.strip())
        # The fitting stage of 200,000 rows lasts seconds: the signal lands inside it.
        if line.startswith("stage fitting"):
            sent = time.monotonic()
            child.send_signal(2)
    child.wait(timeout=120)
    assert sent is not None, lines
    assert child.returncode == 0, child.stderr.read() if child.stderr else ""
    stopped = [l for l in lines if l.startswith("interrupted")]
    assert stopped, f"the run was not interrupted: {lines}"
    # It ends within the grace period (2 s) plus a poll, not at the end of the run.
    assert float(stopped[0].split()[1]) - sent < 4.0
    assert "finished" not in lines
    assert not any(l.startswith("stage confidence") for l in lines)
    assert lines[-1] == "again True"


def test_a_callback_that_raises_stops_the_run():
    def progress(kind, text):
        if text == "comparing":
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        dovetail.link(None, None, SAMPLE_CONFIG, progress=progress)

    class Boom(Exception):
        pass

    def failing(kind, text):
        raise Boom("from the callback")

    with pytest.raises(Boom):
        dovetail.link(None, None, SAMPLE_CONFIG, progress=failing)
    assert dovetail.link(None, None, SAMPLE_CONFIG).links.num_rows > 0
