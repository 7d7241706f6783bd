"""Multigrid, interpolation of a coarse level: the collapsed-stencil weights of its 9-point planes.

The rule (Dendy's black-box multigrid, J. E. Dendy, J. Comput. Phys. 48,
1982) and the weight layout are described in :mod:`relaxtui.kernels.multigrid`.
"""

import numpy as np
from numba import prange
from relaxtui.kernels._jit import kernel
from relaxtui.kernels.blocks import span
from relaxtui.kernels.mg_galerkin import stencil9


@kernel(inline=True)
def _cap_stored(w, lo, hi, total):
    """Keep the stored weights w[lo:hi] from summing to more than max(total, 1), ``total`` being the
    sum of the values computed for them (in float64, in the same order).

    Stored in a narrower type (float32) each weight is rounded, and the rounded weights may sum a
    few units in the last place above 1; the largest is then lowered until they do not. With
    float64 storage the stored sum is ``total`` itself and nothing changes.
    """
    cap = max(total, 1.0)
    s = 0.0
    for k in range(lo, hi):
        s += w[k]
    while s > cap:
        m = lo
        for k in range(lo + 1, hi):
            if w[k] > w[m]:
                m = k
        w[m] = w[m] * (1.0 - 2.5e-7)  # at least one float32 unit down (2**-23 relative at most)
        s = 0.0
        for k in range(lo, hi):
            s += w[k]


@kernel(inline=True)
def _collapsed(sa, sc, sb, have_a, have_b, out, k):
    """Weights of a row/column cell from its collapsed sums: side a, centre, side b (A entries).

    A side is used when its source exists and its coupling is negative
    (M-matrix-like); otherwise its sum is folded into the centre. The
    weights sum to at most 1. Returns 1 if the cell has no usable weight (it
    is then aggregated: weight 1 to its block).
    """
    use_a = have_a and sa < 0.0
    use_b = have_b and sb < 0.0
    den = sc
    if not use_a:
        den += sa
    if not use_b:
        den += sb
    if use_a or use_b:
        # the weights sum to at most 1 (a coarse stencil need not be diagonally dominant)
        den = max(den, -((sa if use_a else 0.0) + (sb if use_b else 0.0)))
        wa = -sa / den if use_a else 0.0
        wb = -sb / den if use_b else 0.0
        out[k] = wa
        out[k + 1] = wb
        _cap_stored(out, k, k + 2, wa + wb)
        return 0
    out[k] = 1.0
    out[k + 1] = 0.0
    return 1


@kernel(inline=True)
def _centre(A, P, I, J, pi, pj, s, lost):
    """The 4 weights of the centre cell of block (I, J) (padded (pi, pj)): its own equation with the
    row and column cells' weights; positive couplings are folded into the diagonal."""
    stencil9(A, pi, pj, s)
    d = s[4]
    for k in range(9):
        if k != 4 and s[k] > 0.0:
            d += s[k]
            s[k] = 0.0
    cnw = 1.0 if A[0, pi - 1, pj - 1] > 0.0 else 0.0  # C cells of the 4 corners
    cne = 1.0 if A[0, pi - 1, pj + 1] > 0.0 else 0.0
    csw = 1.0 if A[0, pi + 1, pj - 1] > 0.0 else 0.0
    cse = 1.0 if A[0, pi + 1, pj + 1] > 0.0 else 0.0
    w00 = -(s[0] * cnw + s[1] * P[0, I + 1, J + 1] + s[3] * P[2, I + 1, J + 1]) / d
    w01 = -(s[2] * cne + s[1] * P[1, I + 1, J + 1] + s[5] * P[2, I + 1, J + 2]) / d
    w10 = -(s[6] * csw + s[7] * P[0, I + 2, J + 1] + s[3] * P[3, I + 1, J + 1]) / d
    w11 = -(s[8] * cse + s[7] * P[1, I + 2, J + 1] + s[5] * P[3, I + 1, J + 2]) / d
    total = w00 + w01 + w10 + w11
    if total > 1.0:  # at most 1, as for the row and column cells
        w00 /= total
        w01 /= total
        w10 /= total
        w11 /= total
    if total > 0.0:
        P[4, I + 1, J + 1] = w00
        P[5, I + 1, J + 1] = w01
        P[6, I + 1, J + 1] = w10
        P[7, I + 1, J + 1] = w11
        _cap_stored(P[:, I + 1, J + 1], 4, 8, ((w00 + w01) + w10) + w11)
    else:
        P[4, I + 1, J + 1] = 1.0
        lost[I + 1, J + 1] |= 4


@kernel(parallel=True)
def interpolation9(A, P, lost, nblk):
    """Fill P (8, Rc + 2, Cc + 2) and lost (Rc + 2, Cc + 2) uint8 (both zero on entry) for stencil A.

    Pass 1: row and column cells (collapsed stencils); pass 2: centre cells
    (their own equation with the pass-1 rows). ``lost`` gets ROW_LOST /
    COLUMN_LOST / ISOLATED bits for cells aggregated into their block.
    """
    rows = A.shape[1] - 2
    cols = A.shape[2] - 2
    rc = P.shape[1] - 2
    cc = P.shape[2] - 2
    for b in prange(nblk):
        s = np.zeros(9)
        lo, hi = span(b, rc, nblk)
        for I in range(lo, hi):
            for J in range(cc):
                pi = 2 * I + 1
                pj = 2 * J + 2  # row cell (2I, 2J+1), padded: collapse onto its row
                if 2 * J + 1 < cols and A[0, pi, pj] > 0.0:
                    stencil9(A, pi, pj, s)
                    have_e = 2 * J + 2 < cols and A[0, pi, pj + 1] > 0.0
                    if _collapsed(s[0] + s[3] + s[6], s[1] + s[4] + s[7], s[2] + s[5] + s[8], A[0, pi, pj - 1] > 0.0, have_e,
                                  P[:, I + 1, J + 1], 0):
                        lost[I + 1, J + 1] |= 1
                pi = 2 * I + 2
                pj = 2 * J + 1  # column cell (2I+1, 2J), padded: collapse onto its column
                if 2 * I + 1 < rows and A[0, pi, pj] > 0.0:
                    stencil9(A, pi, pj, s)
                    have_s = 2 * I + 2 < rows and A[0, pi + 1, pj] > 0.0
                    if _collapsed(s[0] + s[1] + s[2], s[3] + s[4] + s[5], s[6] + s[7] + s[8], A[0, pi - 1, pj] > 0.0, have_s,
                                  P[:, I + 1, J + 1], 2):
                        lost[I + 1, J + 1] |= 2
    for b in prange(nblk):
        s = np.zeros(9)
        lo, hi = span(b, rc, nblk)
        for I in range(lo, hi):
            for J in range(cc):
                if 2 * I + 1 < rows and 2 * J + 1 < cols and A[0, 2 * I + 2, 2 * J + 2] > 0.0:
                    _centre(A, P, I, J, 2 * I + 2, 2 * J + 2, s, lost)
