"""``mpiexec -n P relaxtui solve CASE.toml [options]``: the headless solve across MPI ranks.

Same options, outputs, report keys and exit codes as the single-process
command (:mod:`relaxtui.commands.solve`, whose display, output writer and
summary are reused): rank 0 loads and checks the case, leads the solve and
writes every output once (atomically, the same files); the other ranks hold
their strips and follow (:mod:`relaxtui.parallel.group`).

Methods: Jacobi and red-black SOR (the same fields as one process for the
same sweeps) and multigrid (the same iterations to rounding, see
:mod:`relaxtui.parallel.multigrid`). Lexicographic Gauss-Seidel, SOR and
symmetric SOR are refused with a one-line message and exit code 2.

Signals: SIGINT (Ctrl-C; mpiexec forwards it to every rank) and SIGTERM
(also forwarded) end the run on rank 0 like the first Ctrl-C of a
single-process run: status ``cancelled``, the current field and report
written, exit code 130. The other ranks ignore them and follow rank 0.
"""

from __future__ import annotations

import signal
import sys
import threading
from contextlib import contextmanager
from pathlib import Path

from relaxtui.errors import RelaxError, UsageError


@contextmanager
def _signals_to(event: threading.Event):
    """SIGINT and SIGTERM set ``event``; a second one raises KeyboardInterrupt."""
    previous = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}

    def handler(signum, frame):
        if event.is_set():
            for s, h in previous.items():
                signal.signal(s, h)
            raise KeyboardInterrupt
        event.set()

    for s in previous:
        signal.signal(s, handler)
    try:
        yield
    finally:
        for s, h in previous.items():
            signal.signal(s, h)


def _ignore_signals() -> None:
    for s in (signal.SIGINT, signal.SIGTERM):
        signal.signal(s, lambda signum, frame: None)


def run(args) -> int | None:
    """Run ``relaxtui solve`` as one rank of an MPI job; None if the job has one rank (solve as usual)."""
    from relaxtui.parallel.comm import install_guard, mpi, set_threads

    try:
        MPI = mpi()
    except ImportError:
        raise UsageError("started by an MPI launcher, but mpi4py is not installed: pip install 'relaxtui[mpi]' "
                         "(or run without mpiexec)") from None
    comm = MPI.COMM_WORLD
    if comm.Get_size() == 1:
        return None
    install_guard(comm, "solve")
    threads = set_threads(comm)
    if comm.Get_rank() != 0:
        from relaxtui.parallel.group import follow

        _ignore_signals()
        return follow(comm, threads)
    from relaxtui.parallel.group import Group

    group = Group(comm)
    try:
        code = _lead(comm, group, args, threads)
    except (RelaxError, KeyboardInterrupt) as exc:
        if group.busy:
            from relaxtui.parallel.comm import abort, one_line

            abort(comm, getattr(exc, "exit_code", 130), f"relaxtui solve: error: {one_line(exc)}")
        group.stop(getattr(exc, "exit_code", 130))
        raise
    return code


def _lead(comm, group, args, threads: int) -> int:
    from relaxtui.case import load_case
    from relaxtui.commands.solve import (EXIT_CONVERGED, EXIT_INTERRUPTED, EXIT_NOT_CONVERGED, _default_outputs,
                                         _Display, _summary, _write_all)
    from relaxtui.parallel.group import DISTRIBUTED_METHODS, STEPPED_METHODS, DistributedOperator, refusal
    from relaxtui.solver.driver import Run, check_outputs

    case = load_case(args.case, method=args.method, precision=getattr(args, "precision", None))
    out, report_path, history_path = _default_outputs(args, case)
    check_outputs(field=out, report=report_path, history=history_path, picture=args.picture, vtk=args.vtk, bundle=args.bundle)
    initial = None
    if args.initial is not None:
        from relaxtui.output.fields import load_field

        initial = load_field(args.initial, case.shape)
    # the Jacobi radius is cached beside the outputs, as in one process (same file, either can reuse it)
    first = next((p for p in (report_path, out, history_path, args.picture, args.vtk, args.bundle) if p is not None), None)
    cache = Path(first).resolve().parent if first is not None else None
    run = Run(case, method=args.method, omega=args.omega, tolerance=args.tolerance, max_sweeps=args.max_sweeps,
              time_limit=args.time_limit, initial=initial, radius_cache=cache, precision=getattr(args, "precision", None))
    if run.method not in DISTRIBUTED_METHODS + STEPPED_METHODS:
        raise UsageError(refusal(run.method))
    interrupted = threading.Event()
    with _signals_to(interrupted):
        if not args.quiet:
            print(f"relaxtui: {comm.Get_size()} MPI ranks x {threads} numba thread{'s' if threads != 1 else ''}",
                  file=sys.stderr, flush=True)
        run.operator = DistributedOperator(case, group, threads, multigrid=run.method in STEPPED_METHODS)
        display = _Display(run, quiet=args.quiet)
        display.start("preparing")
        run.on_prepare = display.stage
        run.prepare()
        run._initial = None  # scattered to the strips: rank 0 need not keep the whole grid's copy
        while not run.done:
            if interrupted.is_set():
                run.cancel()
            display.update(run.step(0.25))
        display.stop()
        result = run.result()
        written = _write_all(result, args, out, report_path, history_path)
    if interrupted.is_set():
        code = EXIT_INTERRUPTED
    else:
        code = EXIT_CONVERGED if result.report["status"] == "converged" else EXIT_NOT_CONVERGED
    group.stop(code)
    if not args.quiet:
        _summary(result, written)
    return code
