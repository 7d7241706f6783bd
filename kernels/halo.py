"""Kernels of a strip of the grid, for solves split across MPI ranks.

A rank holds rows a..b-1 of the picture as a *strip* in the same layout as
the single-process operator (:mod:`relaxtui.kernels.sweeps`): the local
field and class array have n + 2 rows, rows 1..n are the rank's own, rows 0
and n + 1 are halo rows (the neighbouring ranks' edge rows, or the zero
padding at the picture's top and bottom). The row segments are built from
the local class array by :func:`relaxtui.kernels.assemble.segments`, so a
local row has exactly the segments of the global row it copies.

The kernels here sweep a *range of local rows* (the edge rows first, so their
values can travel while the inner rows are computed) and reuse the row
kernels of :mod:`relaxtui.kernels.sweeps`; every cell is updated by the same
arithmetic in the same order as in one process, so Jacobi and red-black SOR
give the same field bit for bit. Maxima are returned as int64 bit patterns
(:mod:`relaxtui.kernels._bits`): the ranks reduce them with an integer MAX,
and a NaN still wins.
"""

import numpy as np
from numba import prange
from relaxtui.kernels._bits import abs_bits
from relaxtui.kernels._jit import kernel
from relaxtui.kernels.sweeps import _colour_row, _jacobi_rows

INTERIOR, FIXED, OUTSIDE, FLUX, CONVECTION = 0, 1, 2, 3, 4


@kernel(parallel=True)
def jacobi_range(src, dst, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, r0, r1, nblk):
    """One weighted-Jacobi sweep of local rows r0..r1-1 from ``src`` into ``dst``.

    Returns (largest update, largest residual) as bit patterns.
    """
    n = r1 - r0
    blk_u = np.zeros(nblk, dtype=np.int64)
    blk_r = np.zeros(nblk, dtype=np.int64)
    for b in prange(nblk):
        mu, mr = _jacobi_rows(src, dst, cls, table, row_ptr, seg_start, seg_end, seg_class, omega,
                              r0 + b * n // nblk, r0 + (b + 1) * n // nblk)
        blk_u[b] = mu
        blk_r[b] = mr
    return blk_u.max(), blk_r.max()


@kernel
def jacobi_range_serial(src, dst, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, r0, r1):
    """:func:`jacobi_range` on one thread."""
    return _jacobi_rows(src, dst, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, r0, r1)


@kernel(parallel=True)
def colour_range(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, colour, r0, r1, nblk):
    """Update the cells of one colour (0 red, 1 black) in local rows r0..r1-1, in place.

    Cells of one colour read only cells of the other, so the rows are
    independent. ``colour`` is the global colour: the caller passes it
    flipped when the strip starts on an odd global row. Returns the largest
    update as a bit pattern.
    """
    n = r1 - r0
    width = u.shape[1]
    blk = np.zeros(nblk, dtype=np.int64)
    for b in prange(nblk):
        tmp = np.empty(width)
        mu = np.int64(0)  # not a literal 0: one build of _colour_row for every caller
        for i in range(r0 + b * n // nblk, r0 + (b + 1) * n // nblk):
            mu = _colour_row(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, i, colour, tmp, mu)
        blk[b] = mu
    return blk.max()


@kernel
def colour_range_serial(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, colour, r0, r1, tmp):
    """:func:`colour_range` on one thread (``tmp``: a scratch row of u's width)."""
    mu = np.int64(0)
    for i in range(r0, r1):
        mu = _colour_row(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, i, colour, tmp, mu)
    return mu


@kernel
def copy_segments(src, dst, row_ptr, seg_start, seg_end, r0, r1):
    """dst = src on the segment cells of local rows r0..r1-1 (and on the whole rows 0 and n + 1)."""
    for i in range(r0, r1):
        for s in range(row_ptr[i], row_ptr[i + 1]):
            dst[i, seg_start[s] : seg_end[s]] = src[i, seg_start[s] : seg_end[s]]
    last = src.shape[0] - 1
    dst[0, :] = src[0, :]
    dst[last, :] = src[last, :]


@kernel
def largest_bits(values, n):
    """Bit patterns of |values[:n]| (int64), for an integer MAX reduction across ranks."""
    out = np.empty(n, dtype=np.int64)
    for k in range(n):
        out[k] = abs_bits(values[k])
    return out
