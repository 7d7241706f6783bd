"""End to end: the real ``relaxtui open --run CASE`` in a pseudo-terminal of 80 x 24.

The screen must reach the converged status of the run, and ``q`` must quit
cleanly with exit status 0.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import pytest

pexpect = pytest.importorskip("pexpect")

from test_tui import make_plate  # noqa: E402


def test_open_run_reaches_converged_in_a_terminal(tmp_path):
    case = make_plate(tmp_path)
    exe = Path(sys.executable).with_name("relaxtui")
    if not exe.exists():
        pytest.skip("the relaxtui script is not installed next to this Python")
    env = {k: v for k, v in os.environ.items() if k != "NO_COLOR"}
    env.update(TERM="xterm-256color", COLUMNS="80", LINES="24")
    child = pexpect.spawn(str(exe), ["open", "--run", str(case)], dimensions=(24, 80), env=env, encoding="utf-8", timeout=240, cwd=str(tmp_path))
    log = tmp_path / "screen.log"
    child.logfile_read = open(log, "w", encoding="utf-8")
    try:
        # the stopping rule in words reaches the status strip (the generous timeout guards a
        # first kernel compilation; it is no speed check)
        child.expect("equilibrium reached")
        child.send("q")
        child.expect(pexpect.EOF)
    finally:
        child.close(force=True)
        child.logfile_read.close()
    assert child.exitstatus == 0, child.before
    assert "converged" in log.read_text(encoding="utf-8")
