"""End to end: the real ``relaxtui open --run CASE`` in a pseudo-terminal of 80 x 24.

The screen must reach the converged status of the run, and ``q`` must quit
cleanly with exit status 0.
"""

from __future__ import annotations

import contextlib
import os
import sys
from pathlib import Path

import pytest

pexpect = pytest.importorskip("pexpect")

from test_tui import make_plate  # noqa: E402


@contextlib.contextmanager
def relaxtui_open(tmp_path, *options):
    """The real ``relaxtui open OPTIONS CASE`` on test_tui's plate in an 80 x 24 pseudo-terminal.

    Yields (child, screen log path); afterwards the child is closed and must have exited with status 0.
    """
    case = make_plate(tmp_path)
    exe = Path(sys.executable).with_name("relaxtui")
    if not exe.exists():
        pytest.skip("the relaxtui script is not installed next to this Python")
    env = {k: v for k, v in os.environ.items() if k != "NO_COLOR"}
    env.update(TERM="xterm-256color", COLUMNS="80", LINES="24")
    child = pexpect.spawn(str(exe), ["open", *options, str(case)], dimensions=(24, 80), env=env, encoding="utf-8", timeout=240, cwd=str(tmp_path))
    log = tmp_path / "screen.log"
    child.logfile_read = open(log, "w", encoding="utf-8")
    try:
        yield child, log
    finally:
        child.close(force=True)
        child.logfile_read.close()
    assert child.exitstatus == 0, child.before


def test_open_run_reaches_converged_in_a_terminal(tmp_path):
    with relaxtui_open(tmp_path, "--run") as (child, log):
        # the stopping rule in words reaches the status strip (the generous timeout guards a
        # first kernel compilation; it is no speed check)
        child.expect("equilibrium reached")
        child.send("q")
        child.expect(pexpect.EOF)
    assert "converged" in log.read_text(encoding="utf-8")


def test_study_flow_at_80x24_lands_no_key_in_a_field(tmp_path):
    """start -> change ω -> continue -> residual view -> ω panel -> export -> quit.

    Every key goes to the footer's actions: had one landed in the ω field
    ("1.9c"), the continued run would be refused and nothing exported; the
    exported report proves the ω typed is exactly the one used.
    """
    import json

    with relaxtui_open(tmp_path) as (child, _log):

        def key(text: str, then: str) -> None:
            child.send(text)
            child.expect(then)

        child.expect("ready")
        # the method (m, left arrow: sor), Enter and start, in one burst
        key("m\x1b[D\rs", "run #1 converged")
        key("o", "esc")  # the field has the focus: the footer shows escape
        # ctrl+a, ctrl+k empty the field; then the value, Enter and the next footer key in one
        # burst, as a fast typist sends them: Enter hands the focus back before "c" is read
        key("\x01\x0b1.9\rc", "run #2 converged")
        key("v", "Residual")
        key("w", "ω study")
        key("e", "Export run #2")
        key("\r", "exported")
        child.send("q")
        child.expect(pexpect.EOF)
    report = json.loads((tmp_path / "plate.run2.report.json").read_text(encoding="utf-8"))
    assert report["omega"] == 1.9 and report["status"] == "converged" and report["method"] == "sor"
    assert (tmp_path / "plate.run2.field.npy").exists() and (tmp_path / "plate.run2.history.csv").exists()
