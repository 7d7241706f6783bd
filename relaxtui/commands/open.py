"""``relaxtui open CASE.toml``: the terminal UI.

Stop signals. SIGHUP (the terminal or SSH session went away), SIGTERM (a kill, a batch
system's stop) and SIGINT sent from outside (``kill -INT``; Ctrl-C in the UI is a key, not
a signal) are caught by ``relaxtui solve``'s handler (:func:`relaxtui.commands.solve._stop_signals_to`)
(a hang-up ignored at start, as under ``nohup``, stays ignored)
and end the session without losing a run: a thread of this command
(:class:`_StopSaver`) stops the active run at its worker's next chunk boundary and writes it,
then every finished run never exported, to the export's default names
(:func:`relaxtui.tui.worker.save_on_signal`), while the app is told to leave. The report of the
run the signal stopped says ``cancelled``, "... (stopped by SIGHUP)", as the headless solve's does;
the exit code is the headless solve's for the latest run's status (130 cancelled, 0 converged,
1 any other end; 130 with no run). Further signals are counted and ignored (a hang-up often
brings two SIGHUPs, the kernel's and the shell's): the wait is at most a chunk of sweeps. The
save never needs the screen: a terminal that has hung up is replaced by /dev/null first
(Textual's writes to it would fail), and if the UI still has not come down a while after the
files are written (``GONE_GRACE`` seconds with a hung-up terminal, ``UI_GRACE`` with a live
one it may still be restoring), the process ends itself with the exit code: an output thread
of Textual's that died on the dead terminal can leave the event loop stuck.

No terminal. The UI reads its keys from standard input; where that is not a terminal
(``< /dev/null``, a file, a pipe) no key can come, so the command does not start the UI: a case
that cannot be loaded is its one-line error (exit 2), any other is refused on one line (exit 2)
with a pointer to ``relaxtui solve``.
"""

from __future__ import annotations

import os
import sys
import threading
from pathlib import Path

from relaxtui.errors import CaseError

UI_GRACE = 10.0  # seconds the saved process waits for the UI to restore a live terminal before it ends itself
GONE_GRACE = 1.0  # the same where the terminal has hung up (there is nothing to restore)


def run(args) -> int:
    """``relaxtui open CASE.toml [--method ...] [--omega ...] [--tolerance ...] [--precision ...] [--run]``."""
    path = Path(args.case)
    from relaxtui.case.picture import require_regular_file

    require_regular_file(path, str(args.case), "case file")  # a folder or FIFO: said so, never a hang
    if not path.is_file():
        raise CaseError(f"{args.case}: case file not found")
    if not _reads_a_terminal():
        # The UI takes its keys from standard input: from /dev/null, a file or a drained pipe none
        # ever comes (Textual's reader then spins on end-of-file and q can never be pressed), so a
        # case that fails to load, shown in the UI until q, never let the process end. Without a
        # terminal: the case's own error first, on one line, else the reason the UI cannot run.
        from relaxtui.case import load_case
        from relaxtui.errors import UsageError

        load_case(path)
        raise UsageError("standard input is not a terminal, and the UI reads its keys from one; "
                         "`relaxtui solve` runs a case without one")
    from relaxtui.commands.solve import _stop_signals_to
    from relaxtui.tui.app import RelaxApp, release_resume_signals

    wake = threading.Event()
    with _stop_signals_to(wake) as signals:
        signals.interrupt_on_repeat = False  # a repeat never cuts the save short (see the module docstring)
        app = RelaxApp(
            path,
            method=getattr(args, "method", None),
            omega=getattr(args, "omega", None),
            tolerance=getattr(args, "tolerance", None),
            max_sweeps=getattr(args, "max_sweeps", None),
            precision=getattr(args, "precision", None),
            run=getattr(args, "run", False),
            stop_requested=wake.is_set,
        )
        saver = _StopSaver(app.session, signals)
        saver.start()
        try:
            app.run()
        finally:
            release_resume_signals()  # Textual leaves its SIGCONT handler, which needs the ended event loop
            outcome = saver.close()  # waits for a save under way
    if outcome is None:
        return 0
    saved, code = outcome
    _tell(saved, signals.name)
    return code


def _reads_a_terminal() -> bool:
    """Whether standard input is a terminal (where the UI's keys come from)."""
    try:
        return os.isatty(0)
    except OSError:  # pragma: no cover - a closed descriptor 0
        return False


class _StopSaver(threading.Thread):
    """Waits for the first stop signal, then saves the session's runs (see the module docstring)."""

    def __init__(self, session, signals) -> None:
        super().__init__(name="relaxtui-stop-saver", daemon=True)
        self.session = session
        self.signals = signals
        self._lock = threading.Lock()
        self._closed = False
        self._saving = False
        self.done = threading.Event()
        self.ui_closed = threading.Event()
        self.outcome = None

    def run(self) -> None:
        self.signals.event.wait()
        with self._lock:
            if self._closed:  # the UI ended first (q): nothing to save
                return
            self._saving = True
        from relaxtui.commands.solve import EXIT_INTERRUPTED, leave_hung_up_terminal
        from relaxtui.tui.worker import save_on_signal

        self.signals.writing = True  # from here on a signal is only counted
        gone = leave_hung_up_terminal()
        try:
            self.outcome = save_on_signal(self.session, self.signals, Path("."))  # the export's relative names
        except Exception:  # pragma: no cover - save_on_signal reports each run's failure itself
            self.outcome = ([], EXIT_INTERRUPTED)
        finally:
            self.done.set()
        gone = leave_hung_up_terminal() or gone  # a hang-up that came after the signal
        if not self.ui_closed.wait(GONE_GRACE if gone else UI_GRACE):
            # the UI did not come down (its output thread stuck on a dead terminal): every file is
            # written and renamed, so end the process here
            os._exit(self.outcome[1])

    def close(self):
        """The UI has ended: returns ``(saved, exit code)`` once a save under way is done, else None."""
        self.ui_closed.set()
        with self._lock:
            self._closed = True
            saving = self._saving
        if not saving:
            self.signals.event.set()  # lets the thread end (a later signal is then only counted)
            return None
        self.done.wait()
        return self.outcome


def _tell(saved, name: str) -> None:
    """One line per run on stderr (where a terminal is left to read it; a failing write is ignored)."""
    from relaxtui.errors import printable

    lines = []
    for s in saved:
        if s.paths:
            lines.append(f"relaxtui: {name}: run #{s.run_id} ({s.status}) saved to "
                         + ", ".join(printable(str(p)) for p in s.paths))
        else:
            lines.append(f"relaxtui: {name}: run #{s.run_id} ({s.status}): {printable(s.problem)}")
    if not saved:
        lines.append(f"relaxtui: {name}: no run to save")
    try:
        sys.stderr.write("\n".join(lines) + "\n")
        sys.stderr.flush()
    except (OSError, ValueError):
        pass
