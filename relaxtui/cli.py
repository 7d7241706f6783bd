"""The ``relaxtui`` command line.

This module must stay light: ``relaxtui --help`` imports neither numba nor
textual. Each subcommand's handler is imported only when it runs.
"""

from __future__ import annotations

import argparse
import os
import sys

from relaxtui.errors import RelaxError, UsageError, printable
from relaxtui.options import (
    argparse_type,
    parse_max_sweeps,
    parse_method,
    parse_omega,
    parse_precision,
    parse_time_limit,
    parse_tolerance,
)
from relaxtui.options import PRECISIONS
from relaxtui.solver.methods import METHOD_NAMES, OMEGA_SCAN_METHODS

SUBCOMMANDS = ("init", "info", "solve", "sweep", "open", "render")


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line error and exit status 2."""

    def error(self, message):  # noqa: D401 - argparse API
        self.exit(2, f"{self.prog}: error: {message}\n")


def _positive_int(name):
    def parse(text):
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{name} must be a whole number, not {text!r}")
        if value < 1:
            raise argparse.ArgumentTypeError(f"{name} must be at least 1, got {value}")
        return value

    return parse


def _add_solver_options(p: argparse.ArgumentParser, *, omega: bool = True) -> None:
    p.add_argument("--method", type=argparse_type(parse_method), metavar="{" + ",".join(METHOD_NAMES) + "}",
                   help="relaxation method (default: the case's [solver] table, else red-black-sor)")
    if omega:
        p.add_argument("--omega", type=argparse_type(parse_omega), metavar="W|auto", help="relaxation factor in (0, 2), or 'auto' to estimate the optimum")
    _add_limits(p)


def _add_limits(p: argparse.ArgumentParser, time_help: str | None = None) -> None:
    p.add_argument("--tolerance", type=argparse_type(parse_tolerance), metavar="T", help="largest error left in the field, in the case's unit")
    p.add_argument("--max-sweeps", type=argparse_type(parse_max_sweeps), metavar="N", help="stop after N sweeps (or cycles)")
    if time_help is not None:
        p.add_argument("--time-limit", type=argparse_type(parse_time_limit), metavar="S", help=time_help)


def _add_precision(p: argparse.ArgumentParser, what: str = "the working field's storage") -> None:
    p.add_argument("--precision", type=argparse_type(parse_precision), metavar="{" + ",".join(PRECISIONS) + "}",
                   help=f"{what}: double (float64) or single (float32, relaxation methods; the exported field "
                        "stays float64). Default: the case's [solver] table, else double")


def _add_picture_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--scale", type=_positive_int("scale"), default=1, metavar="K", help="picture pixels per cell (integer, default 1)")
    p.add_argument("--isolines", type=_positive_int("isolines"), metavar="N", help="draw N evenly spaced isolines on the picture")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="relaxtui",
        description="Steady-state field studies (Laplace and Poisson) on 2-D grids drawn as PNG pictures.",
        epilog="`relaxtui CASE.toml` is short for `relaxtui open CASE.toml`.",
    )
    parser.add_argument("--version", action=_VersionAction)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("init", help="write a starter case file for a picture", description="Write a starter case TOML next to MASK.png: one region per colour, kinds left for you to choose.")
    p.add_argument("mask", metavar="MASK.png")
    p.add_argument("-o", "--output", metavar="CASE.toml", help="where to write (default: the picture's name with .toml)")
    p.add_argument("--force", action="store_true", help="overwrite an existing file")

    p = sub.add_parser("info", help="describe a case: grid, regions, faces, memory", description="Load a case and print its grid, regions and the memory a solve needs.")
    p.add_argument("case", metavar="CASE.toml")
    p.add_argument("--ranks", type=_positive_int("ranks"), metavar="P",
                   help="also print the memory each of P MPI ranks needs (mpiexec -n P relaxtui solve)")
    _add_precision(p, "the storage the memory estimate assumes")

    p = sub.add_parser("solve", help="solve a case headless and write field, report and history", description="Solve a case to its tolerance without a screen.")
    p.add_argument("case", metavar="CASE.toml")
    _add_solver_options(p)
    p.add_argument("--time-limit", type=argparse_type(parse_time_limit), metavar="S", help="stop after S seconds, set-up included (outputs are still written)")
    _add_precision(p)
    p.add_argument("--initial", metavar="FIELD.npy", help="start from this field (.npy, or a .npz bundle) instead of the default guess")
    p.add_argument("--out", metavar="FIELD.npy", help="write the field (float64, NaN outside the domain)")
    p.add_argument("--report", metavar="REPORT.json", help="write the report")
    p.add_argument("--history", metavar="HIST.csv", help="write the per-sweep history")
    p.add_argument("--probes", metavar="PROBES.csv", help="write the [[probe]] values after every chunk (columns sweep,seconds,<name>...)")
    p.add_argument("--picture", metavar="FIELD.png", help="write a colour picture of the field")
    p.add_argument("--vtk", metavar="FIELD.vti", help="write the field as VTK ImageData XML")
    p.add_argument("--bundle", metavar="RUN.npz", help="write field, codes, history and report in one numpy archive")
    _add_picture_options(p)
    p.add_argument("-q", "--quiet", action="store_true", help="print nothing but errors")

    p = sub.add_parser("sweep", help="compare relaxation factors or methods on one case", description="Solve once per setting at the same tolerance and tabulate sweeps, seconds and factor.")
    p.add_argument("case", metavar="CASE.toml")
    p.add_argument("--omega", metavar="START:STOP:STEP", help="relaxation factors to try, e.g. 1.80:1.99:0.01")
    p.add_argument("--method", type=argparse_type(parse_method), metavar="M",
                   help=f"method for the omega range ({' or '.join(OMEGA_SCAN_METHODS)}, default red-black-sor)")
    p.add_argument("--methods", metavar="M1,M2,...", help="methods to compare, each at auto omega")
    _add_limits(p, "time limit per solve, its set-up included")
    _add_precision(p, "the working field's storage of every solve")
    p.add_argument("--csv", metavar="FILE", help="also write the table as CSV")
    p.add_argument("-q", "--quiet", action="store_true")

    p = sub.add_parser("open", help="open a case in the terminal UI", description="Watch and tune a solve in the terminal UI.")
    p.add_argument("case", metavar="CASE.toml")
    _add_solver_options(p)
    _add_precision(p, "the working field's storage of the first run (p in the UI changes it)")
    p.add_argument("--run", action="store_true", help="start solving at once")

    p = sub.add_parser("render", help="draw a saved field as a PNG picture", description="Draw a field (.npy) of a case as a colour picture with a colour bar.")
    p.add_argument("field", metavar="FIELD.npy")
    p.add_argument("--case", required=True, metavar="CASE.toml")
    p.add_argument("-o", "--output", required=True, metavar="FIELD.png")
    _add_picture_options(p)
    return parser


class _VersionAction(argparse.Action):
    """``--version``: the installed version, looked up only when asked for (the package metadata
    costs tens of milliseconds, which every other command would pay at parser build)."""

    def __init__(self, option_strings, dest=argparse.SUPPRESS, default=argparse.SUPPRESS, help=None):
        super().__init__(option_strings, dest=dest, default=default, nargs=0,
                         help=help or "show the program's version number and exit")

    def __call__(self, parser, namespace, values, option_string=None):
        print(f"relaxtui {_version()}")  # on stdout, as argparse's own version action does
        parser.exit()


def _version() -> str:
    try:
        from importlib.metadata import version

        return version("relaxtui")
    except Exception:  # not installed (running from a source tree)
        return "unknown"


def _handler(command: str):
    """The ``run(args) -> int`` of the command's module, imported only when called."""
    import importlib

    if command not in SUBCOMMANDS:  # pragma: no cover - argparse restricts the choices
        raise UsageError(f"unknown command {command!r}")
    return importlib.import_module(f"relaxtui.commands.{command}").run


def main(argv: list[str] | None = None) -> int:
    # numba's threads do the parallel work; OpenBLAS's own threads beside them
    # only spin against them on a small machine (set before numpy is imported).
    # OMP_NUM_THREADS stays alone: numba's OpenMP threading layer obeys it.
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    argv = list(sys.argv[1:] if argv is None else argv)
    if argv and argv[0] not in SUBCOMMANDS and not argv[0].startswith("-") and argv[0].endswith(".toml"):
        argv.insert(0, "open")
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    try:
        return int(_handler(args.command)(args) or 0)
    except RelaxError as exc:
        print(f"relaxtui {args.command}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print(f"relaxtui {args.command}: interrupted", file=sys.stderr)
        return 130
    except OSError as exc:  # the system refused a file operation no check foresaw (I/O error, full disk): one line
        where = f": {printable(exc.filename)!r}" if getattr(exc, "filename", None) else ""
        print(f"relaxtui {args.command}: error: {printable(exc.strerror or exc)}{where}", file=sys.stderr)
        return 2


def entry() -> None:
    """The installed ``relaxtui`` command: :func:`main`, then an exit that skips the interpreter's
    tear-down where nothing needs it.

    After a solve, Python's own shutdown (module teardown, numba's and LLVM's objects, the OpenMP
    layer) took 0.25-0.35 s of a 2.2 s multigrid solve (measured on 2047², load about 2) while
    every file was already written and closed. Here the streams are flushed and the ``atexit``
    handlers run as usual, then the process ends with ``os._exit``. It exits the normal way
    instead when something else may need the tear-down: a thread that is not a daemon still
    alive (or one registered to be joined at exit), a tracer or profiler installed, a stream that
    cannot be flushed, or ``RELAXTUI_NORMAL_EXIT`` set.

    Under mpiexec the rank finalises MPI itself (``MPI.Finalize``, collective: it returns when
    every rank has reached it) and ends with the C library's ``exit`` (see :func:`_c_exit`), not
    ``os._exit``; mpi4py's own finalisation runs in the interpreter's tear-down, which the quick
    exit skips. The tear-down of two ranks at once took
    0.3-0.5 s of a 7 s solve of the 4096² aquifer demo (measured, load about 1).
    """
    code = main()
    _exit(code)


def _exit(code) -> None:
    if not _quick_exit_safe() or not _flushed():
        raise SystemExit(code)
    import atexit

    run = getattr(atexit, "_run_exitfuncs", None)
    if run is None:  # pragma: no cover - every CPython has it
        raise SystemExit(code)
    run()
    if not _flushed():  # what the atexit handlers printed
        raise SystemExit(code)
    _flush_c_streams()
    under_mpi = "mpi4py.MPI" in sys.modules
    if not _finalize_mpi():
        raise SystemExit(code)
    status = int(code) & 0xFF if isinstance(code, int) else 1
    if under_mpi:
        _c_exit(status)  # returns only where there is no C library to call
        raise SystemExit(code)
    os._exit(status)


def _flushed() -> bool:
    """Flush stdout and stderr; False where that fails (a closed pipe, a full disk: the normal exit
    then reports it)."""
    try:
        for stream in (sys.stdout, sys.stderr):
            if stream is not None:
                stream.flush()
    except Exception:
        return False
    return True


def _quick_exit_safe() -> bool:
    """Whether nothing in the process needs the interpreter's normal shutdown (see :func:`entry`)."""
    if os.environ.get("RELAXTUI_NORMAL_EXIT"):
        return False
    if sys.gettrace() is not None or sys.getprofile() is not None:
        return False
    import threading

    main_thread = threading.main_thread()
    if threading.current_thread() is not main_thread:
        return False
    if any(t.is_alive() and not t.daemon for t in threading.enumerate() if t is not main_thread):
        return False
    if getattr(threading, "_threading_atexits", None):  # concurrent.futures pools join their workers there
        return False
    return True


def _finalize_mpi() -> bool:
    """Finalise MPI if mpi4py started it (True when nothing of MPI is left for the normal exit to do)."""
    if "mpi4py.MPI" not in sys.modules:
        return True
    try:
        MPI = sys.modules["mpi4py.MPI"]
        if MPI.Is_initialized() and not MPI.Is_finalized():
            MPI.Finalize()
        return bool(MPI.Is_finalized() or not MPI.Is_initialized())
    except Exception:  # pragma: no cover - let mpi4py's own exit path finalise
        return False


def _c_exit(status: int) -> None:
    """End the process through the C library's ``exit``: after the interpreter's own ``atexit``
    handlers (run already), it runs the C-level ones and flushes C stdio, but not the interpreter's
    tear-down.

    An MPI rank must end this way, not by ``os._exit``: MPICH tells its launcher that the process
    ends normally (the PMI ``finalize`` command) in such a C exit handler, not in ``MPI_Finalize``.
    A rank that skips it looks, to the launcher, like one that died: MPICH's hydra then kills every
    rank still running and the job's exit code is lost (measured with a four-line C program and
    MPICH 5.0.2: ``MPI_Finalize`` then ``_exit(0)`` on 4 ranks gave exit 9 in 14 of 16 runs,
    ``exit(0)`` 0 in 16 of 16; ``_exit(3)`` 9 or 3 at random, ``exit(3)`` always 3)."""
    try:
        import ctypes

        libc = ctypes.CDLL(None)
        libc.exit.argtypes = [ctypes.c_int]
        libc.exit(status)
    except Exception:  # pragma: no cover - no C library to ask: the caller exits the normal way
        pass


def _flush_c_streams() -> None:
    """The C library's stdio buffers (text a compiled kernel may have printed); ``os._exit`` skips them."""
    if "ctypes" not in sys.modules:  # nothing loaded that could have used them
        return
    try:
        import ctypes

        ctypes.CDLL(None).fflush(None)
    except Exception:  # pragma: no cover - no C library to ask
        pass
