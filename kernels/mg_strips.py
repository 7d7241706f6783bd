"""Multigrid across MPI ranks: the coarse-level smoother one row parity at a time.

:func:`relaxtui.kernels.mg_smoother.smooth9` sweeps both row parities of a
whole level; a strip of a level needs its neighbours' edge rows between the
two halves, so here one call updates the rows of one parity (both column
colours, in the order ``smooth9`` uses) and the caller exchanges halo rows
before the next. Rows of one parity are not coupled by a 9-point stencil:
they run in parallel, and the result is that of ``smooth9`` bit for bit.
"""

import numpy as np
from numba import prange
from relaxtui.kernels._jit import kernel
from relaxtui.kernels.blocks import span
from relaxtui.kernels.mg_smoother import _smooth_row


@kernel(parallel=True)
def smooth9_rows(e, f, A, Dinv, omega, offset, parity, first_col, r0, r1, nblk):
    """Four-colour SOR of the padded rows r0..r1-1 whose global row (pi - 1 + offset) has ``parity``.

    ``first_col`` is the column parity updated first (0 in a forward sweep,
    1 in the reverse one, as in ``smooth9``).
    """
    width = e.shape[1]
    for b in prange(nblk):
        t = np.empty(width)
        lo, hi = span(b, r1 - r0, nblk)
        for k in range(lo, hi):
            pi = r0 + k
            if ((pi - 1 + offset) & 1) == parity:
                _smooth_row(e, f, A, Dinv, omega, pi, first_col, t)
