"""Multigrid, coarse-level smoother: four-colour Gauss-Seidel/SOR over the 9-point planes."""

import numpy as np
from numba import prange
from relaxtui.kernels._jit import kernel
from relaxtui.kernels.blocks import span


@kernel(inline=True)
def _offsum9(ae, aw, a_s, an, ase, anw, asw, ane, up, mid, dn, t):
    # t[k] = Σ over the 8 neighbours of a_q e_q for the row's cells k (up/mid/dn carry one halo cell each end)
    for k in range(t.shape[0]):
        t[k] = (((ae[k] * mid[k + 2] + aw[k] * mid[k]) + (a_s[k] * dn[k + 1] + an[k] * up[k + 1]))
                + ((ase[k] * dn[k + 2] + anw[k] * up[k]) + (asw[k] * dn[k] + ane[k] * up[k + 2])))


@kernel(inline=True)
def _blend9(cells, t, a, f, parity, omega):
    # Gauss-Seidel/SOR update of the row's cells k with (k & 1) == parity from the off-centre sums t and the
    # centre coefficients a (an unknown iff a > 0; others keep their value: a divisor of 1 stands in for them)
    for k in range(t.shape[0]):
        x = cells[k]
        ak = a[k]
        live = ak > 0.0
        v = x + omega * ((f[k] - t[k]) / (ak if live else 1.0) - x)
        cells[k] = v if ((k & 1) == parity and live) else x


@kernel(inline=True)
def _smooth_row(e, f, A, omega, pi, first_col, t):
    """Gauss-Seidel/SOR on padded row pi: cells of column parity first_col, then the others.

    Each half computes the off-centre sums of the whole row (a vectorisable
    loop) and updates the cells of its parity; ``t`` is scratch (>= cols).
    """
    n = e.shape[1] - 2
    tt = t[:n]
    for par in range(2):
        _offsum9(A[1, pi, 1 : n + 1], A[1, pi, 0:n], A[2, pi, 1 : n + 1], A[2, pi - 1, 1 : n + 1],
                 A[3, pi, 1 : n + 1], A[3, pi - 1, 0:n], A[4, pi, 1 : n + 1], A[4, pi - 1, 2 : n + 2],
                 e[pi - 1], e[pi], e[pi + 1], tt)
        _blend9(e[pi, 1 : n + 1], tt, A[0, pi, 1 : n + 1], f[pi, 1 : n + 1], first_col ^ par, omega)


@kernel(parallel=True)
def smooth9(e, f, A, omega, sweeps, reverse, nblk):
    """``sweeps`` four-colour Gauss-Seidel/SOR sweeps of A e = f on a coarse level, in place.

    Colours are (row parity, column parity); with a 9-point stencil no two
    cells of a colour are coupled, so this is a true Gauss-Seidel. Forward
    order: even rows (even columns, then odd), then odd rows; ``reverse``
    runs the colours backwards (the adjoint sweep). Each update divides by
    the centre coefficient A[0] (no plane of inverses is kept: it would be a
    sixth plane per level). Row blocks run in parallel: each block does
    its first-parity rows and the second-parity rows between them, then a
    short pass does the second-parity rows at block edges; the result is
    that of the plain order, bit for bit.
    """
    rows = e.shape[0] - 2
    width = e.shape[1]
    fp = 1 if reverse else 0
    for it in range(sweeps):
        for b in prange(nblk):
            t = np.empty(width)
            r0, r1 = span(b, rows, nblk)
            for r in range(r0, r1):
                if (r & 1) == fp:
                    _smooth_row(e, f, A, omega, r + 1, fp, t)
                    if r - 1 > r0:
                        _smooth_row(e, f, A, omega, r, fp, t)  # second-parity row r - 1 (padded r)
        for b in prange(nblk):
            t = np.empty(width)
            r0, r1 = span(b, rows, nblk)
            if r1 > r0 and (r0 & 1) != fp:
                _smooth_row(e, f, A, omega, r0 + 1, fp, t)
            if r1 > r0 + 1 and ((r1 - 1) & 1) != fp:
                _smooth_row(e, f, A, omega, r1, fp, t)
