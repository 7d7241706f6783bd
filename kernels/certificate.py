"""Quadratic barriers: an upper bound on the norm of the operator's inverse in one pass.

Same layout as :mod:`relaxtui.kernels.sweeps` (padded class array ``cls``,
class ``table`` with the weights N, S, W, E in columns 0-3, row segments).
For a positive ``v`` with ``(I - W) v >= m > 0`` on every unknown, the
M-matrix comparison gives ``(I - W)^-1 1 <= v / m`` (see
:func:`relaxtui.solver.conditioning.barrier_inverse_norm`); this kernel
evaluates ``(I - W) v`` for three quadratics centred at (ci, cj)::

    0: v = r2 - (i - ci)^2 - (j - cj)^2     (both directions)
    1: v = 2 (ri2 - (i - ci)^2)             (rows only)
    2: v = 2 (rj2 - (j - cj)^2)             (columns only)

``(I - W) v`` is computed as ``(1 - sum w) v_P + sum w_N (v_P - v_N)``: the
differences ``v_P - v_N`` of these integer-valued quadratics are exact small
integers, so the result carries no cancellation from the size of ``v``.
"""

import numpy as np
from numba import prange
from relaxtui.kernels._jit import kernel
from relaxtui.kernels.blocks import segment, span


@kernel(parallel=True)
def barriers(cls, table, row_ptr, seg_start, seg_end, seg_class, ci, cj, r2, ri2, rj2, nblk):
    """Per barrier (0, 1, 2 above): the least ``(I - W) v`` over the unknowns, the largest and the least ``v``.

    Returns a (3, 3) float64 array: row k is (min (I - W) v, max v, min v) of barrier k
    (+inf, -inf, +inf without unknowns).
    """
    n = cls.shape[0] - 2
    out = np.empty((nblk, 3, 3))
    for b in prange(nblk):
        lo, hi = span(b, n, nblk)
        l0 = l1 = l2 = np.inf
        h0 = h1 = h2 = -np.inf
        g0 = g1 = g2 = np.inf
        for i in range(1 + lo, 1 + hi):
            di = float(i - ci)
            dn = 1.0 - 2.0 * di  # v_P - v_N of (i - ci)^2 terms, the north neighbour (row i - 1)
            ds = 1.0 + 2.0 * di  # ... the south one (row i + 1)
            vi = di * di
            crow = cls[i]
            for s in range(row_ptr[i], row_ptr[i + 1]):
                j0, j1, _c = segment(seg_start, seg_end, seg_class, s)
                for j in range(j0, j1):
                    c = crow[j]
                    if c == 0:
                        continue
                    dj = float(j - cj)
                    dw = 1.0 - 2.0 * dj
                    de = 1.0 + 2.0 * dj
                    vj = dj * dj
                    wn = table[c, 0]
                    ws = table[c, 1]
                    ww = table[c, 2]
                    we = table[c, 3]
                    leak = 1.0 - (wn + ws + ww + we)
                    rows = wn * dn + ws * ds
                    cols = ww * dw + we * de
                    v = r2 - vi - vj
                    l0 = min(l0, leak * v + rows + cols)
                    h0 = max(h0, v)
                    g0 = min(g0, v)
                    v = 2.0 * (ri2 - vi)
                    l1 = min(l1, leak * v + 2.0 * rows)
                    h1 = max(h1, v)
                    g1 = min(g1, v)
                    v = 2.0 * (rj2 - vj)
                    l2 = min(l2, leak * v + 2.0 * cols)
                    h2 = max(h2, v)
                    g2 = min(g2, v)
        out[b, 0, 0] = l0
        out[b, 0, 1] = h0
        out[b, 0, 2] = g0
        out[b, 1, 0] = l1
        out[b, 1, 1] = h1
        out[b, 1, 2] = g1
        out[b, 2, 0] = l2
        out[b, 2, 1] = h2
        out[b, 2, 2] = g2
    res = np.empty((3, 3))
    for k in range(3):
        res[k, 0] = np.inf
        res[k, 1] = -np.inf
        res[k, 2] = np.inf
        for b in range(nblk):
            res[k, 0] = min(res[k, 0], out[b, k, 0])
            res[k, 1] = max(res[k, 1], out[b, k, 1])
            res[k, 2] = min(res[k, 2], out[b, k, 2])
    return res
