"""Tables of the multigrid hierarchy that depend on cell classes only.

:func:`level0_tables` gives the per-class interpolation weights of the finest
level; :func:`bulk_table0` and :func:`bulk_table9` give the coarse stencils of
cells deep inside one material (the Galerkin kernels run once on a small
synthetic grid per class), which :class:`relaxtui.solver.multigrid.Hierarchy`
uses as a shortcut. ``relaxtui.solver.multigrid`` re-exports these names.
"""

from __future__ import annotations

import numpy as np


def level0_tables(table: np.ndarray):
    """Per-class interpolation weights of level 0: (ptab (classes, 4), pflag (classes,) uint8).

    ptab[c] = (row-cell weight to the west C cell, to the east one,
    column-cell weight to the north C cell, to the south one) for a cell of
    class c in that position; a position without sources gets (1, 0)
    (aggregated into its block). pflag holds ROW_LOST, COLUMN_LOST and
    ISOLATED bits. Class 0 (not an unknown) gets zeros.
    """
    from relaxtui.kernels.multigrid import COLUMN_LOST, ISOLATED, ROW_LOST

    tn, ts, tw, te = (table[:, k] for k in range(4))
    row_lost = (tw + te) <= 0.0
    col_lost = (tn + ts) <= 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        den_h = 1.0 - tn - ts
        den_v = 1.0 - tw - te
        ptab = np.zeros((table.shape[0], 4))
        ptab[:, 0] = np.where(row_lost, 1.0, tw / den_h)
        ptab[:, 1] = np.where(row_lost, 0.0, te / den_h)
        ptab[:, 2] = np.where(col_lost, 1.0, tn / den_v)
        ptab[:, 3] = np.where(col_lost, 0.0, ts / den_v)
    pflag = (row_lost * ROW_LOST + col_lost * COLUMN_LOST + (row_lost & col_lost) * ISOLATED).astype(np.uint8)
    ptab[0] = 0.0
    pflag[0] = 0
    return np.ascontiguousarray(ptab), pflag


BULK_PATCH = 9  # side of the synthetic grids the bulk stencils are computed on (coarse cell (2, 2) at its centre)


def bulk_table0(operator, ptab, pflag) -> np.ndarray:
    """(classes, 5): the level-1 stencil of a coarse cell whose 5 x 5 fine neighbourhood is all class c.

    Computed with the general Galerkin kernel on a 9 x 9 grid of class c;
    rows of classes that cannot fill such a neighbourhood (a neighbour that
    is not an unknown) stay 0 (no shortcut).
    """
    from relaxtui.kernels import multigrid as mg

    table = np.zeros((operator.classes, 5))
    n = BULK_PATCH
    rc = (n + 1) // 2
    for c in np.flatnonzero(np.all(operator.table[:, :4] > 0.0, axis=1)):
        cls = np.zeros((n + 2, n + 2), dtype=operator.cls.dtype)
        cls[1:-1, 1:-1] = c
        A = np.zeros((5, rc + 2, rc + 2))
        mg.galerkin0(cls, operator.table, operator.diag, ptab, pflag, np.zeros_like(table), A,
                     np.zeros((rc + 2, rc + 2), dtype=np.uint32), 1)
        table[c] = A[:, 3, 3]
    return table


def bulk_table9(previous: np.ndarray) -> np.ndarray:
    """The next level's bulk stencils from this level's (same tags): Galerkin on a 9 x 9 grid of each."""
    from relaxtui.kernels import multigrid as mg

    table = np.zeros_like(previous)
    n = BULK_PATCH
    rc = (n + 1) // 2
    for t in np.flatnonzero(previous[:, 0] > 0.0):
        A = np.zeros((5, n + 2, n + 2))
        A[:, 1:-1, 1:-1] = previous[t][:, None, None]
        P = np.zeros((8, rc + 2, rc + 2), dtype=mg.WEIGHT_DTYPE)  # as the levels' own planes: identical stencils
        mg.interpolation9(A, P, np.zeros((rc + 2, rc + 2), dtype=np.uint8), 1)
        Ac = np.zeros((5, rc + 2, rc + 2))
        mg.galerkin9(A, P, np.zeros((n + 2, n + 2), dtype=np.uint32), np.zeros_like(table), Ac,
                     np.zeros((rc + 2, rc + 2), dtype=np.uint32), 1)
        table[t] = Ac[:, 3, 3]
    return table
