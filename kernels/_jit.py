"""The one place for JIT options of every relaxtui kernel.

``cache=True`` keeps compiled machine code on disk between processes,
``nogil=True`` lets a user-interface thread run while a kernel sweeps, and
fastmath stays off so results are reproducible bit for bit.

Helpers that a kernel calls once per row segment are declared with
``@kernel(inline=True)``: numba then inlines them into the caller's IR, which
keeps their loops vectorisable (a plain call would pass every array as a
struct of fields and stop LLVM from seeing through it).
"""

from numba import njit

JIT_OPTIONS = dict(cache=True, nogil=True, fastmath=False)


def kernel(fn=None, *, parallel=False, inline=False):
    """Decorate a kernel with the project's JIT options (compiled on first call)."""

    def wrap(f):
        return njit(parallel=parallel, inline="always" if inline else "never", **JIT_OPTIONS)(f)

    return wrap(fn) if fn is not None else wrap
