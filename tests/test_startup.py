"""The start-up path: numba starts without scipy, and the command's quick exit keeps what an exit promises.

Sources: Python's documentation of ``atexit`` (handlers run at a normal exit) and ``os._exit`` (ends
the process without them, buffers unflushed); numba's documentation for ``np.dot`` in compiled
code (it needs scipy's BLAS). Each check runs in a fresh interpreter, as a user's process would.
"""

import os
import subprocess
import sys
import threading

from relaxtui import cli


def _python(code: str, **env):
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300,
                          env=dict(os.environ, **env))


def test_numba_starts_without_importing_scipy_and_both_still_work():
    code = (
        "import sys\n"
        "import relaxtui.kernels.blocks as b\n"
        "import numpy as np\n"
        "x = np.ones((3, 4)); y = np.zeros((3, 4)); b.copy_into(x, y, 1)\n"
        "print('scipy' in sys.modules, float(y.sum()))\n"
        "import numba\n"
        "@numba.njit\n"
        "def f(a, c):\n"
        "    return np.dot(a, c)\n"
        "print(f(np.arange(3.0), np.arange(3.0)))\n"  # numba's np.dot imports scipy's BLAS itself
        "import scipy.sparse.linalg as sl, scipy.sparse as sp\n"
        "print(float(sl.spsolve(sp.identity(2, format='csc') * 2.0, np.ones(2))[0]))\n"
    )
    res = _python(code)
    assert res.returncode == 0, res.stderr
    # before any scipy import: scipy absent, the kernel ran (12 ones copied); then 0*0 + 1*1 + 2*2 = 5
    # and the solve of 2 x = 1 gives 0.5 (arithmetic)
    assert res.stdout.split() == ["False", "12.0", "5.0", "0.5"]


def test_quick_exit_flushes_output_and_runs_exit_handlers():
    code = ("import atexit, sys\nfrom relaxtui import cli\n"
            "atexit.register(lambda: print('handler ran'))\n"
            "sys.stdout.write('pending text'); sys.stderr.write('pending error')\n"
            "cli._exit(3)\n"
            "print('not reached')\n")
    res = _python(code)
    assert res.returncode == 3
    assert res.stdout == "pending texthandler ran\n"  # the handler runs after the flush of what was written
    assert res.stderr == "pending error"


def test_quick_exit_steps_aside_for_live_threads_and_on_request(monkeypatch):
    monkeypatch.delenv("RELAXTUI_NORMAL_EXIT", raising=False)
    saved = (sys.gettrace(), sys.getprofile())
    sys.settrace(None)
    sys.setprofile(None)
    try:
        base = cli._quick_exit_safe()
        stop = threading.Event()
        t = threading.Thread(target=stop.wait)  # not a daemon: a normal exit would wait for it
        t.start()
        try:
            with_thread = cli._quick_exit_safe()
        finally:
            stop.set()
            t.join()
        monkeypatch.setenv("RELAXTUI_NORMAL_EXIT", "1")
        requested = cli._quick_exit_safe()
    finally:
        sys.settrace(saved[0])
        sys.setprofile(saved[1])
    assert not with_thread and not requested
    # pytest itself may hold helper threads; where it does not, the plain case takes the quick exit
    if not any(x.is_alive() and not x.daemon for x in threading.enumerate() if x is not threading.main_thread()) \
            and "mpi4py" not in sys.modules and not getattr(threading, "_threading_atexits", None):
        assert base


def test_normal_exit_when_a_thread_is_still_working():
    code = ("import threading, time\nfrom relaxtui import cli\n"
            "def late():\n    time.sleep(0.3); print('thread finished', flush=True)\n"
            "threading.Thread(target=late).start()\n"
            "cli._exit(0)\n")
    res = _python(code)
    assert res.returncode == 0 and res.stdout == "thread finished\n"  # os._exit would have cut it off


def test_version_is_printed_on_stdout():
    res = subprocess.run([sys.executable, "-m", "relaxtui", "--version"], capture_output=True, text=True, timeout=60)
    assert res.returncode == 0 and res.stdout.startswith("relaxtui ")
