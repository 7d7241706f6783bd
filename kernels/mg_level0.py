"""Multigrid, level 0: the interpolation weights of the operator's own grid, computed on the fly.

Level 0 is the operator's padded class array ``cls`` with its class
``table`` and diagonal ``diag`` (see :mod:`relaxtui.kernels.sweeps`). Its
interpolation weights come from per-class row/column weights ``ptab`` and
flags ``pflag`` (built by ``relaxtui.solver.mgtables.level0_tables``), so the
finest grid, the only big one, carries no interpolation arrays. The layout of
the 8 weights of a block is described in :mod:`relaxtui.kernels.multigrid`.
"""

import numpy as np
from numba import prange
from relaxtui.kernels._jit import kernel

CENTRE, EAST, SOUTH, SOUTH_EAST, SOUTH_WEST = 0, 1, 2, 3, 4
ROW_LOST, COLUMN_LOST, ISOLATED = 1, 2, 4  # pflag bits (level 0) and lost-cell bits (coarse levels)
# Storage type of the coarse levels' interpolation planes P: weights are computed in float64 and rounded
# on store; every product with them (Galerkin stencils, transfers) is formed in float64. Half the bytes
# of float64 planes (about 2.7 B per fine cell over the hierarchy).
WEIGHT_DTYPE = np.float32


@kernel(inline=True)
def _block0(cls, table, ptab, pflag, I, J, w):
    """The 8 interpolation weights of block (I, J) of level 0 into w."""
    i0 = 2 * I + 1  # padded row of fine row 2I
    j0 = 2 * J + 1  # padded column of fine column 2J
    ch = cls[i0, j0 + 1]
    cv = cls[i0 + 1, j0]
    cx = cls[i0 + 1, j0 + 1]
    w[0] = ptab[ch, 0]
    w[1] = ptab[ch, 1]
    w[2] = ptab[cv, 2]
    w[3] = ptab[cv, 3]
    lone = cx != 0 and (pflag[cx] & ISOLATED) != 0
    w[4] = 1.0 if lone else 0.0
    w[5] = w[6] = w[7] = 0.0
    if cx != 0 and not lone:
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


@kernel(inline=True)
def weights_row0(cls, table, ptab, pflag, I, w, off):
    """w[:, J + off] = the 8 weights of block (I, J) of level 0 for every J (planar w (8, >= cc + off));
    nothing is written for a block row outside the grid."""
    rc = (cls.shape[0] - 1) // 2  # (rows + 1) // 2
    if I < 0 or I >= rc:
        return
    wb = np.empty(8)
    for J in range(w.shape[1] - 2):
        _block0(cls, table, ptab, pflag, I, J, wb)
        for k in range(8):
            w[k, J + off] = wb[k]


@kernel(parallel=True)
def block_weights0(cls, table, ptab, pflag, P):
    """P (8, Rc + 2, Cc + 2): level 0's interpolation weights in the planes coarse levels store."""
    for I in prange(P.shape[1] - 2):
        weights_row0(cls, table, ptab, pflag, I, P[:, I + 1], 1)
