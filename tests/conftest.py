"""Session set-up shared by every test file: warm the numba cache on the idle core
(for runs of at least WARM_FROM_ITEMS tests, such as the whole suite), and order the
test files so that the warmer is ahead of the tests that need its kernels.

See warm_kernels.py. Set RELAXTUI_TEST_NO_WARM=1 to run without it (for
measuring the suite's own compile time, for instance); the files then keep
pytest's order.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

_WARMER: subprocess.Popen | None = None


# a targeted run of a few test files gains little from the warmer and would pay its CPU beside them
WARM_FROM_ITEMS = 200

# Files whose tests call no kernel (found by a session in which every numba compile raised, with an empty
# cache): they run first, while the warmer compiles the operator's assembly kernels that nearly every
# other test needs. tests/test_case.py calls only the domain check's labelling kernel, in a few tests.
EARLY = ("test_case.py", "test_case_v11.py", "test_colormap.py", "test_domain_strips.py", "test_export.py",
         "test_heatmap.py", "test_inspect.py", "test_large_pictures.py", "test_layout.py", "test_loader_property.py",
         "test_picture.py", "test_starter.py", "test_stopping.py", "test_streaming.py")
# Files that reach multigrid (tests/test_physics.py: with the uint16 class codes of coefficient maps; in the
# middle group it met the warmer compiling the same 30-37 s restriction, load 2-3; tests/test_edges2.py: in the
# middle group its first multigrid solve compiled the whole family, 79 s at load 2-2.8, while the warmer compiled
# the same kernels; tests/test_methods.py: a multigrid step of its protocol test compiled the conjugate-gradient
# kernels, 15 s at load 2.5, 100-114 s into the session, where the warmer's multigrid lane compiles them too),
# the uint16 and float32 builds (tests/test_tui_study.py switches a run to single precision: in the middle group
# it compiled the float32 builds 13 s before the warmer reached them), the two-level radius estimate and the MPI
# ranks' strip kernels: last, in the order the warmer compiles those (tests/test_edges3.py, the next file of edge
# cases, beside tests/test_edges2.py). Every other file (new ones too) runs between EARLY and LATE, in pytest's
# order, and compiles the float64 relaxation sweeps and measures itself.
LATE = ("test_cli.py", "test_edges.py", "test_edges2.py", "test_edges3.py", "test_methods.py", "test_operator.py",
        "test_weak_anchoring.py", "test_hostile_input.py",
        "test_fuzz.py", "test_barrier.py", "test_multigrid.py", "test_physics.py", "test_kernels.py", "test_field_output.py",
        "test_tui_study.py", "test_precision.py", "test_coarse_radius.py", "test_mpi.py")


def _ignore(signum, frame) -> None:
    """A stop signal pytest was started with ignored: still ignored by pytest, not by the commands it starts."""


def pytest_configure(config) -> None:
    # A script's background job starts with SIGINT ignored, nohup with SIGHUP (POSIX); an ignored signal
    # stays ignored across exec into the commands the tests start (relaxtui itself keeps only an ignored
    # SIGHUP, relaxtui.commands.solve._stop_signals_to, but a test's own helper processes keep them all).
    # A handler that does nothing leaves pytest as it was, and exec gives the commands the default action.
    for sig in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP):
        if signal.getsignal(sig) == signal.SIG_IGN:
            signal.signal(sig, _ignore)


def _warming(items) -> bool:
    return (not os.environ.get("RELAXTUI_TEST_NO_WARM") and not os.environ.get("NUMBA_DISABLE_JIT")
            and len(items) >= WARM_FROM_ITEMS)


def pytest_collection_modifyitems(session, config, items) -> None:
    if not _warming(items):
        return

    def rank(item) -> tuple[int, int]:
        name = Path(str(item.fspath)).name
        if name in EARLY:
            return 0, 0
        if name in LATE:
            return 2, LATE.index(name)
        return 1, 0

    items.sort(key=rank)  # stable: pytest's order within each file and group


def pytest_collection_finish(session) -> None:
    global _WARMER
    if not _warming(session.items):
        return
    script = Path(__file__).with_name("warm_kernels.py")
    import relaxtui  # the child imports the same copy as the tests (installed or source tree)

    root = str(Path(relaxtui.__file__).resolve().parent.parent)
    path = os.pathsep.join(p for p in (root, str(script.parent), os.environ.get("PYTHONPATH", "")) if p)
    # numba's default thread count, as in the test process: the warmer then compiles the same builds (the one-thread
    # sweeps for small grids, the row-block ones for large); its solves are a few sweeps, the rest is compiling
    env = dict(os.environ, PYTHONPATH=path)
    env.pop("NUMBA_NUM_THREADS", None)
    # a session of its own, so that the end of the session also ends the mpiexec jobs it starts
    _WARMER = subprocess.Popen([sys.executable, str(script)], stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                               stderr=subprocess.DEVNULL, env=env, start_new_session=True)


def pytest_sessionfinish(session, exitstatus) -> None:
    if _WARMER is not None and _WARMER.poll() is None:
        os.killpg(_WARMER.pid, signal.SIGKILL)
        _WARMER.wait()
