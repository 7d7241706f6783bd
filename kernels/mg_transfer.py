"""Multigrid transfers: restriction of residuals (P^T r) and prolongation of corrections (u += P e).

Level 0 reads the operator's row segments and computes its interpolation
weights on the fly (:mod:`relaxtui.kernels.mg_level0`); coarse levels read
their 9-point planes A and weight planes P (layouts in
:mod:`relaxtui.kernels.multigrid`).
"""

import numpy as np
from numba import prange
from relaxtui.kernels._jit import kernel
from relaxtui.kernels.blocks import segment, span, wsum, wsum_of
from relaxtui.kernels.mg_level0 import WEIGHT_DTYPE, weights_row0


@kernel(inline=True)
def _res_bulk(up, mid, dn, out, wn, ws, ww, we, q, d):
    for k in range(out.shape[0]):
        out[k] = d * ((wsum(up, mid, dn, k, wn, ws, ww, we) + q) - mid[k + 1])


@kernel(inline=True)
def _res_mixed(up, mid, dn, out, crow, table, diag):
    for k in range(out.shape[0]):
        c = crow[k]
        out[k] = diag[c] * (wsum_of(up, mid, dn, k, table, c) - mid[k + 1]) if c != 0 else 0.0


@kernel(inline=True)
def _res9(a0, ae, aw, a_s, an, ase, anw, asw, ane, up, mid, dn, f, out):
    # a*, f and out are the row's cells; up/mid/dn carry one halo cell at each end; west/north-west
    # couplings (aw = ae shifted, anw) and north-east (ane) are read from neighbours' planes
    for k in range(out.shape[0]):
        d = a0[k]
        s = ((d * mid[k + 1] + ae[k] * mid[k + 2]) + aw[k] * mid[k]) + ((a_s[k] * dn[k + 1] + an[k] * up[k + 1])
             + ((ase[k] * dn[k + 2] + anw[k] * up[k]) + (asw[k] * dn[k] + ane[k] * up[k + 2])))
        out[k] = f[k] - s if d > 0.0 else 0.0


@kernel(inline=True)
def _residual_row(level0, u, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, f, A, i, out):
    """out[j + 1] = the unnormalised residual of cell (i, j), 0 off the unknowns and outside the grid.

    Level 0 (``level0``): b - A u from the operator's row segments (a bulk
    run loads its weights once, a mixed stretch gathers them per cell); a
    coarse level: f - A u from its planes A.
    """
    for j in range(out.shape[0]):
        out[j] = 0.0
    n = u.shape[1] - 2
    if i < 0 or i >= u.shape[0] - 2:
        return
    pi = i + 1
    if not level0:
        _res9(A[0, pi, 1 : n + 1], A[1, pi, 1 : n + 1], A[1, pi, 0:n], A[2, pi, 1 : n + 1], A[2, pi - 1, 1 : n + 1],
              A[3, pi, 1 : n + 1], A[3, pi - 1, 0:n], A[4, pi, 1 : n + 1], A[4, pi - 1, 2 : n + 2],
              u[pi - 1], u[pi], u[pi + 1], f[pi, 1 : n + 1], out[1 : n + 1])
        return
    up, mid, dn, crow = u[pi - 1], u[pi], u[pi + 1], cls[pi]
    for s in range(row_ptr[pi], row_ptr[pi + 1]):
        j0, j1, c = segment(seg_start, seg_end, seg_class, s)
        if c > 0:
            _res_bulk(up[j0:j1], mid[j0 - 1 : j1 + 1], dn[j0:j1], out[j0:j1],
                      table[c, 0], table[c, 1], table[c, 2], table[c, 3], table[c, 4], diag[c])
        else:
            _res_mixed(up[j0:j1], mid[j0 - 1 : j1 + 1], dn[j0:j1], out[j0:j1], crow[j0:j1], table, diag)


@kernel(inline=True)
def _gather(fc_row, rp, rc, rn, wp, wc):
    """One coarse row of the restriction: fc_row[J + 1] = Σ P(p, (I, J)) r(p) over the 3 x 3 fine cells.

    rp, rc, rn: fine residual rows 2I - 1, 2I, 2I + 1 (padded columns);
    wp, wc: block weights of block rows I - 1 and I, planar (8, Cc + 2), block J at [J + 1].
    """
    cc = fc_row.shape[0] - 2
    rc0 = rc[1::2]  # fine column 2J (C cells) at J
    rc1 = rc[2::2]  # fine column 2J + 1 at J
    rcm = rc[0::2]  # fine column 2J - 1 at J
    rn0 = rn[1::2]
    rn1 = rn[2::2]
    rnm = rn[0::2]
    rp0 = rp[1::2]
    rp1 = rp[2::2]
    rpm = rp[0::2]
    for J in range(cc):
        s = rc0[J] + wc[0, J + 1] * rc1[J] + wc[1, J] * rcm[J]
        s += wc[2, J + 1] * rn0[J] + wp[3, J + 1] * rp0[J]
        s += wc[4, J + 1] * rn1[J] + wc[5, J] * rnm[J]
        s += wp[6, J + 1] * rp1[J] + wp[7, J] * rpm[J]
        fc_row[J + 1] = s


@kernel(parallel=True)
def _restrict(level0, u, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, ptab, pflag, f, A, P, fc, nblk):
    """fc (next level, padded) = P^T r: the restricted unnormalised residual of level 0 or of a coarse level.

    Coarse rows are split into ``nblk`` blocks; within a block the fine
    residual rows (and on level 0 the block weights) are computed once each
    and rolled from one coarse row to the next.
    """
    rc = fc.shape[0] - 2
    cc = fc.shape[1] - 2
    cols = u.shape[1] - 2
    for b in prange(nblk):
        I0, I1 = span(b, rc, nblk)
        if I1 <= I0:
            continue
        r_prev = np.zeros(cols + 2)  # fine row 2I - 1
        r_cur = np.zeros(cols + 2)  # fine row 2I
        r_next = np.zeros(cols + 2)  # fine row 2I + 1
        w_prev = np.zeros((8, cc + 2))  # level 0: block row I - 1, block J at [:, J + 1]
        w_cur = np.zeros((8, cc + 2))
        _residual_row(level0, u, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, f, A, 2 * I0 - 1, r_prev)
        if level0:
            weights_row0(cls, table, ptab, pflag, I0 - 1, w_prev, 1)
        for I in range(I0, I1):
            _residual_row(level0, u, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, f, A, 2 * I, r_cur)
            _residual_row(level0, u, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, f, A, 2 * I + 1, r_next)
            if level0:
                weights_row0(cls, table, ptab, pflag, I, w_cur, 1)
                _gather(fc[I + 1], r_prev, r_cur, r_next, w_prev, w_cur)
                w_prev, w_cur = w_cur, w_prev
            else:
                _gather(fc[I + 1], r_prev, r_cur, r_next, P[:, I], P[:, I + 1])
            r_prev, r_next = r_next, r_prev


# Level-0 calls pass no coarse planes, coarse calls no class arrays or segments. Called from
# Python, ``level0`` is a run-time flag: one build serves both (per class-code dtype).
_NO_PLANES = np.zeros((9, 1, 1))
_NO_WEIGHTS = np.zeros((8, 1, 1), dtype=WEIGHT_DTYPE)  # the coarse calls' weight type: one build serves both
_NO_CLASSES = np.zeros((1, 1), dtype=np.uint8)
_NO_TABLE = np.zeros((1, 5))
_NO_INT64 = np.zeros(1, dtype=np.int64)
_NO_INT32 = np.zeros(1, dtype=np.int32)


def restrict0(u, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, ptab, pflag, fc, nblk):
    """fc (level-1 padded) = P^T (b - A u) on the coarse cells: the restricted unnormalised residual."""
    _restrict(True, u, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, ptab, pflag,
              _NO_PLANES[0], _NO_PLANES[:5], _NO_WEIGHTS, fc, nblk)


def restrict9(e, f, A, P, fc, nblk):
    """fc (next level, padded) = P^T (f - A e) of a coarse level."""
    _restrict(False, e, _NO_CLASSES, _NO_TABLE, _NO_TABLE[0], _NO_INT64, _NO_INT32, _NO_INT32, _NO_INT64,
              _NO_TABLE[:, :4], _NO_CLASSES[0], f, A, P, fc, nblk)


@kernel(inline=True)
def _add_c(u, c, ec0, w):
    # C cells: u += e_c on the unknowns (w unused: weight 1)
    for J in range(u.shape[0]):
        x = u[J]
        u[J] = x + ec0[J] if c[J] != 0 else x


@kernel(inline=True)
def _add2(u, c, wa, wb, ea, eb):
    # row or column cells: u += wa ea + wb eb on the unknowns
    for J in range(u.shape[0]):
        x = u[J]
        u[J] = x + (wa[J] * ea[J] + wb[J] * eb[J]) if c[J] != 0 else x


@kernel(inline=True)
def _add4(u, c, w0, w1, w2, w3, e0, e1, e2, e3):
    # centre cells: u += Σ w e over the 4 coarse cells
    for J in range(u.shape[0]):
        x = u[J]
        u[J] = x + (((w0[J] * e0[J] + w1[J] * e1[J]) + w2[J] * e2[J]) + w3[J] * e3[J]) if c[J] != 0 else x


@kernel(parallel=True)
def prolong0(u, cls, table, ptab, pflag, ec, nblk):
    """u += P e_c on the unknowns of level 0 (u padded, ec the level-1 padded correction).

    Per coarse row the block weights are computed once (planar), then the
    four kinds of fine cells are updated by strided, vectorisable loops.
    """
    rc = ec.shape[0] - 2
    cc = ec.shape[1] - 2
    rows = u.shape[0] - 2
    cols = u.shape[1] - 2
    nc = (cols + 1) // 2  # fine columns 2J (C and column cells)
    nr = cols // 2  # fine columns 2J + 1 (row and centre cells)
    for b in prange(nblk):
        w = np.zeros((8, cc + 2))
        lo, hi = span(b, rc, nblk)
        for I in range(lo, hi):
            weights_row0(cls, table, ptab, pflag, I, w, 0)
            i0 = 2 * I + 1
            e0 = ec[I + 1, 1:]  # coarse (I, J) at [J]
            e1 = ec[I + 2, 1:]  # coarse (I + 1, J) at [J]
            _add_c(u[i0, 1 : 2 * nc : 2], cls[i0, 1 : 2 * nc : 2], e0, w[0])
            _add2(u[i0, 2 : 2 * nr + 1 : 2], cls[i0, 2 : 2 * nr + 1 : 2], w[0], w[1], e0, e0[1:])
            if 2 * I + 1 < rows:
                _add2(u[i0 + 1, 1 : 2 * nc : 2], cls[i0 + 1, 1 : 2 * nc : 2], w[2], w[3], e0, e1)
                _add4(u[i0 + 1, 2 : 2 * nr + 1 : 2], cls[i0 + 1, 2 : 2 * nr + 1 : 2], w[4], w[5], w[6], w[7],
                      e0, e0[1:], e1, e1[1:])


@kernel(parallel=True)
def prolong9(e, A, P, ec, nblk):
    """e += P e_c on the unknowns of a coarse level."""
    rc = ec.shape[0] - 2
    cc = ec.shape[1] - 2
    rows = e.shape[0] - 2
    cols = e.shape[1] - 2
    for b in prange(nblk):
        lo, hi = span(b, rc, nblk)
        for I in range(lo, hi):
            i0 = 2 * I + 1
            e0 = ec[I + 1]
            e1 = ec[I + 2]
            have_odd = 2 * I + 1 < rows
            for J in range(cc):
                j0 = 2 * J + 1
                a = e0[J + 1]
                bb = e0[J + 2]
                c = e1[J + 1]
                d = e1[J + 2]
                if A[0, i0, j0] > 0.0:
                    e[i0, j0] += a
                if j0 + 1 <= cols:
                    e[i0, j0 + 1] += P[0, I + 1, J + 1] * a + P[1, I + 1, J + 1] * bb
                if have_odd:
                    e[i0 + 1, j0] += P[2, I + 1, J + 1] * a + P[3, I + 1, J + 1] * c
                    if j0 + 1 <= cols:
                        e[i0 + 1, j0 + 1] += ((P[4, I + 1, J + 1] * a + P[5, I + 1, J + 1] * bb)
                                              + P[6, I + 1, J + 1] * c) + P[7, I + 1, J + 1] * d
