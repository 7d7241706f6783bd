"""Multigrid, Galerkin products: the coarse operator P^T A P of level 0 or of a coarse level.

Each row block walks its coarse rows in order and keeps the fine rows it
needs (interpolation rows and stencil rows) in ring buffers, so every fine
row is processed once per block. A coarse cell whose 5 x 5 fine
neighbourhood is one bulk class (or one bulk tag on a coarse level) takes a
precomputed stencil instead (same numbers: it was computed by this kernel on a
small grid of that class).
"""

import numpy as np
from numba import prange
from relaxtui.kernels._jit import kernel
from relaxtui.kernels.blocks import span
from relaxtui.kernels.mg_level0 import WEIGHT_DTYPE, weights_row0


@kernel(inline=True)
def stencil9(A, pi, pj, s):
    """s[3 (di + 1) + (dj + 1)] = coupling of padded cell (pi, pj) to (pi + di, pj + dj) (5-plane storage)."""
    s[0] = A[3, pi - 1, pj - 1]
    s[1] = A[2, pi - 1, pj]
    s[2] = A[4, pi - 1, pj + 1]
    s[3] = A[1, pi, pj - 1]
    s[4] = A[0, pi, pj]
    s[5] = A[1, pi, pj]
    s[6] = A[4, pi, pj]
    s[7] = A[2, pi, pj]
    s[8] = A[3, pi, pj]


@kernel(inline=True)
def _cleared(buf, i, rows):
    """Zero a (cols + 2, k) row buffer; True if fine row i lies in the grid (then it is to be filled)."""
    for j in range(buf.shape[0]):
        for k in range(buf.shape[1]):
            buf[j, k] = 0.0
    return 0 <= i < rows


@kernel(inline=True)
def _p_of_cell(w_block, i, j, live_c, out):
    """Interpolation row of fine cell (i, j) (unpadded) toward the 2 x 2 coarse cells from (i // 2, j // 2).

    ``w_block`` holds the 8 weights of block (i // 2, j // 2); ``live_c`` is
    1 if (i, j) is an unknown C cell. out[2a + b] is the weight toward
    (i // 2 + a, j // 2 + b).
    """
    ri = i & 1
    rj = j & 1
    out[0] = out[1] = out[2] = out[3] = 0.0
    if ri == 0 and rj == 0:
        out[0] = 1.0 if live_c else 0.0
    elif ri == 0:
        out[0] = w_block[0]
        out[1] = w_block[1]
    elif rj == 0:
        out[0] = w_block[2]
        out[2] = w_block[3]
    else:
        for k in range(4):
            out[k] = w_block[4 + k]


@kernel(inline=True)
def _prow(w, live, i, rows, prow, wb, cell):
    """prow[j + 1, :] = interpolation row of cell (i, j); w (8, Cc + 2) the planar weights of block
    row i // 2 (block J at [:, J + 1]), ``live`` the row's padded unknown flags (> 0)."""
    if not _cleared(prow, i, rows):
        return
    for j in range(prow.shape[0] - 2):
        for k in range(8):
            wb[k] = w[k, (j >> 1) + 1]
        _p_of_cell(wb, i, j, live[j + 1] > 0, cell)
        for k in range(4):
            prow[j + 1, k] = cell[k]


@kernel(inline=True)
def _arow0(cls, table, diag, i, arow):
    """arow[j + 1, k] = A((i, j), (i, j) + OFF[k]) of level 0 (OFF: 3 x 3 offsets, row-major)."""
    if not _cleared(arow, i, cls.shape[0] - 2):
        return
    for j in range(cls.shape[1] - 2):
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
def _arow9(A, i, arow):
    """arow[j + 1, k] = A((i, j), (i, j) + OFF[k]) of a coarse level (symmetric 5-plane storage)."""
    if not _cleared(arow, i, A.shape[1] - 2):
        return
    for j in range(A.shape[2] - 2):
        if A[0, i + 1, j + 1] > 0.0:
            stencil9(A, i + 1, j + 1, arow[j + 1])


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
def _bulk_row(tags, bulk, I, Ac, tag):
    """Coarse cells of row I whose 5 x 5 fine neighbourhood carries one tag c with a known stencil
    ``bulk[c]`` (centre > 0) get it, and tag c; the others tag 0. ``tags``: the fine level's class
    codes (level 0) or bulk tags (a coarse level), padded."""
    rows = tags.shape[0] - 2
    cols = tags.shape[1] - 2
    cc = Ac.shape[2] - 2
    trow = tag[I + 1]
    for J in range(cc + 2):
        trow[J] = 0
    if 2 * I - 2 < 0 or 2 * I + 2 >= rows:
        return
    for J in range(1, cc):
        if 2 * J + 2 >= cols:
            break
        c = tags[2 * I + 1, 2 * J + 1]
        if c == 0 or not bulk[c, 0] > 0.0:
            continue
        same = True
        for x in range(2 * I - 1, 2 * I + 4):
            for y in range(2 * J - 1, 2 * J + 4):
                if tags[x, y] != c:
                    same = False
        if same:
            trow[J + 1] = c
            for k in range(5):
                Ac[k, I + 1, J + 1] = bulk[c, k]


@kernel(inline=True)
def _row_at(i, last):
    """i clamped to [0, last]: a row index that is safe to slice (its contents unread when i was outside)."""
    return min(max(i, 0), last)


@kernel(parallel=True)
def _galerkin(level0, cls, table, diag, ptab, pflag, A, P, tag_f, bulk, Ac, tag, nblk):
    """Ac (5, Rc + 2, Cc + 2), zero on entry: P^T A P of level 0 (``level0``: cls, table, diag, ptab,
    pflag) or of a coarse level (stencil A, weights P, bulk tags tag_f). ``bulk[t]`` is the next
    level's stencil of a cell whose 5 x 5 neighbourhood all carries tag t; ``tag`` (Rc + 2, Cc + 2,
    uint32) receives the next level's tags."""
    rc = Ac.shape[1] - 2
    cc = Ac.shape[2] - 2
    rows = cls.shape[0] - 2 if level0 else A.shape[1] - 2
    cols = cls.shape[1] - 2 if level0 else A.shape[2] - 2
    for b in prange(nblk):
        I0, I1 = span(b, rc, nblk)
        if I1 <= I0:
            continue
        prows = np.zeros((5, cols + 2, 4))
        arows = np.zeros((3, cols + 2, 9))
        w0 = np.zeros((8, cc + 2))
        wb = np.zeros(8)
        cell = np.zeros(4)
        acc = np.zeros((4, 4))
        block_row = -(1 << 30)
        next_p = 2 * I0 - 2
        next_a = 2 * I0 - 1
        for I in range(I0, I1):
            while next_p <= 2 * I + 2:
                slot = prows[(next_p + 2) % 5]
                if not level0:
                    _prow(P[:, (next_p >> 1) + 1], A[0, _row_at(next_p + 1, rows + 1)], next_p, rows, slot, wb, cell)
                else:
                    if (next_p >> 1) != block_row:
                        block_row = next_p >> 1
                        weights_row0(cls, table, ptab, pflag, block_row, w0, 1)
                    _prow(w0, cls[_row_at(next_p + 1, rows + 1)], next_p, rows, slot, wb, cell)
                next_p += 1
            while next_a <= 2 * I + 1:
                if level0:
                    _arow0(cls, table, diag, next_a, arows[(next_a + 1) % 3])
                else:
                    _arow9(A, next_a, arows[(next_a + 1) % 3])
                next_a += 1
            if level0:
                _bulk_row(cls, bulk, I, Ac, tag)
            else:
                _bulk_row(tag_f, bulk, I, Ac, tag)
            _galerkin_row(prows, arows, I, cols, acc, Ac, level0, tag[I + 1])


# Level-0 calls pass no coarse planes, coarse calls no class arrays. Called from Python, ``level0``
# is a run-time flag: one build serves both (per class-code dtype).
_NO_PLANES = np.zeros((9, 1, 1))
_NO_WEIGHTS = np.zeros((8, 1, 1), dtype=WEIGHT_DTYPE)  # the coarse calls' weight type: one build serves both
_NO_TAGS = np.zeros((1, 1), dtype=np.uint32)
_NO_CLASSES = np.zeros((1, 1), dtype=np.uint8)
_NO_TABLE = np.zeros((1, 5))


def galerkin0(cls, table, diag, ptab, pflag, bulk, Ac, tag, nblk):
    """Ac (5, Rc + 2, Cc + 2), zero on entry: the level-1 Galerkin operator P^T A P of level 0 (see :func:`_galerkin`)."""
    _galerkin(True, cls, table, diag, ptab, pflag, _NO_PLANES[:5], _NO_WEIGHTS, _NO_TAGS, bulk, Ac, tag, nblk)


def galerkin9(A, P, tag_f, bulk, Ac, tag, nblk):
    """Ac (5, Rc + 2, Cc + 2), zero on entry: P^T A P of a coarse level (stencil A, weights P; see :func:`_galerkin`)."""
    _galerkin(False, _NO_CLASSES, _NO_TABLE, _NO_TABLE[0], _NO_TABLE[:, :4], _NO_CLASSES[0], A, P, tag_f, bulk, Ac, tag, nblk)
