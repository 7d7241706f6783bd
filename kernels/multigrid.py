"""Multigrid kernels, one module per stage, gathered here (``from relaxtui.kernels import multigrid as mg``).

Storage
-------
Level 0 is the operator's own grid (padded field, class array ``cls``, class
``table``, class diagonal ``diag``). A coarse level l >= 1 is an (R + 2, C + 2)
padded grid, R = (R_fine + 1) // 2, C = (C_fine + 1) // 2, holding the
unnormalised symmetric 9-point Galerkin operator in five planes

    A[0] centre,  A[1] east (i, j+1),  A[2] south (i+1, j),
    A[3] south-east (i+1, j+1),  A[4] south-west (i+1, j-1),

the other couplings read from neighbours by symmetry; a cell is an unknown
iff A[0] > 0. Coarse cell (I, J) sits on fine cell (2I, 2J). The 4 non-C
cells of block (I, J) (row cell (2I, 2J+1), column cell (2I+1, 2J), centre
cell (2I+1, 2J+1)) interpolate with 8 weights, stored in planes
``P[8, R + 2, C + 2]`` (``WEIGHT_DTYPE``, float32) at [I + 1, J + 1]:

    P[0], P[1]  row cell     -> (I, J), (I, J+1)
    P[2], P[3]  column cell  -> (I, J), (I+1, J)
    P[4..7]     centre cell  -> (I, J), (I, J+1), (I+1, J), (I+1, J+1)

Stages: :mod:`~relaxtui.kernels.mg_level0` (level 0's weights on the fly),
:mod:`~relaxtui.kernels.mg_interpolation`, :mod:`~relaxtui.kernels.mg_galerkin`,
:mod:`~relaxtui.kernels.mg_transfer`, :mod:`~relaxtui.kernels.mg_smoother`,
:mod:`~relaxtui.kernels.mg_band` (coarsest solve), :mod:`~relaxtui.kernels.mg_fcg`
(conjugate gradients); row-block helpers in :mod:`~relaxtui.kernels.blocks`.
The method and its measurements: docs/design/multigrid.md. ``nblk`` is the
number of row blocks run in parallel; results do not depend on it.
"""

from relaxtui.kernels.blocks import copy_into, delta_copy, zero_fill
from relaxtui.kernels.mg_band import band_factor, band_order, band_solve, planes0
from relaxtui.kernels.mg_fcg import fcg_direction, fcg_dots, fcg_update, pcg_rz
from relaxtui.kernels.mg_galerkin import galerkin0, galerkin9
from relaxtui.kernels.mg_interpolation import interpolation9
from relaxtui.kernels.mg_level0 import (
    CENTRE,
    COLUMN_LOST,
    EAST,
    ISOLATED,
    ROW_LOST,
    SOUTH,
    SOUTH_EAST,
    SOUTH_WEST,
    WEIGHT_DTYPE,
    block_weights0,
)
from relaxtui.kernels.mg_smoother import smooth9
from relaxtui.kernels.mg_transfer import prolong0, prolong9, restrict0, restrict9

__all__ = [
    "CENTRE", "EAST", "SOUTH", "SOUTH_EAST", "SOUTH_WEST", "WEIGHT_DTYPE", "ROW_LOST", "COLUMN_LOST", "ISOLATED",
    "band_factor", "band_order", "band_solve", "block_weights0", "copy_into", "delta_copy", "fcg_direction",
    "fcg_dots", "fcg_update", "galerkin0", "galerkin9", "interpolation9", "pcg_rz", "planes0", "prolong0",
    "prolong9", "restrict0", "restrict9", "smooth9", "zero_fill",
]
