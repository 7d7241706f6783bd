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


def test_study_flow_at_80x24_lands_no_key_in_a_field(tmp_path):
    """start -> change ω -> continue -> residual view -> ω panel -> export -> quit.

    Every key goes to the footer's actions: had one landed in the ω field
    ("1.9c"), the continued run would be refused and nothing exported; the
    exported report proves the ω typed is exactly the one used.
    """
    import json

    case = make_plate(tmp_path)
    exe = Path(sys.executable).with_name("relaxtui")
    if not exe.exists():
        pytest.skip("the relaxtui script is not installed next to this Python")
    env = {k: v for k, v in os.environ.items() if k != "NO_COLOR"}
    env.update(TERM="xterm-256color", COLUMNS="80", LINES="24")
    child = pexpect.spawn(str(exe), ["open", str(case)], dimensions=(24, 80), env=env, encoding="utf-8", timeout=240, cwd=str(tmp_path))
    log = tmp_path / "screen.log"
    child.logfile_read = open(log, "w", encoding="utf-8")

    def key(text: str, then: str) -> None:
        child.send(text)
        child.expect(then)

    try:
        child.expect("ready")
        key("s", "run #1 converged")
        key("o", "esc")  # the field has the focus: the footer shows escape
        child.send("\x01\x0b")  # ctrl+a, ctrl+k: empty the field
        key("1.9\r", "will be used")  # Enter checks the value and hands the focus back
        key("c", "run #2 converged")
        key("v", "Residual")
        key("w", "ω study")
        key("e", "Export run #2")
        key("\r", "exported")
        child.send("q")
        child.expect(pexpect.EOF)
    finally:
        child.close(force=True)
        child.logfile_read.close()
    assert child.exitstatus == 0, child.before
    report = json.loads((tmp_path / "plate.run2.report.json").read_text(encoding="utf-8"))
    assert report["omega"] == 1.9 and report["status"] == "converged"
    assert (tmp_path / "plate.run2.field.npy").exists() and (tmp_path / "plate.run2.history.csv").exists()
