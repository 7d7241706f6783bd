"""Signals and kills in a real subprocess: a run is never lost, an output set is never mixed.

The solve process stops itself (SIGSTOP) at an exact moment named in the
environment variable RELAXTUI_TEST_PAUSE_AT (relaxtui.output.atomic.pause_for_tests):
"solving" (after the first step), "solving:2" (after the second), "solved" (the run has ended, the
writing not begun), "writing" (the solve is over, nothing written yet), "remove" (every temporary file complete, the previous report about to
be removed), "rename:N" (before the N-th rename), "renamed" (all renamed). The
test waits until the process is stopped (/proc state "T"), sends its signal or
SIGKILL, and continues it. No timing is involved.

What a reader may see afterwards (the rule of relaxtui.commands.solve): the
report is renamed last and lists the SHA-256 of every file of its set, and the
previous report is removed before the first rename, so a report present
always describes exactly the files beside it ("complete and consistent"), or
there is no report and no file of the new run carries one ("absent").
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from cases import hot_cold_toml

pytestmark = pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs /proc to see a stopped process")

CASE = hot_cold_toml("plate.png", void=False)

OUTPUTS = ("f.npy", "r.json", "h.csv")


def write_case(folder: Path, n: int = 120) -> Path:
    img = np.full((n, n, 3), 255, dtype=np.uint8)
    img[:, 0] = (0, 0, 255)
    img[:, -1] = (255, 0, 0)
    Image.fromarray(img, "RGB").save(folder / "plate.png")
    (folder / "case.toml").write_text(CASE, encoding="utf-8")
    return folder / "case.toml"


def command():
    exe = Path(sys.executable).with_name("relaxtui")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "relaxtui"]


def start(folder: Path, pause: str, *extra):
    env = dict(os.environ, RELAXTUI_TEST_PAUSE_AT=pause)
    # jacobi to 1e-13 on 120 x 120: about 27 000 sweeps before its rounding floor (measured; two chunks), so a
    # signal sent while it is stopped at "solving" (after the first chunk) is handled before it ends
    args = ["solve", "case.toml", "--method", "jacobi", "--tolerance", "1e-13", "--out", "f.npy", "--report", "r.json",
            "--history", "h.csv", "-q", *extra]
    return subprocess.Popen(command() + args, cwd=folder, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)


def wait_stopped(proc, timeout: float = 120.0) -> None:
    """Wait until the process has stopped itself (state T in /proc), or fail."""
    deadline = time.monotonic() + timeout
    stat = Path(f"/proc/{proc.pid}/stat")
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            out, err = proc.communicate()
            raise AssertionError(f"the process ended (code {proc.returncode}) before its pause: {err}")
        try:
            state = stat.read_text().rsplit(")", 1)[1].split()[0]
        except (OSError, IndexError):
            state = ""
        if state in ("T", "t"):
            return
        time.sleep(0.02)
    proc.kill()
    raise AssertionError("the process never reached its pause")


def cont(proc) -> None:
    os.kill(proc.pid, signal.SIGCONT)


def sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def check_set(folder: Path) -> str:
    """'complete' or 'absent'; fails on a mixed or broken set, or on leftover temporary files of a finished run."""
    report = folder / "r.json"
    if not report.exists():
        return "absent"
    doc = json.loads(report.read_text())  # a report is always whole JSON
    listed = doc["outputs"]
    assert set(listed) == {"field", "history"}, listed
    for entry in listed.values():
        p = folder / entry["path"]
        assert p.exists(), f"the report lists {p.name}, which is missing"
        assert sha(p) == entry["sha256"], f"{p.name} is not the file the report describes"
    return "complete"


# each case starts a solver process (about 10-20 s on the loaded 2-core machine): one of each
# kind runs in the quick suite, the rest under -m slow
def _quick(values, keep):
    return [v if v == keep else pytest.param(v, marks=pytest.mark.slow) for v in values]


@pytest.mark.parametrize("sig", _quick([signal.SIGINT, signal.SIGTERM, signal.SIGHUP], signal.SIGTERM))
def test_stop_signals_write_a_cancelled_set_and_exit_130(tmp_path, sig):
    write_case(tmp_path)
    proc = start(tmp_path, "solving")
    wait_stopped(proc)
    os.kill(proc.pid, sig)
    cont(proc)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err  # the contract's "interrupted", for all three (solve.py docstring)
    assert "Traceback" not in err
    assert check_set(tmp_path) == "complete"
    report = json.loads((tmp_path / "r.json").read_text())
    assert report["status"] == "cancelled"
    assert signal.Signals(sig).name in report["message"]
    assert np.load(tmp_path / "f.npy").shape == (120, 120)
    assert (tmp_path / "h.csv").read_text().startswith("sweep,seconds,residual,estimated_error")
    assert not list(tmp_path.glob(".*.part"))


@pytest.mark.parametrize("moment", _quick(["writing", "remove", "rename:0", "rename:1", "rename:2"], "rename:1"))
def test_second_ctrl_c_during_the_writing_does_not_abort_it(tmp_path, moment):
    write_case(tmp_path)
    proc = start(tmp_path, f"solving,{moment}")
    wait_stopped(proc)
    os.kill(proc.pid, signal.SIGINT)  # the first: end the run
    cont(proc)
    wait_stopped(proc)
    os.kill(proc.pid, signal.SIGINT)  # the second, while writing
    os.kill(proc.pid, signal.SIGTERM)  # and a third for good measure
    cont(proc)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert "Traceback" not in err
    assert check_set(tmp_path) == "complete"
    assert json.loads((tmp_path / "r.json").read_text())["status"] == "cancelled"


@pytest.mark.slow
def test_second_ctrl_c_while_solving_stops_without_writing(tmp_path):
    write_case(tmp_path)
    proc = start(tmp_path, "solving,solving:2")
    wait_stopped(proc)
    os.kill(proc.pid, signal.SIGINT)  # (two pending SIGINTs would merge into one: one per pause)
    cont(proc)
    wait_stopped(proc)  # the next step has ended the run; nothing is written yet
    os.kill(proc.pid, signal.SIGINT)
    cont(proc)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 130
    assert "Traceback" not in err
    assert check_set(tmp_path) == "absent"
    assert not [p for p in tmp_path.iterdir() if p.name in OUTPUTS]


KILL_MOMENTS = ["writing", "remove", "rename:0", "rename:1", "rename:2", "renamed"]


@pytest.mark.parametrize("moment", _quick(KILL_MOMENTS, "rename:1"))
@pytest.mark.parametrize("previous", [pytest.param(False, marks=pytest.mark.slow), True],
                         ids=["fresh", "over-a-previous-set"])
def test_sigkill_while_writing_leaves_a_consistent_set_or_none(tmp_path, moment, previous):
    # 120 x 120 as start() assumes: on 60 x 60 the Jacobi run reached its rounding floor within the chunk
    # the SIGINT landed in and kept "stalled", what it reached (relaxtui.commands.solve.exit_code), so
    # the "renamed" cases (under -m slow) failed every time
    write_case(tmp_path)
    if previous:  # a complete set of an earlier run (a different tolerance, so different files)
        first = start(tmp_path, "", "--max-sweeps", "50")
        first.communicate(timeout=120)
        assert check_set(tmp_path) == "complete"
        old = json.loads((tmp_path / "r.json").read_text())["run_id"]
    proc = start(tmp_path, f"solving,{moment}")
    wait_stopped(proc)
    os.kill(proc.pid, signal.SIGINT)
    cont(proc)
    wait_stopped(proc)
    proc.kill()
    proc.communicate(timeout=60)
    state = check_set(tmp_path)
    if moment == "renamed":
        assert state == "complete"
        assert json.loads((tmp_path / "r.json").read_text())["status"] == "cancelled"
    elif moment in ("writing", "remove") and previous:
        assert state == "complete" and json.loads((tmp_path / "r.json").read_text())["run_id"] == old
    else:
        assert state == "absent"
    # the killed run's temporary files are cleaned by the next run to these paths
    if list(tmp_path.glob(".*.relaxtui-*.part")):
        again = start(tmp_path, "", "--max-sweeps", "20")
        again.communicate(timeout=120)
        assert check_set(tmp_path) == "complete"
        assert not list(tmp_path.glob(".*.part"))


def test_a_closed_progress_pipe_does_not_stop_the_run(tmp_path):
    # stderr a pipe whose reader has gone (a log pager quit, a launcher that died): the progress lines
    # fail with EPIPE (Python ignores SIGPIPE), the run must go on and write its set anyway
    write_case(tmp_path, n=40)
    args = ["solve", "case.toml", "--method", "jacobi", "--max-sweeps", "300", "--out", "f.npy", "--report", "r.json",
            "--history", "h.csv"]
    proc = subprocess.Popen(command() + args, cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    proc.stderr.close()  # before the first progress line
    out, _ = proc.communicate(timeout=120)
    assert proc.returncode == 1, out  # the sweep limit: "not converged" (relaxtui.commands.solve.exit_code)
    assert check_set(tmp_path) == "complete"
    assert json.loads((tmp_path / "r.json").read_text())["status"] == "sweep-limit"
    assert "sweep-limit" in out  # the summary on stdout, which is still read


def test_concurrent_runs_to_the_same_paths_never_mix(tmp_path):
    write_case(tmp_path, n=40)
    runs = [start(tmp_path, "", "--max-sweeps", str(n)) for n in (200, 300, 400, 500)]
    for proc in runs:
        proc.communicate(timeout=180)
    assert check_set(tmp_path) == "complete"


def test_a_signal_after_the_run_converged_keeps_its_status_and_exit_code(tmp_path):
    # The run has converged and is about to write ("solved") when SIGTERM arrives: the field is the
    # converged one, so the report says converged and the exit code follows it (0), with no
    # "(stopped by ...)" (relaxtui.commands.solve.exit_code; the MPI run does the same, tests/test_mpi.py).
    write_case(tmp_path, n=20)
    proc = start(tmp_path, "solved", "--tolerance", "1e-4")
    wait_stopped(proc)
    os.kill(proc.pid, signal.SIGTERM)
    cont(proc)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, err
    assert check_set(tmp_path) == "complete"
    report = json.loads((tmp_path / "r.json").read_text())
    assert report["status"] == "converged" and "stopped by" not in report["message"]


def test_a_hang_up_ignored_at_start_stays_ignored(tmp_path):
    # POSIX nohup: the utility starts the program with SIGHUP ignored, and a signal ignored when a
    # process starts stays ignored (common practice; relaxtui.commands.solve._stop_signals_to). The
    # run is stopped after its first step (not yet converged), hung up, continued: it must run to
    # its end as if nothing came, not cancel.
    write_case(tmp_path, n=80)  # Gauss-Seidel to 1e-7: some 20 000 sweeps, many steps
    env = dict(os.environ, RELAXTUI_TEST_PAUSE_AT="solving")
    # SIGHUP ignored, then exec: the same process (pid) runs relaxtui with the disposition inherited
    ignore_then_exec = ("import os, signal, sys; signal.signal(signal.SIGHUP, signal.SIG_IGN); "
                        "os.execvp(sys.argv[1], sys.argv[1:])")
    args = ["solve", "case.toml", "--method", "gauss-seidel", "--tolerance", "1e-7", "--out", "f.npy", "--report", "r.json",
            "--history", "h.csv", "-q"]
    proc = subprocess.Popen([sys.executable, "-c", ignore_then_exec, *command(), *args], cwd=tmp_path, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    wait_stopped(proc)
    os.kill(proc.pid, signal.SIGHUP)
    cont(proc)
    out, err = proc.communicate(timeout=120)
    report = json.loads((tmp_path / "r.json").read_text())
    assert report["status"] == "converged", report["message"]
    assert proc.returncode == 0, err
    assert check_set(tmp_path) == "complete"


def test_the_stop_handler_leaves_an_ignored_hang_up_ignored():
    # the handler that solve, open and every MPI rank install (relaxtui.commands.solve._stop_signals_to):
    # an ignored SIGHUP keeps SIG_IGN inside it, the others get the handler and are restored after
    # (POSIX nohup semantics, common practice)
    import threading

    from relaxtui.commands.solve import _stop_signals_to

    # SIGINT ignored at start is a non-interactive shell's background job (POSIX sh, common
    # practice): a script's explicit ``kill -INT`` must still stop the run, so it gets the handler
    before = {s: signal.getsignal(s) for s in (signal.SIGHUP, signal.SIGTERM, signal.SIGINT)}
    signal.signal(signal.SIGHUP, signal.SIG_IGN)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        with _stop_signals_to(threading.Event()) as state:
            assert signal.getsignal(signal.SIGHUP) == signal.SIG_IGN
            assert signal.getsignal(signal.SIGTERM) == state.handler
            assert signal.getsignal(signal.SIGINT) == state.handler
        assert signal.getsignal(signal.SIGHUP) == signal.SIG_IGN
        assert signal.getsignal(signal.SIGTERM) == before[signal.SIGTERM]
        assert signal.getsignal(signal.SIGINT) == signal.SIG_IGN
    finally:
        signal.signal(signal.SIGHUP, before[signal.SIGHUP])
        signal.signal(signal.SIGINT, before[signal.SIGINT])
