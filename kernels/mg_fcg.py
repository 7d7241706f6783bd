"""Multigrid, conjugate gradients on level 0: direction, dot products, update.

Vectors are working arrays of the operator (padded, zero outside the unknowns
except x, the field, which holds the fixed values); A is the unnormalised
operator D (I - W) on the unknowns, r(x) = b - A x. Each kernel walks the
operator's row segments (bulk runs: constant weights, vectorisable).
"""

import numpy as np
from numba import prange
from relaxtui.kernels._bits import abs_bits, from_bits
from relaxtui.kernels._jit import kernel
from relaxtui.kernels.blocks import segment, span, wsum, wsum_of


@kernel(parallel=True)
def fcg_direction(w, x, p, beta, nblk):
    """p = (w - x) + beta p (the new direction from the preconditioned residual w - x)."""
    for b in prange(nblk):
        lo, hi = span(b, x.shape[0], nblk)
        for i in range(lo, hi):
            wr, xr, pr = w[i], x[i], p[i]
            for j in range(xr.shape[0]):
                pr[j] = (wr[j] - xr[j]) + beta * pr[j]


@kernel(parallel=True)
def fcg_update(x, p, alpha, w, nblk):
    """x += alpha p; w = x; returns the largest |alpha p| (NaN if not finite)."""
    mu = np.zeros(nblk, dtype=np.int64)
    for b in prange(nblk):
        lo, hi = span(b, x.shape[0], nblk)
        m = 0
        for i in range(lo, hi):
            xr, pr, wr = x[i], p[i], w[i]
            for j in range(xr.shape[0]):
                d = alpha * pr[j]
                v = xr[j] + d
                xr[j] = v
                wr[j] = v
                m = max(m, abs_bits(d))
        mu[b] = m
    return from_bits(mu.max())


@kernel(inline=True)
def _dots_bulk(xu, xm, xd, pu, pm, pd, wn, ws, ww, we, q, d, s1, s2, mr):
    for k in range(xu.shape[0]):
        ap = d * (pm[k + 1] - wsum(pu, pm, pd, k, wn, ws, ww, we))
        r = (wsum(xu, xm, xd, k, wn, ws, ww, we) + q) - xm[k + 1]
        s1 += pm[k + 1] * ap
        s2 += pm[k + 1] * (d * r)
        mr = max(mr, abs_bits(r))
    return s1, s2, mr


@kernel(inline=True)
def _dots_mixed(xu, xm, xd, pu, pm, pd, crow, table, diag, s1, s2, mr):
    for k in range(xu.shape[0]):
        c = crow[k]
        if c == 0:
            continue
        d = diag[c]
        ap = d * (pm[k + 1] - wsum(pu, pm, pd, k, table[c, 0], table[c, 1], table[c, 2], table[c, 3]))
        r = wsum_of(xu, xm, xd, k, table, c) - xm[k + 1]
        s1 += pm[k + 1] * ap
        s2 += pm[k + 1] * (d * r)
        mr = max(mr, abs_bits(r))
    return s1, s2, mr


@kernel(parallel=True)
def fcg_dots(x, p, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, nblk):
    """(p · A p, p · r(x), largest contract residual of x)."""
    a1 = np.zeros(nblk)
    a2 = np.zeros(nblk)
    mrs = np.zeros(nblk, dtype=np.int64)
    for b in prange(nblk):
        lo, hi = span(b, x.shape[0] - 2, nblk)
        s1, s2, mr = 0.0, 0.0, 0
        for pi in range(1 + lo, 1 + hi):
            for sg in range(row_ptr[pi], row_ptr[pi + 1]):
                j0, j1, c = segment(seg_start, seg_end, seg_class, sg)
                xu, xm, xd = x[pi - 1, j0:j1], x[pi, j0 - 1 : j1 + 1], x[pi + 1, j0:j1]
                pu, pm, pd = p[pi - 1, j0:j1], p[pi, j0 - 1 : j1 + 1], p[pi + 1, j0:j1]
                if c > 0:
                    s1, s2, mr = _dots_bulk(xu, xm, xd, pu, pm, pd, table[c, 0], table[c, 1], table[c, 2], table[c, 3],
                                            table[c, 4], diag[c], s1, s2, mr)
                else:
                    s1, s2, mr = _dots_mixed(xu, xm, xd, pu, pm, pd, cls[pi, j0:j1], table, diag, s1, s2, mr)
        a1[b] = s1
        a2[b] = s2
        mrs[b] = mr
    return a1.sum(), a2.sum(), from_bits(mrs.max())


@kernel(inline=True)
def _rz_bulk(xu, xm, xd, wm, wn, ws, ww, we, q, d, s, mr):
    for k in range(xu.shape[0]):
        r = (wsum(xu, xm, xd, k, wn, ws, ww, we) + q) - xm[k + 1]
        s += (d * r) * (wm[k] - xm[k + 1])
        mr = max(mr, abs_bits(r))
    return s, mr


@kernel(inline=True)
def _rz_mixed(xu, xm, xd, wm, crow, table, diag, s, mr):
    for k in range(xu.shape[0]):
        c = crow[k]
        if c == 0:
            continue
        r = wsum_of(xu, xm, xd, k, table, c) - xm[k + 1]
        s += (diag[c] * r) * (wm[k] - xm[k + 1])
        mr = max(mr, abs_bits(r))
    return s, mr


@kernel(parallel=True)
def pcg_rz(x, w, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, nblk):
    """(Σ r(x) · (w - x), largest contract residual of x), w - x the preconditioned residual."""
    acc = np.zeros(nblk)
    mrs = np.zeros(nblk, dtype=np.int64)
    for b in prange(nblk):
        lo, hi = span(b, x.shape[0] - 2, nblk)
        s, mr = 0.0, 0
        for pi in range(1 + lo, 1 + hi):
            for sg in range(row_ptr[pi], row_ptr[pi + 1]):
                j0, j1, c = segment(seg_start, seg_end, seg_class, sg)
                xu, xm, xd, wm = x[pi - 1, j0:j1], x[pi, j0 - 1 : j1 + 1], x[pi + 1, j0:j1], w[pi, j0:j1]
                if c > 0:
                    s, mr = _rz_bulk(xu, xm, xd, wm, table[c, 0], table[c, 1], table[c, 2], table[c, 3], table[c, 4], diag[c], s, mr)
                else:
                    s, mr = _rz_mixed(xu, xm, xd, wm, cls[pi, j0:j1], table, diag, s, mr)
        acc[b] = s
        mrs[b] = mr
    return acc.sum(), from_bits(mrs.max())
