"""``relaxtui solve`` and ``relaxtui sweep``: headless solves from the command line.

Exit codes: 0 converged; 1 ran but did not converge (sweep-limit, time-limit,
stalled, diverged); 2 bad input or options; 130 interrupted (the outputs are
still written, with status ``cancelled``).
"""

from __future__ import annotations

import math
import signal
import sys
import threading
import time
from contextlib import contextmanager
from pathlib import Path

from relaxtui.output.text import group

EXIT_CONVERGED, EXIT_NOT_CONVERGED, EXIT_INTERRUPTED = 0, 1, 130


@contextmanager
def _sigint_to(event: threading.Event):
    """The first Ctrl-C sets ``event`` (the run ends cleanly); a second one interrupts."""
    previous = signal.getsignal(signal.SIGINT)

    def handler(signum, frame):
        if event.is_set():
            signal.signal(signal.SIGINT, previous)
            raise KeyboardInterrupt
        event.set()

    try:
        signal.signal(signal.SIGINT, handler)
    except ValueError:  # not in the main thread
        yield
        return
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)


def _default_outputs(args, case):
    """Paths of field, report and history: the ones given, else next to the current folder."""
    given = [args.out, args.report, args.history, args.picture, args.vtk, args.bundle]
    if any(p is not None for p in given):
        return args.out, args.report, args.history
    stem = case.name
    return f"{stem}.field.npy", f"{stem}.report.json", f"{stem}.history.csv"


def run(args) -> int:
    from relaxtui.parallel import launched_ranks

    if launched_ranks() > 1:  # started by mpiexec: only then is mpi4py imported
        from relaxtui.parallel.solve import run as run_on_ranks

        code = run_on_ranks(args)
        if code is not None:
            return code
    from relaxtui.case import load_case
    from relaxtui.solver.driver import Run, check_outputs

    case = load_case(args.case)
    out, report_path, history_path = _default_outputs(args, case)
    check_outputs(field=out, report=report_path, history=history_path, picture=args.picture, vtk=args.vtk, bundle=args.bundle)
    initial = None
    if args.initial is not None:
        from relaxtui.output.fields import load_field

        initial = load_field(args.initial, case.shape)
    # the Jacobi radius of the case's operator is cached beside the outputs (a second solve then starts at once)
    first = next((p for p in (report_path, out, history_path, args.picture, args.vtk, args.bundle) if p is not None), None)
    cache = Path(first).resolve().parent if first is not None else None
    run = Run(case, method=args.method, omega=args.omega, tolerance=args.tolerance, max_sweeps=args.max_sweeps,
              time_limit=args.time_limit, initial=initial, radius_cache=cache)
    interrupted = threading.Event()
    with _sigint_to(interrupted):
        display = _Display(run, quiet=args.quiet)
        display.start("preparing")
        run.on_prepare = display.stage
        run.prepare()
        while not run.done:
            if interrupted.is_set():
                run.cancel()
            display.update(run.step(0.25))
        display.stop()
        result = run.result()
        written = _write_all(result, args, out, report_path, history_path)
    if not args.quiet:
        _summary(result, written)
    if interrupted.is_set():
        return EXIT_INTERRUPTED
    return EXIT_CONVERGED if result.report["status"] == "converged" else EXIT_NOT_CONVERGED


def _write_all(result, args, out, report_path, history_path) -> list[Path]:
    from relaxtui.solver.driver import write_outputs

    written = write_outputs(result, out=out, report=report_path, history=history_path)
    if args.picture or args.vtk or args.bundle:
        from relaxtui.output import fields, pictures

        if args.picture:
            pictures.write_picture(args.picture, result.field, result.case, scale=args.scale, isolines=args.isolines)
            written.append(Path(args.picture))
        if args.vtk:
            fields.write_vtk(args.vtk, result.field, result.case)
            written.append(Path(args.vtk))
        if args.bundle:
            fields.write_bundle(args.bundle, field=result.field, case=result.case, history=result.history, report=result.report)
            written.append(Path(args.bundle))
    return written


def _summary(result, written) -> None:
    from rich.console import Console
    from rich.table import Table

    r = result.report
    con = Console(highlight=False)
    style = "green" if r["status"] == "converged" else "yellow"
    unit = f" {r['unit']}" if r["unit"] else ""
    con.print(f"[bold {style}]{r['status']}[/]: {r['message']}")
    con.print(f"  {r['method']}, omega {r['omega']:.4f} ({r['omega_note']})")
    con.print(f"  {group(r['sweeps'])} sweeps in {r['seconds']:.2f} s (+{r['prepare_seconds']:.2f} s set-up); "
              f"largest residual {_g(r['residual'])}{unit}; factor {_g(r['convergence_factor'], 6)}")
    if r["min"] is not None:
        for key in ("min", "max"):
            at = r[f"{key}_at"]
            con.print(f"  {key} {r[key]:.6g}{unit} at row {at['row']}, col {at['col']} "
                      f"(x {at['x']:.4g} m, y {at['y']:.4g} m)")
    if r["flows"]:
        t = Table(title="flows into the domain", title_justify="left", box=None, pad_edge=False)
        t.add_column("  region")
        t.add_column("flow", justify="right")
        for name, v in r["flows"].items():
            t.add_row(f"  {name}", _g(v, 6))
        t.add_row("  sources", _g(r["source_total"], 6))
        t.add_row("  imbalance", _g(r["imbalance"], 3))
        con.print(t)
    for p in written:
        con.print(f"wrote {p}")
    con.print(f"[dim]{r['caution']}[/]")


def _g(x, digits: int = 4) -> str:
    return "n/a" if x is None else f"{x:.{digits}g}"


class _Display:
    """Rich progress on a terminal's stderr; plain lines every few seconds otherwise."""

    def __init__(self, run, quiet: bool):
        self.run = run
        self.quiet = quiet
        self.live = not quiet and sys.stderr.isatty()
        self._progress = None
        self._task = None
        self._last_line = 0.0
        self._e0 = None

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

    def stage(self, text: str) -> None:
        """What the preparation is doing now (assembly, kernels, Lanczos steps so far)."""
        if self.quiet:
            return
        if self.live:
            self._progress.update(self._task, description=f"preparing: {text}", info="")
        elif time.monotonic() - self._last_line >= 5.0 or "Lanczos" not in text:
            self._last_line = time.monotonic()
            print(f"relaxtui: preparing: {text}", file=sys.stderr, flush=True)

    def update(self, p) -> None:
        if self.quiet:
            return
        err = p.estimated_error
        eta = "" if p.eta_seconds is None else f" ETA {p.eta_seconds:.0f} s"
        info = (f"sweep {group(p.sweeps)}  error {err:.2g} / {p.tolerance:.2g}{eta}  {p.mcells_per_s:.0f} Mcell/s"
                if math.isfinite(err) else f"sweep {group(p.sweeps)}  error not yet estimable  {p.mcells_per_s:.0f} Mcell/s")
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

    def stop(self) -> None:
        if self._progress is not None:
            self._progress.stop()
