"""``relaxtui solve`` and ``relaxtui sweep``: headless solves from the command line.

Exit codes: 0 converged; 1 ran but did not converge (sweep-limit, time-limit,
stalled, diverged); 2 bad input or options (nothing is written); 130
interrupted (the outputs are still written, with status ``cancelled``). A run
that wrote its outputs exits with the code of its report's status
(:func:`exit_code`): a signal that arrives in the chunk that converges leaves
status ``converged`` and exit code 0.

Interruption: Ctrl-C (SIGINT), SIGTERM (a batch system's stop) and SIGHUP (a
closed terminal or SSH session) all end the run the same way (a signal the
process was started with SIGHUP ignored, as under ``nohup``, keeps it ignored): the current
chunk of sweeps finishes, field, report (status ``cancelled``, the message
names the signal) and history are written, and the exit status is 130 for
each of them (the contract's "interrupted"). A second signal while solving
stops at once without writing; once the writing has begun, further signals
are noted and ignored until the output set is complete.

Outputs form a set (relaxtui.output.atomic.OutputSet): every file is written
to a temporary first; then the previous report is removed, the others are
renamed, and the report comes last, carrying a run id and the SHA-256 of each
file it describes, so a reader can tell a complete set from a broken one.
"""

from __future__ import annotations

import math
import os
import signal
import sys
import threading
import time
from contextlib import contextmanager
from pathlib import Path

from relaxtui.output.text import group

EXIT_CONVERGED, EXIT_NOT_CONVERGED, EXIT_INTERRUPTED = 0, 1, 130
STOP_SIGNALS = tuple(getattr(signal, name) for name in ("SIGINT", "SIGTERM", "SIGHUP") if hasattr(signal, name))


class _Signals:
    """What the stop signals have asked for so far."""

    def __init__(self, event: threading.Event):
        self.event = event
        self.first: int | None = None
        self.writing = False  # once set, signals are only noted
        self.ignored = 0
        self.repeated = 0  # signals after the first, while solving
        self.interrupt_on_repeat = True  # False: a repeat is only counted (MPI followers: rank 0 acts on it)

    def handler(self, signum, frame):
        if self.writing:
            self.ignored += 1
            return
        if self.event.is_set():
            self.repeated += 1
            if self.interrupt_on_repeat:
                raise KeyboardInterrupt
            return
        self.first = signum
        self.event.set()

    def note(self, report: dict) -> None:
        """Name the signal in a cancelled run's message ("... (stopped by SIGTERM)")."""
        if self.first is not None and report.get("status") == "cancelled":
            report["message"] += f" (stopped by {self.name})"

    @property
    def name(self) -> str:
        return signal.Signals(self.first).name if self.first is not None else ""


@contextmanager
def _stop_signals_to(event: threading.Event):
    """SIGINT, SIGTERM and SIGHUP set ``event`` (the run ends cleanly); a second one interrupts,
    except while the outputs are being written (``state.writing``).

    A hang-up that is ignored (``SIG_IGN``) when this is entered stays ignored: ``nohup`` starts a
    program with SIGHUP ignored so that it outlives its terminal (POSIX ``nohup``; common
    practice). SIGINT and SIGTERM always stop the run: a non-interactive shell starts a
    background job with SIGINT ignored, and a script that sends ``kill -INT`` to it means it."""
    state = _Signals(event)
    previous = {}
    try:
        for sig in STOP_SIGNALS:
            if sig == getattr(signal, "SIGHUP", None) and signal.getsignal(sig) == signal.SIG_IGN:
                continue
            previous[sig] = signal.signal(sig, state.handler)
    except ValueError:  # not in the main thread
        for sig, old in previous.items():
            signal.signal(sig, old)
        yield state
        return
    try:
        yield state
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)


def leave_hung_up_terminal() -> bool:
    """Point standard input, output and error at /dev/null where they are a terminal that has hung up
    (a tty whose every call fails with EIO), so that nothing still written there fails (the progress
    display, the summary, the TUI's last frames); True if one was. ``relaxtui solve`` and ``relaxtui
    open`` call it once a stop signal has come: an SSH drop hangs the terminal up and sends SIGHUP."""
    import errno
    import stat
    import termios

    dead = []
    for fd in (0, 1, 2):
        try:
            if not stat.S_ISCHR(os.fstat(fd).st_mode):
                continue
            termios.tcgetattr(fd)
        except termios.error as exc:
            if exc.args and exc.args[0] == errno.EIO:
                dead.append(fd)
        except OSError:
            continue
    if not dead:
        return False
    try:
        null = os.open(os.devnull, os.O_RDWR)
    except OSError:
        return True
    for fd in dead:
        try:
            os.dup2(null, fd)
        except OSError:
            pass
    os.close(null)
    return True


# kept for callers of the previous name (Ctrl-C only behaved the same way)
_sigint_to = _stop_signals_to


def exit_code(status: str) -> int:
    """The exit code of a run that wrote its outputs, from the report's status alone: 0 converged,
    130 cancelled (a stop signal), 1 any other end. A signal that arrives as the run converges, or
    while the outputs are written, leaves the status, and so the code, what the run reached."""
    if status == "converged":
        return EXIT_CONVERGED
    return EXIT_INTERRUPTED if status == "cancelled" else EXIT_NOT_CONVERGED


def _default_outputs(args, case):
    """Paths of field, report and history: the ones given, else next to the current folder."""
    given = [args.out, args.report, args.history, args.picture, args.vtk, args.bundle, getattr(args, "probes", None)]
    if any(p is not None for p in given):
        return args.out, args.report, args.history
    stem = case.name
    return f"{stem}.field.npy", f"{stem}.report.json", f"{stem}.history.csv"


def check_output_set(outputs: dict, inputs: dict) -> None:
    """Refuse (OutputError, before any work) an output set that would clobber itself or an input.

    ``outputs`` maps what ("field", "report", ...) to a path or None;
    ``inputs`` maps what ("case file", "picture", "initial field") to a path or None.
    Refused: a missing or unwritable folder, a path that exists and is not a
    regular file, two outputs on one path, an output that is one of the inputs.
    """
    from relaxtui.errors import OutputError
    from relaxtui.output.atomic import check_target

    seen: dict = {}
    ins = {}
    for what, path in inputs.items():
        if path is not None:
            ins[_identity(path)] = (what, path)
    for what, path in outputs.items():
        if path is None:
            continue
        check_target(path, what)
        key = _identity(path)
        if key in seen:
            other = seen[key]
            raise OutputError(f"the {what} and the {other} would both be written to {str(path)!r}; give them different paths")
        if key in ins:
            in_what, in_path = ins[key]
            raise OutputError(f"the {what} would overwrite the {in_what} {str(in_path)!r}; choose another path")
        seen[key] = what


def _identity(path):
    """A key equal for two names of one file: (device, inode) when it exists, else the resolved path."""
    try:
        st = os.stat(path)
        return ("inode", st.st_dev, st.st_ino)
    except OSError:
        return ("path", os.path.realpath(path))


def _check_picture_options(args, case) -> None:
    """The picture's size from --scale, before any work (the exact layout adds a colour-bar panel)."""
    if not getattr(args, "picture", None):
        return
    from relaxtui.errors import UsageError
    from relaxtui.output.pictures import MAX_PICTURE_PIXELS

    s = int(args.scale or 1)
    rows, cols = case.shape
    if (cols * s + 64) * max(rows * s, 64) > MAX_PICTURE_PIXELS:
        raise UsageError(f"--scale {s}: the picture would be at least {cols * s} x {rows * s} pixels "
                         f"(more than {MAX_PICTURE_PIXELS:,}); use a smaller scale")


def _load_initial(path, case):
    """``--initial``: a regular file holding a finite field on every interior cell; warns when a report
    beside it describes a different field."""
    import numpy as np

    from relaxtui.case.picture import require_regular_file
    from relaxtui.errors import CaseError, UsageError
    from relaxtui.output.fields import load_field

    label = f"initial field {str(path)!r}"
    try:
        require_regular_file(path, label, "numpy file")
    except CaseError as exc:
        raise UsageError(str(exc)) from None
    initial = load_field(path, case.shape)
    interior = case.kind_codes()[case.codes] == 0  # model.INTERIOR
    bad = interior & ~np.isfinite(initial)
    if bad.any():
        row, col = (int(v[0]) for v in np.nonzero(bad))
        raise UsageError(f"{label}: not a finite number at interior cell row {row}, column {col} "
                         f"({int(bad.sum())} such cells)")
    warn_if_mismatched(path)
    return initial


def warn_if_mismatched(path) -> None:
    """Print a warning when a report beside ``path`` lists it with another checksum (a broken set)."""
    from relaxtui.output.report import check_against_reports

    for message in check_against_reports(path):
        print(f"relaxtui: warning: {message}", file=sys.stderr)


def run(args) -> int:
    from relaxtui.parallel import launched_ranks

    if launched_ranks() > 1:  # started by mpiexec: only then is mpi4py imported
        from relaxtui.parallel.solve import run as run_on_ranks

        code = run_on_ranks(args)
        if code is not None:
            return code
    from relaxtui.case import load_case
    from relaxtui.output.atomic import clean_stale_temps, pause_for_tests
    from relaxtui.solver.driver import Run, resolve_options

    case = load_case(args.case, method=args.method, precision=getattr(args, "precision", None))
    out, report_path, history_path = _default_outputs(args, case)
    probes_path = getattr(args, "probes", None)
    if probes_path is not None and not case.probes:
        from relaxtui.errors import UsageError

        raise UsageError(f"--probes {probes_path}: the case declares no [[probe]] to record")
    outputs = {"field": out, "report": report_path, "history": history_path, "picture": args.picture,
               "VTK file": args.vtk, "bundle": args.bundle, "probe log": probes_path}
    check_output_set(outputs, {"case file": args.case, "picture": case.mask_path, "initial field": args.initial})
    _check_picture_options(args, case)
    # every solver option is validated before anything is loaded or solved
    precision = getattr(args, "precision", None)
    resolve_options(case, args.method, args.omega, args.tolerance, args.max_sweeps, args.time_limit, precision)
    initial = _load_initial(args.initial, case) if args.initial is not None else None
    # the Jacobi radius of the case's operator is cached beside the outputs (a second solve then starts at once)
    first = next((p for p in (report_path, out, history_path, args.picture, args.vtk, args.bundle) if p is not None), None)
    cache = Path(first).resolve().parent if first is not None else None
    run = Run(case, method=args.method, omega=args.omega, tolerance=args.tolerance, max_sweeps=args.max_sweeps,
              time_limit=args.time_limit, initial=initial, radius_cache=cache, precision=precision)
    if run.precision_request == "single" and run.method_info.kernel is None and not args.quiet:
        print(f"relaxtui solve: note: single precision applies to the relaxation methods; {run.method} runs in "
              "double precision (the report's precision says so)", file=sys.stderr)
    for path in outputs.values():
        if path is not None:
            clean_stale_temps(path)
    interrupted = threading.Event()
    with _stop_signals_to(interrupted) as signals:
        display = _Display(run, quiet=args.quiet)
        display.start("preparing")
        run.on_prepare = display.stage
        run.prepare()
        steps = 0
        while not run.done:
            if interrupted.is_set():
                run.cancel()
            display.update(run.step(0.25))
            steps += 1
            if steps <= 2:
                pause_for_tests("solving" if steps == 1 else "solving:2")
        pause_for_tests("solved")  # the run has ended (a signal now changes nothing but the wait)
        signals.writing = True  # from here on a signal never aborts: the set is finished first
        # a hang-up (an SSH drop) leaves a terminal every write to which fails: the progress display's
        # last frame raised there before a thing was written (seen in tmux: kill-session, no output set)
        leave_hung_up_terminal()
        display.stop()
        if run.operator is not None:  # nothing runs on this operator again: an unfinished estimate frees its vectors
            run.operator.radius_job().discard()
        result = run.result()
        signals.note(result.report)
        written = _write_all(result, args, out, report_path, history_path)
    if not args.quiet:
        _summary(result, written)
    return exit_code(result.report["status"])


def _write_all(result, args, out, report_path, history_path) -> list[Path]:
    """Write the output set: every temporary file first, then the renames (report last)."""
    from relaxtui.output.sets import write_run_outputs

    return write_run_outputs(result, out=out, report=report_path, history=history_path, picture=args.picture,
                             vtk=args.vtk, bundle=args.bundle, scale=args.scale, isolines=args.isolines,
                             probes=getattr(args, "probes", None))


def _summary(result, written) -> None:
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    from relaxtui.errors import printable

    def safe(text) -> str:  # user strings: no control characters, no rich markup
        return escape(printable(text))

    r = result.report
    con = Console(highlight=False)
    style = "green" if r["status"] == "converged" else "yellow"
    unit = f" {safe(r['unit'])}" if r["unit"] else ""
    con.print(f"[bold {style}]{r['status']}[/]: {safe(r['message'])}")
    con.print(f"  {r['method']}, omega {r['omega']:.4f} ({safe(r['omega_note'])})")
    if r.get("precision", "double") != "double" or r.get("precision_note"):
        con.print(f"  {r['precision']} precision: {safe(r['precision_note'])}")
    con.print(f"  {group(r['sweeps'])} sweeps in {r['seconds']:.2f} s (+{r['prepare_seconds']:.2f} s set-up); "
              f"largest residual {_g(r['residual'])}{unit}; factor {_g(r['convergence_factor'], 6)}")
    if r["min"] is not None:
        for key in ("min", "max"):
            at = r[f"{key}_at"]
            con.print(f"  {key} {r[key]:.6g}{unit} at row {at['row']}, col {at['col']} "
                      f"(x {at['x']:.4g} m, y {at['y']:.4g} m)")
    if r.get("mask_outside_case_folder"):
        con.print(f"  picture read from outside the case's folder: {safe(r['mask'])}")
    if r["flows"]:
        t = Table(title="flows into the domain", title_justify="left", box=None, pad_edge=False)
        t.add_column("  region")
        t.add_column("flow", justify="right")
        for name, v in r["flows"].items():
            t.add_row(f"  {safe(name)}", _g(v, 6))
        t.add_row("  sources", _g(r["source_total"], 6))
        t.add_row("  imbalance", _g(r["imbalance"], 3))
        con.print(t)
    if r.get("probes"):
        con.print("  probes: " + ", ".join(f"{name} {_g(v, 6)}{unit}" for name, v in r["probes"].items()))
    for p in written:
        con.print(f"wrote {safe(p)}")
    con.print(f"[dim]{r['caution']}[/]")


def _g(x, digits: int = 4) -> str:
    return "n/a" if x is None else f"{x:.{digits}g}"


def _best_effort(method):
    """A display method whose writes may fail (stderr a closed pipe, a terminal that has hung up): the
    display then falls silent and the run goes on to write its outputs."""
    import functools

    @functools.wraps(method)
    def wrapped(self, *args):
        try:
            return method(self, *args)
        except OSError:
            self.quiet = True
            self._progress = None

    return wrapped


class _Display:
    """Rich progress on a terminal's stderr; plain lines every few seconds otherwise. Progress only:
    a failing write silences it (:func:`_best_effort`), it never ends the run."""

    def __init__(self, run, quiet: bool):
        self.run = run
        self.quiet = quiet
        self.live = not quiet and sys.stderr.isatty()
        self._progress = None
        self._task = None
        self._last_line = 0.0
        self._e0 = None

    @_best_effort
    def start(self, text: str) -> None:
        if self.quiet:
            return
        if self.live:
            from rich.console import Console
            from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

            self._progress = Progress(
                TextColumn("{task.description}"),
                BarColumn(),
                TextColumn("{task.fields[info]}"),
                TimeElapsedColumn(),
                console=Console(stderr=True),
                transient=True,
            )
            self._progress.start()
            self._task = self._progress.add_task(text, total=1.0, info="")
        else:
            print(f"relaxtui: {text}", file=sys.stderr, flush=True)

    @_best_effort
    def stage(self, text: str) -> None:
        """What the preparation is doing now (assembly, kernels, Lanczos steps so far)."""
        if self.quiet:
            return
        if self.live:
            self._progress.update(self._task, description=f"preparing: {text}", info="")
            return
        kind = text.split(":")[0]  # a new stage is printed at once, the same one's progress every 5 s
        if kind != getattr(self, "_stage_kind", None) or time.monotonic() - self._last_line >= 5.0:
            self._stage_kind = kind
            self._last_line = time.monotonic()
            print(f"relaxtui: preparing: {text}", file=sys.stderr, flush=True)

    @_best_effort
    def update(self, p) -> None:
        if self.quiet:
            return
        err = p.estimated_error
        eta = "" if p.eta_seconds is None else f" ETA {p.eta_seconds:.0f} s"
        # no rate where the last step swept nothing (a stop between chunks): 0 would not be a measurement
        rate = f"  {p.mcells_per_s:.0f} Mcell/s" if p.mcells_per_s > 0 else ""
        info = (f"sweep {group(p.sweeps)}  error {err:.2g} / {p.tolerance:.2g}{eta}{rate}"
                if math.isfinite(err) else f"sweep {group(p.sweeps)}  error not yet estimable{rate}")
        if p.background:
            info += f"  ({p.background})"
        if self.live:
            # progress on a log scale: from the first finite estimate down to the tolerance
            frac = 0.0
            if math.isfinite(err) and err > 0:
                if self._e0 is None:
                    self._e0 = max(err, p.tolerance * 10)
                span = math.log(self._e0 / p.tolerance)
                frac = min(1.0, max(0.0, math.log(self._e0 / err) / span)) if span > 0 else 1.0
            elif err == 0:
                frac = 1.0
            self._progress.update(self._task, completed=frac, info=info, description=f"{p.method} omega {p.omega:.4f}")
        elif time.monotonic() - self._last_line >= 5.0 or p.status:
            self._last_line = time.monotonic()
            print(f"relaxtui: {info}", file=sys.stderr, flush=True)

    @_best_effort
    def stop(self) -> None:
        if self._progress is not None:
            self._progress.stop()
