"""The one place for JIT options of every relaxtui kernel.

``cache=True`` keeps compiled machine code on disk between processes,
``nogil=True`` lets a user-interface thread run while a kernel sweeps, and
fastmath stays off so results are reproducible bit for bit.

Helpers that a kernel calls once per row segment are declared with
``@kernel(inline=True)``: numba then inlines them into the caller's IR, which
keeps their loops vectorisable (a plain call would pass every array as a
struct of fields and stop LLVM from seeing through it).
"""

import os
import types

# numba's OpenMP threading layer makes idle threads spin between parallel
# regions by default. A sweep has one or two short regions, and on a small or
# shared machine the spinning threads steal the cores the working ones need:
# measured here with the 2 cores busy, a red-black solve of the electrodes
# demo took 3.0 s spinning against 0.09 s with passive waiting. Passive waits
# cost a few microseconds per region on an idle machine. Set before numba
# starts its threads; a user's own setting wins.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import sys  # noqa: E402
import threading  # noqa: E402


class _HiddenScipy:
    """A meta-path finder that makes scipy unimportable for one thread, while numba starts up.

    numba imports scipy twice as it starts: ``import scipy`` for a version check when ``numba`` is
    imported, and ``scipy.linalg.cython_blas`` when its array-math registry loads (before the
    first kernel is compiled or loaded from the cache), only to learn that BLAS is there. No
    relaxtui kernel calls BLAS, and those imports took 0.11-0.19 s of every solve (measured with
    ``python -X importtime`` and a profile of a 2047² multigrid solve, load about 2). Hidden
    from numba's start-up, scipy is imported later by whoever needs it (numba's own ``np.dot``
    and friends import it when they are compiled); other threads never see it hidden.
    """

    def __init__(self):
        self.thread = threading.get_ident()

    def find_spec(self, name, path=None, target=None):
        if (name == "scipy" or name.startswith("scipy.")) and threading.get_ident() == self.thread:
            raise ModuleNotFoundError(f"No module named {name!r} (hidden while numba starts)", name=name)
        return None


def _start_numba() -> None:
    """Import numba and load its typing and lowering registries with scipy hidden (see
    :class:`_HiddenScipy`); the work is the same a first kernel call does, done here once."""
    hide = None if "scipy.linalg" in sys.modules else _HiddenScipy()  # already paid for: nothing to hide
    fresh = "numba.np.arraymath" not in sys.modules
    if hide is not None:
        sys.meta_path.insert(0, hide)
    try:
        import numba  # noqa: F401
        from numba.core.registry import cpu_target

        cpu_target.target_context.refresh()
    finally:
        if hide is not None:
            sys.meta_path.remove(hide)
    if hide is not None and fresh:
        # numba found no BLAS while scipy was hidden; with scipy installed it has one, and its
        # inner-product helpers (np.cov, np.corrcoef, ...) should use it as they would have:
        # np.dot imports scipy itself when such a function is compiled.
        import importlib.util

        from numba.np import arraymath

        arraymath._HAVE_BLAS = importlib.util.find_spec("scipy") is not None


_start_numba()

from numba import njit  # noqa: E402
from numba.core.cpu import ParallelOptions  # noqa: E402

JIT_OPTIONS = dict(cache=True, nogil=True, fastmath=False)

# numba fuses consecutive ``prange`` loops of the same range into one unless told not to. Our
# parallel kernels rely on the end of one loop being a barrier: a sweep's second loop updates the
# rows at block edges only once every block has done its interior (red-black SOR, the coarse
# multigrid smoother). Fused, block b's edge rows ran while block b + 1 was still at its interior,
# and the four-colour smoother gave different fields for 1 and 3 row blocks (measured: 0.04 on a
# 150 x 200 level from a field of order 1). Fusion is off for every kernel. An options object, not a
# dict: numba pops the keys of a dict it is given, so a shared dict (or a per-kernel one, at the
# kernel's second compile, for another type) would turn fusion back on.
PARALLEL_OPTIONS = ParallelOptions({"fusion": False})


def kernel(fn=None, *, parallel=False, inline=False):
    """Decorate a kernel with the project's JIT options (compiled on first call)."""

    def wrap(f):
        return njit(parallel=PARALLEL_OPTIONS if parallel else False, inline="always" if inline else "never", **JIT_OPTIONS)(f)

    return wrap(fn) if fn is not None else wrap


def serial_twin(parallel_kernel):
    """The one-thread build of a ``parallel=True`` kernel, compiled from the same Python source.

    ``prange`` runs as ``range``; the copy carries its own qualified name, so
    numba's disk cache (keyed by name and byte code, not by the parallel flag)
    keeps the two builds apart. Under ``NUMBA_DISABLE_JIT`` both are the
    plain Python function.
    """
    f = getattr(parallel_kernel, "py_func", parallel_kernel)
    g = types.FunctionType(f.__code__, f.__globals__, f.__name__ + "_one_thread", f.__defaults__, f.__closure__)
    g.__qualname__ = f.__qualname__ + "_one_thread"
    g.__module__ = f.__module__
    g.__doc__ = f.__doc__
    return njit(parallel=False, inline="never", **JIT_OPTIONS)(g)
