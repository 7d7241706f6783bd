"""Row-block helpers shared by the kernels: block bounds, a segment's fields, copy, zero fill.

A parallel kernel splits the rows of its arrays into ``nblk`` blocks (one
``prange`` iteration each); results never depend on ``nblk``.
"""

import numpy as np
from numba import prange
from relaxtui.kernels._bits import abs_bits, from_bits
from relaxtui.kernels._jit import kernel


@kernel(inline=True)
def span(b, n, nblk):
    """Rows [lo, hi) of block b when n rows are split into nblk blocks."""
    return b * n // nblk, (b + 1) * n // nblk


@kernel(inline=True)
def segment(seg_start, seg_end, seg_class, s):
    """Row segment s of the operator: (first padded column, end column, class or -1)."""
    return seg_start[s], seg_end[s], seg_class[s]


@kernel(parallel=True)
def copy_into(src, dst, nblk):
    """dst[...] = src (2-D, same shape), row blocks in parallel; also the bandwidth yardstick of the benchmarks."""
    for b in prange(nblk):
        lo, hi = span(b, src.shape[0], nblk)
        for i in range(lo, hi):
            a = src[i]
            o = dst[i]
            for j in range(a.shape[0]):
                o[j] = a[j]


@kernel(parallel=True)
def zero_fill(x, nblk):
    """x[...] = 0 (2-D), row blocks in parallel."""
    for b in prange(nblk):
        lo, hi = span(b, x.shape[0], nblk)
        for i in range(lo, hi):
            row = x[i]
            for j in range(row.shape[0]):
                row[j] = 0.0


@kernel(parallel=True)
def delta_copy(u, u_old, nblk):
    """The largest |u - u_old| (NaN if any is not finite), then u_old = u; 2-D arrays of one shape."""
    bu = np.zeros(nblk, dtype=np.int64)
    for b in prange(nblk):
        lo, hi = span(b, u.shape[0], nblk)
        mu = 0
        for i in range(lo, hi):
            new = u[i]
            old = u_old[i]
            for j in range(new.shape[0]):
                v = new[j]
                mu = max(mu, abs_bits(v - old[j]))
                old[j] = v
        bu[b] = mu
    return from_bits(bu.max())


@kernel(inline=True)
def wsum(up, mid, dn, k, wn, ws, ww, we):
    """((wN uN + wS uS) + wW uW) + wE uE at cell k of a segment: up, dn its cells in the rows above and
    below, mid its own row with one halo cell at each end (cell k is mid[k + 1])."""
    return ((wn * up[k] + ws * dn[k]) + ww * mid[k]) + we * mid[k + 2]


@kernel(inline=True)
def wsum_of(up, mid, dn, k, table, c):
    """:func:`wsum` with the weights of class c, plus its right-hand side q: the 5-point update's s."""
    return wsum(up, mid, dn, k, table[c, 0], table[c, 1], table[c, 2], table[c, 3]) + table[c, 4]
