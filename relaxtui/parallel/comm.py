"""MPI start-up, waits that do not spin, and the failure guard.

Facts this module is built on (measured on this project's 2-core machines,
MPICH 5 from the mpich wheel; see the team's MPI notes):

- a rank waiting in a blocking MPI call busy-polls and takes the core from
  the rank that works (4 ranks on 2 cores: 19.7 s against 10.5 s with a
  test-and-sleep wait), so every phase where one rank works alone (loading
  the picture, compiling, writing outputs) is waited for with
  :func:`quiet_wait`;
- an exception on one rank leaves the others blocked in a receive for ever
  unless someone calls ``Abort``: :func:`install_guard` makes every uncaught
  exception print one line and abort the whole job.
"""

from __future__ import annotations

import os
import sys
import time
from contextlib import contextmanager

_MPI = None

POLL_SPIN = 2e-4  # seconds of plain Test() polling before the wait starts sleeping
POLL_SLEEP = 2e-4  # sleep between polls after that (the wakeup latency it adds per command)


def mpi():
    """mpi4py's MPI module, initialised once (threads: only the main thread calls MPI)."""
    global _MPI
    if _MPI is None:
        import mpi4py

        # numba's worker threads and the progress display never call MPI.
        mpi4py.rc.thread_level = "funneled"
        # the stop signals go to the main thread (its Python handler runs at once), not to a thread the
        # MPI library starts while it initialises (MPICH starts one): that thread inherits them blocked
        import signal

        stops = {getattr(signal, n) for n in ("SIGINT", "SIGTERM", "SIGHUP") if hasattr(signal, n)}
        blocked = signal.pthread_sigmask(signal.SIG_BLOCK, stops) if hasattr(signal, "pthread_sigmask") else None
        try:
            from mpi4py import MPI
        finally:
            if blocked is not None:
                signal.pthread_sigmask(signal.SIG_SETMASK, blocked)

        _MPI = MPI
    return _MPI


def quiet_wait(request) -> None:
    """Complete ``request`` without holding a core: poll, then poll with short sleeps."""
    t0 = time.perf_counter()
    while not request.Test():
        if time.perf_counter() - t0 > POLL_SPIN:
            time.sleep(POLL_SLEEP)


def wait_yielding(requests) -> None:
    """Complete ``requests``, polling and yielding the core between polls.

    A rank whose partner lags gives its core away instead of spinning on it in a blocking call
    (measured at 1024², 4 ranks on 2 busy cores: Jacobi 5.9 against 8.6 ms a sweep with a
    blocking Waitall; no loss at 2 ranks). Used for the halo exchanges and the small reductions
    of the sweeps, the Lanczos steps and multigrid's conjugate gradients (3 ranks on 2 cores: a
    40 x 400 red-black run with its 600-step radius estimate took 7.5 s with blocking Reduce and
    Bcast, 2.6 s with these)."""
    Request = mpi().Request
    while not Request.Testall(requests):
        os.sched_yield()


def quiet_barrier(comm) -> None:
    """A barrier that sleeps while it waits (see :func:`quiet_wait`)."""
    quiet_wait(comm.Ibarrier())


def abort(comm, code: int, message: str | None = None) -> None:
    """Print ``message`` (one line) on this rank's stderr and end every rank of the job with ``code``."""
    if message:
        try:
            print(message, file=sys.stderr, flush=True)
            # the launcher reads our stderr through a pipe; Abort kills this process (and the launcher's
            # reader) at once, so a line still in the pipe could be lost (seen: 1 run in 40, 4 ranks)
            drain_stderr()
            # MPICH's Abort prints a line of its own ("application called MPI_Abort ..."):
            # the user gets ours only
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, 2)
        except Exception:  # pragma: no cover - a closed stderr must not stop the abort
            pass
    try:
        comm.Abort(int(code))
    finally:  # pragma: no cover - Abort does not return
        os._exit(int(code))


STDERR_DRAIN_SECONDS = 2.0  # longest wait for the launcher to read our last stderr line before Abort


def drain_stderr(limit: float = STDERR_DRAIN_SECONDS) -> bool:
    """Wait (at most ``limit`` seconds) until the pipe behind stderr is empty, i.e. the launcher has read
    everything written to it; True when it is (or stderr is not a pipe: nothing to wait for)."""
    import stat

    try:
        import fcntl
        import struct
        import termios

        if not stat.S_ISFIFO(os.fstat(2).st_mode):
            return True
        t0 = time.monotonic()
        while struct.unpack("i", fcntl.ioctl(2, termios.FIONREAD, b"\0\0\0\0"))[0] > 0:
            if time.monotonic() - t0 > limit:
                return False
            time.sleep(0.005)
    except (OSError, ImportError):  # not a POSIX pipe (FIONREAD): nothing to wait on
        return True
    return True


def one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def install_guard(comm, command: str) -> None:
    """An excepthook that turns any uncaught exception into one line and ``Abort`` (never a hang)."""
    rank = comm.Get_rank()

    def hook(kind, exc, tb):
        code = 130 if issubclass(kind, KeyboardInterrupt) else int(getattr(exc, "exit_code", 1) or 1)
        abort(comm, code, f"relaxtui {command}: error on rank {rank}: {one_line(exc)}")

    sys.excepthook = hook


def local_ranks(comm) -> int:
    """Ranks of this job on this machine (shared-memory neighbours)."""
    MPI = mpi()
    try:
        node = comm.Split_type(MPI.COMM_TYPE_SHARED)
    except Exception:  # pragma: no cover - every MPI-3 library has it
        return 1
    try:
        return node.Get_size()
    finally:
        node.Free()


def set_threads(comm) -> int:
    """numba threads per rank: NUMBA_NUM_THREADS if the user set it, else the cores shared by this machine's ranks."""
    import numba

    if os.environ.get("NUMBA_NUM_THREADS"):
        return numba.get_num_threads()
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    threads = max(1, min(numba.config.NUMBA_NUM_THREADS, cores // max(1, local_ranks(comm))))
    numba.set_num_threads(threads)
    return threads


@contextmanager
def alone():
    """While held: this rank's numba kernels may use every thread of numba's pool.

    For phases that rank 0 runs alone while the other ranks of its machine sleep in a
    :func:`quiet_wait` (loading the case, assembling the whole operator once, writing the
    outputs): :func:`set_threads` gave each rank its share of the cores, but the sleeping ranks
    leave theirs idle. The pool numba launched holds ``numba.config.NUMBA_NUM_THREADS`` threads
    (the machine's cores unless ``NUMBA_NUM_THREADS`` is set; at most the cores this process may run
    on are used); a user's ``NUMBA_NUM_THREADS`` is
    kept as it is (the pool is then that size and every phase keeps the thread count the user
    chose). The rank's thread count is restored on exit."""
    import numba

    before = numba.get_num_threads()
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    pool = min(int(numba.config.NUMBA_NUM_THREADS), cores)
    wide = before if os.environ.get("NUMBA_NUM_THREADS") else max(before, pool)
    if wide != before:
        numba.set_num_threads(wide)
    try:
        yield wide
    finally:
        if wide != before:
            numba.set_num_threads(before)
