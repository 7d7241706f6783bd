"""End to end: the real ``relaxtui open --run CASE`` in a pseudo-terminal of 80 x 24.

The screen must reach the converged status of the run, and ``q`` must quit
cleanly with exit status 0. A stop signal (a hang-up of the terminal, SIGTERM)
must leave the session's runs on disk, whole, with the headless solve's exit code. The headless
``relaxtui solve`` too must write its set when its terminal hangs up under its progress display.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np

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


@contextlib.contextmanager
def relaxtui_in_terminal(tmp_path, case, *options, env_extra=None, command="open"):
    """``relaxtui COMMAND OPTIONS CASE`` as the leader of its own session on a new 80 x 24 pseudo-terminal
    (its controlling terminal, as under sshd or tmux), so that closing the terminal's master side
    hangs it up: the kernel then sends the session SIGHUP. Yields (process, pexpect reader of the screen)."""
    import fcntl
    import pty
    import struct
    import termios

    from pexpect import fdpexpect

    exe = Path(sys.executable).with_name("relaxtui")
    if not exe.exists():
        pytest.skip("the relaxtui script is not installed next to this Python")
    env = {k: v for k, v in os.environ.items() if k != "NO_COLOR"}
    env.update(TERM="xterm-256color", COLUMNS="80", LINES="24", **(env_extra or {}))
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 80, 0, 0))
    proc = subprocess.Popen([str(exe), command, *options, str(case)], stdin=slave, stdout=slave, stderr=slave,
                            cwd=str(tmp_path), env=env, start_new_session=True,
                            preexec_fn=lambda: fcntl.ioctl(0, termios.TIOCSCTTY, 0))
    os.close(slave)
    screen = fdpexpect.fdspawn(master, encoding="utf-8", timeout=240)
    screen.logfile_read = open(tmp_path / "screen.log", "w", encoding="utf-8")
    try:
        yield proc, screen
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(60)
        if not screen.closed:
            screen.close()
        screen.logfile_read.close()


def wait_stopped(proc, limit: float = 120.0) -> None:
    """Until the process has stopped itself (relaxtui.output.atomic.pause_for_tests; /proc state T)."""
    import time

    stat = Path(f"/proc/{proc.pid}/stat")
    deadline = time.monotonic() + limit  # a guard against hanging, not a speed check
    while time.monotonic() < deadline:
        assert proc.poll() is None, f"the process ended (code {proc.returncode}) before its pause"
        if stat.read_text().rsplit(")", 1)[1].split()[0] in ("T", "t"):
            return
        time.sleep(0.02)
    raise AssertionError("the process never reached its pause")


def saved_set(folder: Path, run: int) -> dict:
    """The report of run ``run``'s saved set, after checking that every file it lists is there, whole."""
    import hashlib

    report = json.loads((folder / f"plate.run{run}.report.json").read_text(encoding="utf-8"))
    assert set(report["outputs"]) == {"field", "history"}
    for entry in report["outputs"].values():
        data = (folder / entry["path"]).read_bytes()
        assert hashlib.sha256(data).hexdigest() == entry["sha256"], entry["path"]
    field = np.load(folder / f"plate.run{run}.field.npy")
    assert field.dtype == np.float64 and field.shape == tuple(report["grid"])
    history = (folder / f"plate.run{run}.history.csv").read_text(encoding="utf-8").splitlines()
    assert history[0] == "sweep,seconds,residual,estimated_error"
    assert not list(folder.glob(".*.part"))
    return report


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs /proc to see a stopped process")
def test_a_hang_up_saves_the_run_in_progress_even_through_a_second_signal(tmp_path):
    # Jacobi to 1e-10 on 60 x 60 is far more than one chunk: "n" leaves it paused after one
    case = make_plate(tmp_path, n=60, method="jacobi", tolerance=1e-10)
    with relaxtui_in_terminal(tmp_path, case, env_extra={"RELAXTUI_TEST_PAUSE_AT": "rename:1"}) as (proc, screen):
        screen.expect("s starts a run")
        screen.send("n")
        screen.expect("paused · sweep [1-9]")  # the field title, once the chunk is swept
        screen.close()  # the terminal goes away: the kernel hangs it up and sends SIGHUP
        wait_stopped(proc)  # the save, between two renames of its output set
        os.kill(proc.pid, signal.SIGHUP)  # a second hang-up (the shell's) and a SIGTERM on top
        os.kill(proc.pid, signal.SIGTERM)
        os.kill(proc.pid, signal.SIGCONT)
        code = proc.wait(120)
    assert code == 130  # relaxtui solve's "interrupted" (relaxtui.commands.solve.exit_code)
    report = saved_set(tmp_path, 1)
    # the headless solve's wording for a run a signal stopped (tests/test_signals.py)
    assert report["status"] == "cancelled" and report["message"].endswith(" (stopped by SIGHUP)")
    assert report["sweeps"] > 0


def test_a_hang_up_during_a_headless_solve_still_writes_its_set(tmp_path):
    # relaxtui solve with its progress display on the terminal, which then goes away (an SSH drop): the
    # display's last frame failed on the hung-up terminal (EIO) and no output was written (seen in tmux,
    # kill-session); the set must be written, cancelled, with the exit code of a stop signal
    import hashlib

    # Jacobi to 1e-8 on 200 x 200: about 150 000 sweeps, many chunks after the hang-up (a run that ends
    # within the chunk the signal lands in keeps what it reached: relaxtui.commands.solve.exit_code)
    case = make_plate(tmp_path, n=200, method="jacobi", tolerance=1e-8)
    options = ("--out", "f.npy", "--report", "r.json", "--history", "h.csv")
    pause = {"RELAXTUI_TEST_PAUSE_AT": "solving"}  # stopped after its first chunk, the display showing it
    with relaxtui_in_terminal(tmp_path, case, *options, env_extra=pause, command="solve") as (proc, screen):
        wait_stopped(proc)
        screen.close()  # the kernel hangs the terminal up: it sends the session SIGHUP and SIGCONT
        code = proc.wait(120)
    assert code == 130  # relaxtui.commands.solve.exit_code: "interrupted"
    report = json.loads((tmp_path / "r.json").read_text(encoding="utf-8"))
    assert report["status"] == "cancelled" and report["message"].endswith(" (stopped by SIGHUP)"), report["message"]
    for entry in report["outputs"].values():
        assert hashlib.sha256((tmp_path / entry["path"]).read_bytes()).hexdigest() == entry["sha256"], entry["path"]


def test_sigterm_saves_the_running_run_and_says_so(tmp_path):
    # Jacobi to 1e-10 on 120 x 120: hundreds of thousands of sweeps, still running when the signal comes
    case = make_plate(tmp_path, n=120, method="jacobi", tolerance=1e-10)
    with relaxtui_in_terminal(tmp_path, case) as (proc, screen):
        screen.expect("s starts a run")
        screen.send("s")
        screen.expect("running: estimated error")
        proc.send_signal(signal.SIGTERM)
        screen.expect("saved to")  # the terminal is still there: the app has left it and says what it wrote
        screen.expect(pexpect.EOF)
        code = proc.wait(120)
    assert code == 130
    assert "Traceback" not in (tmp_path / "screen.log").read_text(encoding="utf-8")
    report = saved_set(tmp_path, 1)
    assert report["status"] == "cancelled" and report["message"].endswith(" (stopped by SIGTERM)")


def test_a_signal_after_the_run_converged_keeps_its_status_and_exit_code(tmp_path):
    # as relaxtui solve (tests/test_signals.py): a converged run stays converged, the exit code 0
    case = make_plate(tmp_path)
    with relaxtui_in_terminal(tmp_path, case, "--run") as (proc, screen):
        screen.expect("equilibrium reached")
        proc.send_signal(signal.SIGTERM)
        screen.expect(pexpect.EOF)
        code = proc.wait(120)
    assert code == 0
    report = saved_set(tmp_path, 1)
    assert report["status"] == "converged" and "stopped by" not in report["message"]
