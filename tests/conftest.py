"""Session set-up shared by every test file: warm the numba cache on the idle core
(for runs of at least WARM_FROM_ITEMS tests, such as the whole suite).

See warm_kernels.py. Set RELAXTUI_TEST_NO_WARM=1 to run without it (for
measuring the suite's own compile time, for instance).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

_WARMER: subprocess.Popen | None = None


# a targeted run of a few test files gains little from the warmer and would pay its CPU beside them
WARM_FROM_ITEMS = 200


def pytest_collection_finish(session) -> None:
    global _WARMER
    if os.environ.get("RELAXTUI_TEST_NO_WARM") or os.environ.get("NUMBA_DISABLE_JIT"):
        return
    if len(session.items) < WARM_FROM_ITEMS:
        return
    script = Path(__file__).with_name("warm_kernels.py")
    import relaxtui  # the child imports the same copy as the tests (installed or source tree)

    root = str(Path(relaxtui.__file__).resolve().parent.parent)
    path = os.pathsep.join(p for p in (root, os.environ.get("PYTHONPATH", "")) if p)
    env = dict(os.environ, NUMBA_NUM_THREADS="1", PYTHONPATH=path)
    _WARMER = subprocess.Popen([sys.executable, str(script)], stdin=subprocess.DEVNULL,
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)


def pytest_sessionfinish(session, exitstatus) -> None:
    if _WARMER is not None and _WARMER.poll() is None:
        _WARMER.kill()
        _WARMER.wait()
