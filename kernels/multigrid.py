"""Multigrid kernels: interpolation, Galerkin coarse operators, transfers, coarse smoother, coarsest solve.

Levels
------
Level 0 is the operator's own grid (padded field ``u``, padded class array
``cls``, class ``table`` of wN, wS, wW, wE, q and class diagonal ``diag``; see
:mod:`relaxtui.kernels.sweeps`). A coarse level l >= 1 is a (R + 2, C + 2)
padded grid with R = (R_fine + 1) // 2, C = (C_fine + 1) // 2, and holds the
*unnormalised* symmetric 9-point Galerkin operator in five planes

    A[0] centre,  A[1] east (i, j+1),  A[2] south (i+1, j),
    A[3] south-east (i+1, j+1),  A[4] south-west (i+1, j-1),

every other coupling read from a neighbour by symmetry (west of (i, j) is
``A[1, i, j-1]``, north ``A[2, i-1, j]``, north-west ``A[3, i-1, j-1]``,
north-east ``A[4, i-1, j+1]``). A cell is an unknown iff its centre is > 0;
padding and non-unknowns are 0 in every plane.

Coarsening and interpolation
----------------------------
Coarse cell (I, J) sits on fine cell (2I, 2J) (unpadded indices): the fine
grid's cells are nodes of a graph and every other node in each direction is
kept, as in vertex-centred multigrid. Fine cells of block (I, J) are the
*C* cell (2I, 2J), the *row* cell (2I, 2J+1) between C cells (I, J) and
(I, J+1), the *column* cell (2I+1, 2J) between (I, J) and (I+1, J), and the
*centre* cell (2I+1, 2J+1). Interpolation is operator-dependent (the
collapsed-stencil rule of Dendy's black-box multigrid, J. E. Dendy,
J. Comput. Phys. 48, 1982):

- row cell: collapse the 3 x 3 stencil onto its row, so e = (σ_W e_W + σ_E e_E) / σ_C
  with σ the column sums (negated off-diagonal sums); a source that is not an
  unknown is dropped and its column folded into σ_C (its neighbours are
  taken to move with the cell), so a constant stays a constant next to
  insulated holes and a fixed neighbour pulls the weight below 1;
- column cell: the same with rows and columns swapped;
- centre cell: its own equation with the row and column cells' interpolated
  values, e = -Σ a_q e_q / a_P (positive couplings are folded into a_P).

A fine cell whose rule gives no weight (a one-cell channel on odd rows or
columns, an isolated cell) would be invisible to every coarser level; it is
instead *aggregated*: weight 1 to its own block's coarse cell, which then
exists even if its C cell does not. All sources of a fine cell (i, j) are in
the 2 x 2 coarse cells from (i // 2, j // 2), so a coarse cell's
interpolation support stays within one fine cell of its C cell, and the
Galerkin operator P^T A P stays a 9-point stencil on every level.

The weights of the 4 non-C cells of block (I, J) are 8 numbers, stored per
level in planes ``P[8, R + 2, C + 2]`` (block (I, J) at [I + 1, J + 1]):

    P[0], P[1]  row cell     -> (I, J), (I, J+1)
    P[2], P[3]  column cell  -> (I, J), (I+1, J)
    P[4..7]     centre cell  -> (I, J), (I, J+1), (I+1, J), (I+1, J+1)

On level 0 they are computed on the fly from the class table (per-class
row/column weights ``ptab`` and flags ``pflag``), so the finest grid, the
only big one, carries no interpolation arrays.

Every kernel here is a pure function of arrays; ``nblk`` is the number of
row blocks run in parallel (results do not depend on it).
"""

import numpy as np
from numba import prange
from relaxtui.kernels._bits import abs_bits, from_bits
from relaxtui.kernels._jit import kernel

CENTRE, EAST, SOUTH, SOUTH_EAST, SOUTH_WEST = 0, 1, 2, 3, 4
ROW_LOST, COLUMN_LOST, ISOLATED = 1, 2, 4  # pflag bits (level 0) and lost-cell bits (coarse levels)


# --- level 0: per-cell helpers --------------------------------------------------------------


@kernel(inline=True)
def _block0(cls, table, ptab, pflag, I, J, w):
    """The 8 interpolation weights of block (I, J) of level 0 into w (see the module docstring)."""
    i0 = 2 * I + 1  # padded row of fine row 2I
    j0 = 2 * J + 1  # padded column of fine column 2J
    ch = cls[i0, j0 + 1]
    cv = cls[i0 + 1, j0]
    cx = cls[i0 + 1, j0 + 1]
    w[0] = ptab[ch, 0]
    w[1] = ptab[ch, 1]
    w[2] = ptab[cv, 2]
    w[3] = ptab[cv, 3]
    if cx == 0:
        w[4] = 0.0
        w[5] = 0.0
        w[6] = 0.0
        w[7] = 0.0
    elif pflag[cx] & ISOLATED:
        w[4] = 1.0
        w[5] = 0.0
        w[6] = 0.0
        w[7] = 0.0
    else:
        tn = table[cx, 0]
        ts = table[cx, 1]
        tw = table[cx, 2]
        te = table[cx, 3]
        cs = cls[i0 + 2, j0 + 1]
        ce = cls[i0 + 1, j0 + 2]
        w[4] = tn * ptab[ch, 0] + tw * ptab[cv, 2]
        w[5] = tn * ptab[ch, 1] + te * ptab[ce, 2]
        w[6] = ts * ptab[cs, 0] + tw * ptab[cv, 3]
        w[7] = ts * ptab[cs, 1] + te * ptab[ce, 3]


@kernel(parallel=True)
def block_weights0(cls, table, ptab, pflag, P):
    """P (8, Rc + 2, Cc + 2): level 0's interpolation weights in the planes coarse levels store."""
    rc = P.shape[1] - 2
    cc = P.shape[2] - 2
    for I in prange(rc):
        wb = np.zeros(8)
        for J in range(cc):
            _block0(cls, table, ptab, pflag, I, J, wb)
            for k in range(8):
                P[k, I + 1, J + 1] = wb[k]


@kernel(inline=True)
def _res_bulk(up, mid, dn, out, wn, ws, ww, we, q, d):
    for k in range(out.shape[0]):
        out[k] = d * (((((wn * up[k] + ws * dn[k]) + ww * mid[k]) + we * mid[k + 2]) + q) - mid[k + 1])


@kernel(inline=True)
def _res_mixed(up, mid, dn, out, crow, table, diag):
    for k in range(out.shape[0]):
        c = crow[k]
        s = (((table[c, 0] * up[k] + table[c, 1] * dn[k]) + table[c, 2] * mid[k]) + table[c, 3] * mid[k + 2]) + table[c, 4]
        out[k] = diag[c] * (s - mid[k + 1]) if c != 0 else 0.0


@kernel(inline=True)
def _residual_row0(u, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, i, out):
    """out[j + 1] = unnormalised residual D (Σ w u + q - u) of fine cell (i, j) (0 off the unknowns).

    Walks the operator's row segments (see :mod:`relaxtui.kernels.sweeps`):
    a bulk run loads its weights once, a mixed stretch gathers them per cell.
    """
    for j in range(out.shape[0]):
        out[j] = 0.0
    if i < 0 or i >= u.shape[0] - 2:
        return
    pi = i + 1
    up = u[pi - 1]
    mid = u[pi]
    dn = u[pi + 1]
    crow = cls[pi]
    for s in range(row_ptr[pi], row_ptr[pi + 1]):
        j0 = seg_start[s]
        j1 = seg_end[s]
        c = seg_class[s]
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
def restrict0(u, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, ptab, pflag, fc, nblk):
    """fc (level-1 padded) = P^T (b - A u) on the coarse cells: the restricted unnormalised residual.

    Coarse rows are split into ``nblk`` blocks; within a block the fine
    residual rows and the block weights are computed once each and rolled
    from one coarse row to the next.
    """
    rc = fc.shape[0] - 2
    cc = fc.shape[1] - 2
    cols = u.shape[1] - 2
    for b in prange(nblk):
        I0 = b * rc // nblk
        I1 = (b + 1) * rc // nblk
        if I1 <= I0:
            continue
        r_prev = np.zeros(cols + 2)  # fine row 2I - 1
        r_cur = np.zeros(cols + 2)  # fine row 2I
        r_next = np.zeros(cols + 2)  # fine row 2I + 1
        w_prev = np.zeros((8, cc + 2))  # block row I - 1, block J at [:, J + 1]
        w_cur = np.zeros((8, cc + 2))
        wb = np.zeros(8)
        _residual_row0(u, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, 2 * I0 - 1, r_prev)
        if I0 > 0:
            for J in range(cc):
                _block0(cls, table, ptab, pflag, I0 - 1, J, wb)
                for k in range(8):
                    w_prev[k, J + 1] = wb[k]
        for I in range(I0, I1):
            _residual_row0(u, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, 2 * I, r_cur)
            _residual_row0(u, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, 2 * I + 1, r_next)
            for J in range(cc):
                _block0(cls, table, ptab, pflag, I, J, wb)
                for k in range(8):
                    w_cur[k, J + 1] = wb[k]
            _gather(fc[I + 1], r_prev, r_cur, r_next, w_prev, w_cur)
            r_prev, r_next = r_next, r_prev
            w_prev, w_cur = w_cur, w_prev


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
        wb = np.zeros(8)
        w = np.zeros((8, cc + 2))
        for I in range(b * rc // nblk, (b + 1) * rc // nblk):
            for J in range(cc):
                _block0(cls, table, ptab, pflag, I, J, wb)
                for k in range(8):
                    w[k, J] = wb[k]
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
def delta_copy(u, u_old, nblk):
    """The largest |u - u_old| (NaN if any is not finite), then u_old = u; 2-D arrays of one shape."""
    n = u.shape[0]
    bu = np.zeros(nblk, dtype=np.int64)
    for b in prange(nblk):
        mu = 0
        for i in range(b * n // nblk, (b + 1) * n // nblk):
            new = u[i]
            old = u_old[i]
            for j in range(new.shape[0]):
                v = new[j]
                mu = max(mu, abs_bits(v - old[j]))
                old[j] = v
        bu[b] = mu
    return from_bits(bu.max())


@kernel(parallel=True)
def copy_into(src, dst, nblk):
    """dst[...] = src (2-D, same shape), row blocks in parallel."""
    n = src.shape[0]
    for b in prange(nblk):
        for i in range(b * n // nblk, (b + 1) * n // nblk):
            a = src[i]
            o = dst[i]
            for j in range(a.shape[0]):
                o[j] = a[j]


# --- per-row buffers of interpolation rows and stencils (Galerkin products) ------------------


@kernel(inline=True)
def _p_of_cell(w_block, i, j, live_c, out):
    """Interpolation row of fine cell (i, j) (unpadded) toward the 2 x 2 coarse cells from (i // 2, j // 2).

    ``w_block`` holds the 8 weights of block (i // 2, j // 2); ``live_c`` is
    1 if (i, j) is an unknown C cell. out[2a + b] is the weight toward
    (i // 2 + a, j // 2 + b).
    """
    out[0] = 0.0
    out[1] = 0.0
    out[2] = 0.0
    out[3] = 0.0
    ri = i & 1
    rj = j & 1
    if ri == 0 and rj == 0:
        out[0] = 1.0 if live_c else 0.0
    elif ri == 0:
        out[0] = w_block[0]
        out[1] = w_block[1]
    elif rj == 0:
        out[0] = w_block[2]
        out[2] = w_block[3]
    else:
        out[0] = w_block[4]
        out[1] = w_block[5]
        out[2] = w_block[6]
        out[3] = w_block[7]


@kernel(inline=True)
def _block_row0(cls, table, ptab, pflag, I, wrow):
    """wrow[J + 1] = the 8 weights of block (I, J) of level 0, for every J (zeros outside the grid)."""
    cc = wrow.shape[0] - 2
    rc = (cls.shape[0] - 1) // 2  # (rows + 1) // 2
    for J in range(cc + 2):
        for k in range(8):
            wrow[J, k] = 0.0
    if I < 0 or I >= rc:
        return
    for J in range(cc):
        _block0(cls, table, ptab, pflag, I, J, wrow[J + 1])


@kernel(inline=True)
def _prow0(cls, wrow, i, prow, cell):
    """prow[j + 1, :] = interpolation row of level-0 cell (i, j); wrow holds block row i // 2."""
    rows = cls.shape[0] - 2
    cols = cls.shape[1] - 2
    for j in range(cols + 2):
        for k in range(4):
            prow[j, k] = 0.0
    if i < 0 or i >= rows:
        return
    for j in range(cols):
        _p_of_cell(wrow[(j >> 1) + 1], i, j, cls[i + 1, j + 1] != 0, cell)
        for k in range(4):
            prow[j + 1, k] = cell[k]


@kernel(inline=True)
def _arow0(cls, table, diag, i, arow):
    """arow[j + 1, k] = A((i, j), (i, j) + OFF[k]) of level 0 (OFF: 3 x 3 offsets, row-major)."""
    rows = cls.shape[0] - 2
    cols = cls.shape[1] - 2
    for j in range(cols + 2):
        for k in range(9):
            arow[j, k] = 0.0
    if i < 0 or i >= rows:
        return
    for j in range(cols):
        c = cls[i + 1, j + 1]
        if c == 0:
            continue
        d = diag[c]
        arow[j + 1, 1] = -table[c, 0] * d
        arow[j + 1, 7] = -table[c, 1] * d
        arow[j + 1, 3] = -table[c, 2] * d
        arow[j + 1, 5] = -table[c, 3] * d
        arow[j + 1, 4] = d


@kernel(inline=True)
def _prow9(P, A, i, prow, wb, cell):
    """prow[j + 1, :] = interpolation row of cell (i, j) of a coarse level with weights P, stencil A."""
    rows = A.shape[1] - 2
    cols = A.shape[2] - 2
    for j in range(cols + 2):
        for k in range(4):
            prow[j, k] = 0.0
    if i < 0 or i >= rows:
        return
    for j in range(cols):
        for k in range(8):
            wb[k] = P[k, (i >> 1) + 1, (j >> 1) + 1]
        _p_of_cell(wb, i, j, A[0, i + 1, j + 1] > 0.0, cell)
        for k in range(4):
            prow[j + 1, k] = cell[k]


@kernel(inline=True)
def _arow9(A, i, arow):
    """arow[j + 1, k] = A((i, j), (i, j) + OFF[k]) of a coarse level (symmetric 5-plane storage)."""
    rows = A.shape[1] - 2
    cols = A.shape[2] - 2
    for j in range(cols + 2):
        for k in range(9):
            arow[j, k] = 0.0
    if i < 0 or i >= rows:
        return
    pi = i + 1
    for j in range(cols):
        pj = j + 1
        if not A[0, pi, pj] > 0.0:
            continue
        arow[pj, 0] = A[3, pi - 1, pj - 1]
        arow[pj, 1] = A[2, pi - 1, pj]
        arow[pj, 2] = A[4, pi - 1, pj + 1]
        arow[pj, 3] = A[1, pi, pj - 1]
        arow[pj, 4] = A[0, pi, pj]
        arow[pj, 5] = A[1, pi, pj]
        arow[pj, 6] = A[4, pi, pj]
        arow[pj, 7] = A[2, pi, pj]
        arow[pj, 8] = A[3, pi, pj]


@kernel(inline=True)
def _galerkin_row(prows, arows, I, cols_f, acc, Ac, five, skip):
    """Coarse row I of P^T A P into Ac (the 5 stored planes).

    Ring buffers: fine row r's interpolation rows are in ``prows[(r + 2) % 5]``
    (rows 2I - 2 .. 2I + 2 needed), its stencil in ``arows[(r + 1) % 3]``
    (rows 2I - 1 .. 2I + 1). ``acc`` is a (4, 4) scratch array: the
    contribution to coarse cell (I + di, J + dj) goes to acc[di + 1, dj + 1].
    With ``five`` the fine stencil is known to be 5-point (level 0). Cells
    with ``skip[J + 1]`` nonzero are left alone (filled from a bulk table).
    """
    cc = Ac.shape[2] - 2
    pslot = np.empty(5, dtype=np.int64)
    for m in range(5):
        pslot[m] = (2 * I + m) % 5  # fine row 2I - 2 + m
    for J in range(cc):
        if skip[J + 1] != 0:
            continue
        for x in range(4):
            for y in range(4):
                acc[x, y] = 0.0
        for dpi in range(3):  # fine row 2I - 1 + dpi
            arow = arows[(2 * I + dpi) % 3]
            prow_p = prows[pslot[dpi + 1]]
            a = 1 if dpi == 0 else 0
            for dpj in range(3):
                p_j = 2 * J - 1 + dpj
                if p_j < 0 or p_j >= cols_f:
                    continue
                w = prow_p[p_j + 1, 2 * a + (1 if dpj == 0 else 0)]
                if w == 0.0:
                    continue
                ap = arow[p_j + 1]
                for k in range(9):
                    if five and (k & 1) == 0 and k != 4:
                        continue
                    apq = ap[k]
                    if apq == 0.0:
                        continue
                    ki = k // 3
                    kj = k - 3 * ki
                    q_j = p_j + kj - 1
                    prq = prows[pslot[dpi + ki], q_j + 1]
                    wa = w * apq
                    di = ((2 * I - 2 + dpi + ki) >> 1) - I + 1
                    dj = (q_j >> 1) - J + 1
                    acc[di, dj] += wa * prq[0]
                    acc[di, dj + 1] += wa * prq[1]
                    acc[di + 1, dj] += wa * prq[2]
                    acc[di + 1, dj + 1] += wa * prq[3]
        Ac[0, I + 1, J + 1] = acc[1, 1]
        Ac[1, I + 1, J + 1] = acc[1, 2]
        Ac[2, I + 1, J + 1] = acc[2, 1]
        Ac[3, I + 1, J + 1] = acc[2, 2]
        Ac[4, I + 1, J + 1] = acc[2, 0]


@kernel(inline=True)
def _bulk_row0(cls, bulk, I, Ac, tag):
    """Coarse cells of row I whose 5 x 5 fine neighbourhood is one bulk class c with a
    known stencil ``bulk[c]`` (centre > 0) get it, and tag c; the others tag 0."""
    rows = cls.shape[0] - 2
    cols = cls.shape[1] - 2
    cc = Ac.shape[2] - 2
    trow = tag[I + 1]
    for J in range(cc + 2):
        trow[J] = 0
    if 2 * I - 2 < 0 or 2 * I + 2 >= rows:
        return
    for J in range(1, cc):
        if 2 * J + 2 >= cols:
            break
        c = cls[2 * I + 1, 2 * J + 1]
        if c == 0 or not bulk[c, 0] > 0.0:
            continue
        same = True
        for x in range(2 * I - 1, 2 * I + 4):
            for y in range(2 * J - 1, 2 * J + 4):
                if cls[x, y] != c:
                    same = False
        if same:
            trow[J + 1] = c
            for k in range(5):
                Ac[k, I + 1, J + 1] = bulk[c, k]


@kernel(inline=True)
def _bulk_row9(tag_f, bulk, I, Ac, tag):
    """As :func:`_bulk_row0` on a coarse level: the 5 x 5 fine cells all carry one bulk tag."""
    rows = tag_f.shape[0] - 2
    cols = tag_f.shape[1] - 2
    cc = Ac.shape[2] - 2
    trow = tag[I + 1]
    for J in range(cc + 2):
        trow[J] = 0
    if 2 * I - 2 < 0 or 2 * I + 2 >= rows:
        return
    for J in range(1, cc):
        if 2 * J + 2 >= cols:
            break
        c = tag_f[2 * I + 1, 2 * J + 1]
        if c == 0 or not bulk[c, 0] > 0.0:
            continue
        same = True
        for x in range(2 * I - 1, 2 * I + 4):
            for y in range(2 * J - 1, 2 * J + 4):
                if tag_f[x, y] != c:
                    same = False
        if same:
            trow[J + 1] = c
            for k in range(5):
                Ac[k, I + 1, J + 1] = bulk[c, k]


@kernel(parallel=True)
def galerkin0(cls, table, diag, ptab, pflag, bulk, Ac, tag, nblk):
    """Ac (5, Rc + 2, Cc + 2), zero on entry: the level-1 Galerkin operator P^T A P of level 0.

    A coarse cell whose 5 x 5 fine neighbourhood is a single class c (which
    alone decides its stencil) takes ``bulk[c]`` when that is known
    (centre > 0) and is tagged c in ``tag`` (Rc + 2, Cc + 2, uint32);
    others are computed. Each row block walks its coarse rows in order and
    keeps the fine rows it needs in ring buffers, so every fine row is
    processed once per block.
    """
    rc = Ac.shape[1] - 2
    cc = Ac.shape[2] - 2
    cols = cls.shape[1] - 2
    for b in prange(nblk):
        I0 = b * rc // nblk
        I1 = (b + 1) * rc // nblk
        if I1 <= I0:
            continue
        prows = np.zeros((5, cols + 2, 4))
        arows = np.zeros((3, cols + 2, 9))
        wrow = np.zeros((cc + 2, 8))
        cell = np.zeros(4)
        acc = np.zeros((4, 4))
        block_row = -(1 << 30)
        next_p = 2 * I0 - 2
        next_a = 2 * I0 - 1
        for I in range(I0, I1):
            while next_p <= 2 * I + 2:
                if (next_p >> 1) != block_row:
                    block_row = next_p >> 1
                    _block_row0(cls, table, ptab, pflag, block_row, wrow)
                _prow0(cls, wrow, next_p, prows[(next_p + 2) % 5], cell)
                next_p += 1
            while next_a <= 2 * I + 1:
                _arow0(cls, table, diag, next_a, arows[(next_a + 1) % 3])
                next_a += 1
            _bulk_row0(cls, bulk, I, Ac, tag)
            _galerkin_row(prows, arows, I, cols, acc, Ac, True, tag[I + 1])


@kernel(parallel=True)
def galerkin9(A, P, tag_f, bulk, Ac, tag, nblk):
    """Ac (5, Rc + 2, Cc + 2), zero on entry: P^T A P of a coarse level (stencil A, weights P).

    ``tag_f`` are the bulk tags of this level's cells, ``bulk[t]`` the next
    level's stencil of a cell whose 5 x 5 neighbourhood all carries tag t
    (see :func:`galerkin0`); ``tag`` receives the next level's tags.
    """
    rc = Ac.shape[1] - 2
    cols = A.shape[2] - 2
    for b in prange(nblk):
        I0 = b * rc // nblk
        I1 = (b + 1) * rc // nblk
        if I1 <= I0:
            continue
        prows = np.zeros((5, cols + 2, 4))
        arows = np.zeros((3, cols + 2, 9))
        wb = np.zeros(8)
        cell = np.zeros(4)
        acc = np.zeros((4, 4))
        next_p = 2 * I0 - 2
        next_a = 2 * I0 - 1
        for I in range(I0, I1):
            while next_p <= 2 * I + 2:
                _prow9(P, A, next_p, prows[(next_p + 2) % 5], wb, cell)
                next_p += 1
            while next_a <= 2 * I + 1:
                _arow9(A, next_a, arows[(next_a + 1) % 3])
                next_a += 1
            _bulk_row9(tag_f, bulk, I, Ac, tag)
            _galerkin_row(prows, arows, I, cols, acc, Ac, False, tag[I + 1])


# --- coarse levels: interpolation weights -------------------------------------------------


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
        out[k] = -sa / den if use_a else 0.0
        out[k + 1] = -sb / den if use_b else 0.0
        return 0
    out[k] = 1.0
    out[k + 1] = 0.0
    return 1


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
        for I in range(b * rc // nblk, (b + 1) * rc // nblk):
            for J in range(cc):
                pi = 2 * I + 1
                pj = 2 * J + 2  # row cell (2I, 2J+1), padded
                if 2 * J + 1 < cols and A[0, pi, pj] > 0.0:
                    sw = A[3, pi - 1, pj - 1] + A[1, pi, pj - 1] + A[4, pi, pj]  # NW + W + SW
                    sc = A[2, pi - 1, pj] + A[0, pi, pj] + A[2, pi, pj]  # N + C + S
                    se = A[4, pi - 1, pj + 1] + A[1, pi, pj] + A[3, pi, pj]  # NE + E + SE
                    have_w = A[0, pi, pj - 1] > 0.0
                    have_e = 2 * J + 2 < cols and A[0, pi, pj + 1] > 0.0
                    if _collapsed(sw, sc, se, have_w, have_e, P[:, I + 1, J + 1], 0):
                        lost[I + 1, J + 1] |= 1
                pi = 2 * I + 2
                pj = 2 * J + 1  # column cell (2I+1, 2J), padded
                if 2 * I + 1 < rows and A[0, pi, pj] > 0.0:
                    sn = A[3, pi - 1, pj - 1] + A[2, pi - 1, pj] + A[4, pi - 1, pj + 1]  # NW + N + NE
                    sc = A[1, pi, pj - 1] + A[0, pi, pj] + A[1, pi, pj]  # W + C + E
                    ss = A[4, pi, pj] + A[2, pi, pj] + A[3, pi, pj]  # SW + S + SE
                    have_n = A[0, pi - 1, pj] > 0.0
                    have_s = 2 * I + 2 < rows and A[0, pi + 1, pj] > 0.0
                    if _collapsed(sn, sc, ss, have_n, have_s, P[:, I + 1, J + 1], 2):
                        lost[I + 1, J + 1] |= 2
    for b in prange(nblk):
        for I in range(b * rc // nblk, (b + 1) * rc // nblk):
            for J in range(cc):
                pi = 2 * I + 2
                pj = 2 * J + 2  # centre cell (2I+1, 2J+1), padded
                if 2 * I + 1 >= rows or 2 * J + 1 >= cols or not A[0, pi, pj] > 0.0:
                    continue
                d = A[0, pi, pj]
                anw = A[3, pi - 1, pj - 1]
                an = A[2, pi - 1, pj]
                ane = A[4, pi - 1, pj + 1]
                aw = A[1, pi, pj - 1]
                ae = A[1, pi, pj]
                asw = A[4, pi, pj]
                a_s = A[2, pi, pj]
                ase = A[3, pi, pj]
                # positive couplings are folded into the diagonal (no negative weights)
                if anw > 0.0:
                    d += anw
                    anw = 0.0
                if an > 0.0:
                    d += an
                    an = 0.0
                if ane > 0.0:
                    d += ane
                    ane = 0.0
                if aw > 0.0:
                    d += aw
                    aw = 0.0
                if ae > 0.0:
                    d += ae
                    ae = 0.0
                if asw > 0.0:
                    d += asw
                    asw = 0.0
                if a_s > 0.0:
                    d += a_s
                    a_s = 0.0
                if ase > 0.0:
                    d += ase
                    ase = 0.0
                cnw = 1.0 if A[0, pi - 1, pj - 1] > 0.0 else 0.0  # C cells of the 4 corners
                cne = 1.0 if A[0, pi - 1, pj + 1] > 0.0 else 0.0
                csw = 1.0 if A[0, pi + 1, pj - 1] > 0.0 else 0.0
                cse = 1.0 if A[0, pi + 1, pj + 1] > 0.0 else 0.0
                w00 = -(anw * cnw + an * P[0, I + 1, J + 1] + aw * P[2, I + 1, J + 1]) / d
                w01 = -(ane * cne + an * P[1, I + 1, J + 1] + ae * P[2, I + 1, J + 2]) / d
                w10 = -(asw * csw + a_s * P[0, I + 2, J + 1] + aw * P[3, I + 1, J + 1]) / d
                w11 = -(ase * cse + a_s * P[1, I + 2, J + 1] + ae * P[3, I + 1, J + 2]) / d
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
                else:
                    P[4, I + 1, J + 1] = 1.0
                    lost[I + 1, J + 1] |= 4


# --- coarse levels: smoother, residual and transfers --------------------------------------------


@kernel(inline=True)
def _offsum9(ae, aw, a_s, an, ase, anw, asw, ane, up, mid, dn, t):
    # t[k] = Σ over the 8 neighbours of a_q e_q for the row's cells k (up/mid/dn carry one halo cell each end)
    for k in range(t.shape[0]):
        t[k] = (((ae[k] * mid[k + 2] + aw[k] * mid[k]) + (a_s[k] * dn[k + 1] + an[k] * up[k + 1]))
                + ((ase[k] * dn[k + 2] + anw[k] * up[k]) + (asw[k] * dn[k] + ane[k] * up[k + 2])))


@kernel(inline=True)
def _blend9(cells, t, dinv, f, parity, omega):
    # Gauss-Seidel/SOR update of the row's cells k with (k & 1) == parity from the off-centre sums t
    for k in range(t.shape[0]):
        x = cells[k]
        di = dinv[k]
        v = x + omega * ((f[k] - t[k]) * di - x)
        cells[k] = v if ((k & 1) == parity and di > 0.0) else x


@kernel(inline=True)
def _smooth_row(e, f, A, Dinv, omega, pi, first_col, t):
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
        _blend9(e[pi, 1 : n + 1], tt, Dinv[pi, 1 : n + 1], f[pi, 1 : n + 1], first_col ^ par, omega)


@kernel(parallel=True)
def smooth9(e, f, A, Dinv, omega, sweeps, reverse, nblk):
    """``sweeps`` four-colour Gauss-Seidel/SOR sweeps of A e = f on a coarse level, in place.

    Colours are (row parity, column parity); with a 9-point stencil no two
    cells of a colour are coupled, so this is a true Gauss-Seidel. Forward
    order: even rows (even columns, then odd), then odd rows; ``reverse``
    runs the colours backwards (the adjoint sweep). ``Dinv`` is 1 / A[0] on
    the unknowns, 0 elsewhere. Row blocks run in parallel: each block does
    its first-parity rows and the second-parity rows between them, then a
    short pass does the second-parity rows at block edges; the result is
    that of the plain order, bit for bit.
    """
    rows = e.shape[0] - 2
    width = e.shape[1]
    fp = 1 if reverse else 0
    fc = 1 if reverse else 0
    for it in range(sweeps):
        for b in prange(nblk):
            t = np.empty(width)
            r0 = b * rows // nblk
            r1 = (b + 1) * rows // nblk
            for r in range(r0, r1):
                if (r & 1) == fp:
                    _smooth_row(e, f, A, Dinv, omega, r + 1, fc, t)
                    if r - 1 > r0:
                        _smooth_row(e, f, A, Dinv, omega, r, fc, t)  # second-parity row r - 1 (padded r)
        for b in prange(nblk):
            t = np.empty(width)
            r0 = b * rows // nblk
            r1 = (b + 1) * rows // nblk
            if r1 <= r0:
                continue
            if (r0 & 1) != fp:
                _smooth_row(e, f, A, Dinv, omega, r0 + 1, fc, t)
            if r1 - 1 != r0 and ((r1 - 1) & 1) != fp:
                _smooth_row(e, f, A, Dinv, omega, r1, fc, t)


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
def _residual_row9(e, f, A, i, out):
    """out[j + 1] = f - A e at cell (i, j) of a coarse level (0 off the unknowns and outside the grid)."""
    cols = e.shape[1] - 2
    for j in range(out.shape[0]):
        out[j] = 0.0
    if i < 0 or i >= e.shape[0] - 2:
        return
    pi = i + 1
    n = cols
    _res9(A[0, pi, 1 : n + 1], A[1, pi, 1 : n + 1], A[1, pi, 0:n], A[2, pi, 1 : n + 1], A[2, pi - 1, 1 : n + 1],
          A[3, pi, 1 : n + 1], A[3, pi - 1, 0:n], A[4, pi, 1 : n + 1], A[4, pi - 1, 2 : n + 2],
          e[pi - 1], e[pi], e[pi + 1], f[pi, 1 : n + 1], out[1 : n + 1])


@kernel(parallel=True)
def restrict9(e, f, A, P, fc, nblk):
    """fc (next level, padded) = P^T (f - A e) of a coarse level."""
    rc = fc.shape[0] - 2
    cols = e.shape[1] - 2
    for b in prange(nblk):
        I0 = b * rc // nblk
        I1 = (b + 1) * rc // nblk
        if I1 <= I0:
            continue
        r_prev = np.zeros(cols + 2)
        r_cur = np.zeros(cols + 2)
        r_next = np.zeros(cols + 2)
        _residual_row9(e, f, A, 2 * I0 - 1, r_prev)
        for I in range(I0, I1):
            _residual_row9(e, f, A, 2 * I, r_cur)
            _residual_row9(e, f, A, 2 * I + 1, r_next)
            _gather(fc[I + 1], r_prev, r_cur, r_next, P[:, I], P[:, I + 1])
            r_prev, r_next = r_next, r_prev


@kernel(parallel=True)
def prolong9(e, A, P, ec, nblk):
    """e += P e_c on the unknowns of a coarse level."""
    rc = ec.shape[0] - 2
    cc = ec.shape[1] - 2
    rows = e.shape[0] - 2
    cols = e.shape[1] - 2
    for b in prange(nblk):
        for I in range(b * rc // nblk, (b + 1) * rc // nblk):
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


@kernel(parallel=True)
def zero_fill(x, nblk):
    """x[...] = 0 (2-D), row blocks in parallel."""
    n = x.shape[0]
    for b in prange(nblk):
        for i in range(b * n // nblk, (b + 1) * n // nblk):
            row = x[i]
            for j in range(row.shape[0]):
                row[j] = 0.0


# --- the coarsest level: banded Cholesky ------------------------------------------------------


@kernel
def band_order(A, by_rows):
    """Number the unknowns of a coarse level (row-major if ``by_rows`` else column-major).

    Returns (index (R + 2, C + 2) int64, -1 off the unknowns; cells (n, 2)
    padded (row, col) per number; half bandwidth).
    """
    r2, c2 = A.shape[1], A.shape[2]
    index = -np.ones((r2, c2), dtype=np.int64)
    n = 0
    for i in range(1, r2 - 1):
        for j in range(1, c2 - 1):
            if A[0, i, j] > 0.0:
                n += 1
    cells = np.zeros((n, 2), dtype=np.int64)
    k = 0
    if by_rows:
        for i in range(1, r2 - 1):
            for j in range(1, c2 - 1):
                if A[0, i, j] > 0.0:
                    index[i, j] = k
                    cells[k, 0] = i
                    cells[k, 1] = j
                    k += 1
    else:
        for j in range(1, c2 - 1):
            for i in range(1, r2 - 1):
                if A[0, i, j] > 0.0:
                    index[i, j] = k
                    cells[k, 0] = i
                    cells[k, 1] = j
                    k += 1
    bw = 0
    for k in range(n):
        i = cells[k, 0]
        j = cells[k, 1]
        for di in range(-1, 2):
            for dj in range(-1, 2):
                m = index[i + di, j + dj]
                if m >= 0:
                    bw = max(bw, abs(m - k))
    return index, cells, bw


@kernel
def band_factor(A, index, cells, bw):
    """Cholesky factor L of the coarsest operator in lower band storage: L[k, d] = L(k, k - d).

    Returns (L, ok); ok is False if a pivot was not positive (the operator is
    then not positive definite).
    """
    n = cells.shape[0]
    L = np.zeros((n, bw + 1))
    for k in range(n):
        i = cells[k, 0]
        j = cells[k, 1]
        for di in range(-1, 2):
            for dj in range(-1, 2):
                m = index[i + di, j + dj]
                if m < 0 or m > k:
                    continue
                if di == 0 and dj == 0:
                    v = A[0, i, j]
                elif di == 0 and dj == -1:
                    v = A[1, i, j - 1]
                elif di == 0 and dj == 1:
                    v = A[1, i, j]
                elif di == -1 and dj == 0:
                    v = A[2, i - 1, j]
                elif di == 1 and dj == 0:
                    v = A[2, i, j]
                elif di == -1 and dj == -1:
                    v = A[3, i - 1, j - 1]
                elif di == 1 and dj == 1:
                    v = A[3, i, j]
                elif di == -1 and dj == 1:
                    v = A[4, i - 1, j + 1]
                else:
                    v = A[4, i, j]
                L[k, k - m] = v
    ok = True
    for k in range(n):
        # L(k, m) for m = k - bw .. k
        for d in range(bw, -1, -1):
            m = k - d
            if m < 0:
                continue
            s = L[k, d]
            lo = max(0, k - bw, m - bw)
            for t in range(lo, m):
                s -= L[k, k - t] * L[m, m - t]
            if d == 0:
                if not s > 0.0:
                    ok = False
                    s = 1.0
                L[k, 0] = np.sqrt(s)
            else:
                L[k, d] = s / L[m, 0]
    return L, ok


@kernel
def band_solve(L, cells, bw, f, e):
    """e = A^{-1} f on the coarsest level (f, e padded grids; e is overwritten on the unknowns)."""
    n = cells.shape[0]
    x = np.empty(n)
    for k in range(n):
        s = f[cells[k, 0], cells[k, 1]]
        for t in range(max(0, k - bw), k):
            s -= L[k, k - t] * x[t]
        x[k] = s / L[k, 0]
    for k in range(n - 1, -1, -1):
        s = x[k]
        for t in range(k + 1, min(n, k + bw + 1)):
            s -= L[t, t - k] * x[t]
        x[k] = s / L[k, 0]
    for k in range(n):
        e[cells[k, 0], cells[k, 1]] = x[k]


# --- level 0 as planes (direct solve of small problems) ----------------------------------------


@kernel(parallel=True)
def planes0(cls, table, diag, A, b):
    """Level 0 as the 5-plane symmetric storage of coarse levels: A (5, rows + 2, cols + 2) and the
    unnormalised right-hand side b (rows + 2, cols + 2); both zero on entry."""
    n = cls.shape[0] - 2
    m = cls.shape[1] - 2
    for i in prange(1, n + 1):
        for j in range(1, m + 1):
            c = cls[i, j]
            if c == 0:
                continue
            d = diag[c]
            A[0, i, j] = d
            A[1, i, j] = -table[c, 3] * d
            A[2, i, j] = -table[c, 1] * d
            b[i, j] = table[c, 4] * d


# --- flexible conjugate gradients on level 0 --------------------------------------------------
# Vectors are working arrays of the operator (padded, zero outside the unknowns except x, the
# field, which holds the fixed values); A is the unnormalised operator D (I - W) on the unknowns.


@kernel(parallel=True)
def fcg_direction(w, x, p, beta, nblk):
    """p = (w - x) + beta p (the new direction from the preconditioned residual w - x)."""
    n = x.shape[0]
    for b in prange(nblk):
        for i in range(b * n // nblk, (b + 1) * n // nblk):
            wr = w[i]
            xr = x[i]
            pr = p[i]
            for j in range(xr.shape[0]):
                pr[j] = (wr[j] - xr[j]) + beta * pr[j]


@kernel(inline=True)
def _dots_bulk(xu, xm, xd, pu, pm, pd, wn, ws, ww, we, q, d, s1, s2, mr):
    for k in range(xu.shape[0]):
        ap = d * (pm[k + 1] - (((wn * pu[k] + ws * pd[k]) + ww * pm[k]) + we * pm[k + 2]))
        r = ((((wn * xu[k] + ws * xd[k]) + ww * xm[k]) + we * xm[k + 2]) + q) - xm[k + 1]
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
        ap = d * (pm[k + 1] - (((table[c, 0] * pu[k] + table[c, 1] * pd[k]) + table[c, 2] * pm[k]) + table[c, 3] * pm[k + 2]))
        r = ((((table[c, 0] * xu[k] + table[c, 1] * xd[k]) + table[c, 2] * xm[k]) + table[c, 3] * xm[k + 2]) + table[c, 4]) - xm[k + 1]
        s1 += pm[k + 1] * ap
        s2 += pm[k + 1] * (d * r)
        mr = max(mr, abs_bits(r))
    return s1, s2, mr


@kernel(parallel=True)
def fcg_dots(x, p, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, nblk):
    """(p · A p, p · r(x), largest contract residual of x) with r(x) = b - A x (unnormalised).

    Walks the operator's row segments (bulk runs: constant weights, vectorisable).
    """
    n = x.shape[0] - 2
    a1 = np.zeros(nblk)
    a2 = np.zeros(nblk)
    mrs = np.zeros(nblk, dtype=np.int64)
    for b in prange(nblk):
        s1 = 0.0
        s2 = 0.0
        mr = 0
        for pi in range(1 + b * n // nblk, 1 + (b + 1) * n // nblk):
            for sg in range(row_ptr[pi], row_ptr[pi + 1]):
                j0 = seg_start[sg]
                j1 = seg_end[sg]
                c = seg_class[sg]
                if c > 0:
                    s1, s2, mr = _dots_bulk(x[pi - 1, j0:j1], x[pi, j0 - 1 : j1 + 1], x[pi + 1, j0:j1],
                                            p[pi - 1, j0:j1], p[pi, j0 - 1 : j1 + 1], p[pi + 1, j0:j1],
                                            table[c, 0], table[c, 1], table[c, 2], table[c, 3], table[c, 4], diag[c], s1, s2, mr)
                else:
                    s1, s2, mr = _dots_mixed(x[pi - 1, j0:j1], x[pi, j0 - 1 : j1 + 1], x[pi + 1, j0:j1],
                                             p[pi - 1, j0:j1], p[pi, j0 - 1 : j1 + 1], p[pi + 1, j0:j1],
                                             cls[pi, j0:j1], table, diag, s1, s2, mr)
        a1[b] = s1
        a2[b] = s2
        mrs[b] = mr
    return a1.sum(), a2.sum(), from_bits(mrs.max())


@kernel(parallel=True)
def fcg_update(x, p, alpha, w, nblk):
    """x += alpha p; w = x; returns the largest |alpha p| (NaN if not finite)."""
    n = x.shape[0]
    mu = np.zeros(nblk, dtype=np.int64)
    for b in prange(nblk):
        m = 0
        for i in range(b * n // nblk, (b + 1) * n // nblk):
            xr = x[i]
            pr = p[i]
            wr = w[i]
            for j in range(xr.shape[0]):
                d = alpha * pr[j]
                v = xr[j] + d
                xr[j] = v
                wr[j] = v
                m = max(m, abs_bits(d))
        mu[b] = m
    return from_bits(mu.max())


@kernel(inline=True)
def _rz_bulk(xu, xm, xd, wm, wn, ws, ww, we, q, d, s, mr):
    for k in range(xu.shape[0]):
        r = ((((wn * xu[k] + ws * xd[k]) + ww * xm[k]) + we * xm[k + 2]) + q) - xm[k + 1]
        s += (d * r) * (wm[k] - xm[k + 1])
        mr = max(mr, abs_bits(r))
    return s, mr


@kernel(inline=True)
def _rz_mixed(xu, xm, xd, wm, crow, table, diag, s, mr):
    for k in range(xu.shape[0]):
        c = crow[k]
        if c == 0:
            continue
        r = ((((table[c, 0] * xu[k] + table[c, 1] * xd[k]) + table[c, 2] * xm[k]) + table[c, 3] * xm[k + 2]) + table[c, 4]) - xm[k + 1]
        s += (diag[c] * r) * (wm[k] - xm[k + 1])
        mr = max(mr, abs_bits(r))
    return s, mr


@kernel(parallel=True)
def pcg_rz(x, w, cls, table, diag, row_ptr, seg_start, seg_end, seg_class, nblk):
    """(Σ r(x) · (w - x), largest contract residual of x): r(x) = b - A x unnormalised, w - x the
    preconditioned residual. Walks the operator's row segments."""
    n = x.shape[0] - 2
    acc = np.zeros(nblk)
    mrs = np.zeros(nblk, dtype=np.int64)
    for b in prange(nblk):
        s = 0.0
        mr = 0
        for pi in range(1 + b * n // nblk, 1 + (b + 1) * n // nblk):
            for sg in range(row_ptr[pi], row_ptr[pi + 1]):
                j0 = seg_start[sg]
                j1 = seg_end[sg]
                c = seg_class[sg]
                if c > 0:
                    s, mr = _rz_bulk(x[pi - 1, j0:j1], x[pi, j0 - 1 : j1 + 1], x[pi + 1, j0:j1], w[pi, j0:j1],
                                     table[c, 0], table[c, 1], table[c, 2], table[c, 3], table[c, 4], diag[c], s, mr)
                else:
                    s, mr = _rz_mixed(x[pi - 1, j0:j1], x[pi, j0 - 1 : j1 + 1], x[pi + 1, j0:j1], w[pi, j0:j1],
                                      cls[pi, j0:j1], table, diag, s, mr)
        acc[b] = s
        mrs[b] = mr
    return acc.sum(), from_bits(mrs.max())
