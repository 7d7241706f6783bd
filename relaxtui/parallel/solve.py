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

Signals: every rank handles SIGINT (Ctrl-C; mpiexec forwards it to every
rank), SIGTERM (also forwarded) and SIGHUP with the single-process handler
(:func:`relaxtui.commands.solve._stop_signals_to`; a hang-up a rank was started
with ignored stays ignored there, as under ``nohup``); the ranks agree on them
(:mod:`relaxtui.parallel.stop`) between steps and between the phases of the
set-up, and the run ends as a single-process run does: status ``cancelled``
("(stopped by SIGTERM)"), the current field and report written, the exit
code of the report's status (130). A repeated signal before the writing
stops the job at once without writing (exit code 130).
"""

from __future__ import annotations

import sys
import threading
from pathlib import Path

from relaxtui.errors import RelaxError, UsageError


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
    from relaxtui.commands.solve import _stop_signals_to
    from relaxtui.parallel import stop

    if comm.Get_rank() != 0:
        from relaxtui.parallel.group import follow

        with _stop_signals_to(threading.Event()) as signals:
            signals.interrupt_on_repeat = False  # counted; rank 0 acts on it at the next agreement
            stop.install(signals)
            try:
                return follow(comm, threads)
            finally:
                stop.install(None)
    from relaxtui.parallel.group import Group

    group = Group(comm)
    try:
        code = _lead(comm, group, args, threads)
    except (RelaxError, KeyboardInterrupt) as exc:
        if group.busy:
            from relaxtui.parallel.comm import abort, one_line

            text = "interrupted" if isinstance(exc, KeyboardInterrupt) else f"error: {one_line(exc)}"
            abort(comm, getattr(exc, "exit_code", 130), f"relaxtui solve: {text}")  # the CLI's wording
        group.stop(getattr(exc, "exit_code", 130))
        raise
    finally:
        stop.install(None)
    return code


def _lead(comm, group, args, threads: int) -> int:
    from relaxtui.case import load_case
    from relaxtui.commands.solve import (_default_outputs, _Display, _stop_signals_to, _summary, _write_all, exit_code,
                                        leave_hung_up_terminal)
    from relaxtui.parallel import stop
    from relaxtui.parallel.group import DISTRIBUTED_METHODS, STEPPED_METHODS, DistributedOperator, refusal
    from relaxtui.output.atomic import pause_for_tests
    from relaxtui.solver.driver import Run, check_outputs

    from relaxtui.parallel.comm import alone

    with alone():  # the other ranks sleep meanwhile (reading the picture, the case's checks)
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
    with _stop_signals_to(interrupted) as signals:
        stop.install(signals)
        if not args.quiet:
            print(f"relaxtui: {comm.Get_size()} MPI ranks x {threads} numba thread{'s' if threads != 1 else ''}",
                  file=sys.stderr, flush=True)
        run.operator = DistributedOperator(case, group, threads, multigrid=run.method in STEPPED_METHODS)
        display = _Display(run, quiet=args.quiet)
        display.start("preparing")
        run.on_prepare = display.stage
        run.prepare()  # a signal during the set-up cuts it short (relaxtui.parallel.stop): the run then cancels
        run._initial = None  # scattered to the strips: rank 0 need not keep the whole grid's copy
        steps = 0
        while not run.done:
            group.check_stop()  # every rank's signals, agreed: rank 0's event is set by any of them
            if interrupted.is_set():
                run.cancel()
            display.update(run.step(0.25))
            steps += 1
            if steps == 1:
                pause_for_tests("solving")
        pause_for_tests("solved")
        signals.writing = True  # from here on a signal never aborts: the set is finished first
        group.check_stop(writing=True)  # the followers too
        leave_hung_up_terminal()  # as in one process (relaxtui.commands.solve.run)
        display.stop()
        if run.operator is not None:  # as in one process: an unfinished estimate frees its arrays first
            run.operator.radius_job().discard()
        result = run.result()
        signals.note(result.report)
        with alone():  # the field is gathered: the other ranks sleep until the outputs are written
            written = _write_all(result, args, out, report_path, history_path)
    code = exit_code(result.report["status"])
    try:
        if not args.quiet:  # before the stop: the other ranks sleep meanwhile instead of spinning in MPI's finalize
            _summary(result, written)
    finally:
        group.stop(code)
    return code
