"""Kernels of the two-level estimate of the Jacobi spectral radius (relaxtui.solver.coarse).

The fine operator is the class layout of :mod:`relaxtui.kernels.sweeps`: a
padded class array ``cls`` ((rows + 2) x (cols + 2), 0: not an unknown), the
class table (``table[c, 0..3]``: the weights g/d of the north, south, west and
east neighbours) and the diagonal per class ``diag``. The coupling of an
unknown to a neighbour unknown is ``diag[c] * table[c, side]`` (symmetric).

The coarse operator aggregates 2 x 2 blocks of fine cells (piecewise-constant
prolongation P, Galerkin product P^T A P with the diagonal mass P^T D P): coarse
cell (I, J) (padded coarse layout, I, J >= 1) covers fine padded rows 2I - 1,
2I and columns 2J - 1, 2J. It is kept in its symmetric form
B = D_c^(-1/2) (D_c - A_c) D_c^(-1/2) as three float32 arrays (its diagonal
``cb``, the east coupling ``eb`` and the south coupling ``sb``) and
``sq = sqrt(D_c)`` (float32, 0 where the block holds no unknown).
"""

import math

from numba import prange
from relaxtui.kernels._jit import kernel


@kernel(parallel=True)
def block_mass(cls, diag, sq):
    """sq[I, J] = sqrt(sum of the fine diagonals over block (I, J)), 0 for a block without unknowns."""
    rows, cols = cls.shape[0] - 2, cls.shape[1] - 2
    for ci in prange(1, sq.shape[0] - 1):
        for cj in range(1, sq.shape[1] - 1):
            s = 0.0
            for i in range(2 * ci - 1, min(2 * ci, rows) + 1):
                for j in range(2 * cj - 1, min(2 * cj, cols) + 1):
                    c = cls[i, j]
                    if c != 0:
                        s += diag[c]
            sq[ci, cj] = math.sqrt(s)


@kernel(inline=True)
def _split(d, w_back, w_fwd, first, last):
    """A cell's couplings along one axis: (inside its block, across to the next block). The backward
    neighbour is inside unless the cell is the block's first along the axis; the forward one unless it
    is its last (then it belongs to the next block)."""
    inside = 0.0 if first else d * w_back
    if last:
        return inside, d * w_fwd
    return inside + d * w_fwd, 0.0


@kernel(parallel=True)
def block_couplings(cls, table, diag, sq, cb, eb, sb):
    """Fill the symmetric coarse operator (``cb``, ``eb``, ``sb``) from the fine one; ``sq`` from :func:`block_mass`."""
    rows, cols = cls.shape[0] - 2, cls.shape[1] - 2
    for ci in prange(1, sq.shape[0] - 1):
        for cj in range(1, sq.shape[1] - 1):
            inside = 0.0
            east = 0.0
            south = 0.0
            i_last = 2 * ci
            j_last = 2 * cj
            for i in range(2 * ci - 1, min(i_last, rows) + 1):
                for j in range(2 * cj - 1, min(j_last, cols) + 1):
                    c = cls[i, j]
                    if c == 0:
                        continue
                    d = diag[c]
                    a, across = _split(d, table[c, 0], table[c, 1], i == 2 * ci - 1, i == i_last)  # north, south
                    inside += a
                    south += across
                    a, across = _split(d, table[c, 2], table[c, 3], j == 2 * cj - 1, j == j_last)  # west, east
                    inside += a
                    east += across
            m = float(sq[ci, cj])
            if m > 0.0:
                cb[ci, cj] = inside / (m * m)
                me = float(sq[ci, cj + 1])
                ms = float(sq[ci + 1, cj])
                eb[ci, cj] = east / (m * me) if me > 0.0 else 0.0
                sb[ci, cj] = south / (m * ms) if ms > 0.0 else 0.0
            else:
                cb[ci, cj] = 0.0
                eb[ci, cj] = 0.0
                sb[ci, cj] = 0.0


@kernel(parallel=True)
def start_vector(sq, out, rows):
    """out = sq (the D_c^(1/2) image of the constant vector on the unknowns); rows[i] = the sum of out[i]**2
    over row i, for the inner rows 1 .. shape[0] - 2 (the squared 2-norm is their sum, see :func:`apply_step`)."""
    for i in prange(sq.shape[0]):
        s = 0.0
        for j in range(sq.shape[1]):
            x = float(sq[i, j])
            out[i, j] = x
            s += x * x
        if 0 < i < sq.shape[0] - 1:
            rows[i] = s


@kernel(parallel=True)
def apply_step(z, w, beta, cb, eb, sb, rows):
    """w = B z - beta w in place on the inner rows (w holds the previous Lanczos vector on entry); rows[i] = the
    part of alpha = w . z from row i.

    In place because each cell of w is read only to compute itself: Lanczos then keeps two vectors. The inner
    products are returned per row, each row summed in column order, and added by the caller in one exactly
    rounded sum (math.fsum): the same number for any count of threads, and for any cut of the rows into strips
    across MPI ranks (relaxtui.parallel.coarse)."""
    for i in prange(1, z.shape[0] - 1):
        s = 0.0
        for j in range(1, z.shape[1] - 1):
            x = (cb[i, j] * z[i, j] + (eb[i, j] * z[i, j + 1] + eb[i, j - 1] * z[i, j - 1])
                 + (sb[i, j] * z[i + 1, j] + sb[i - 1, j] * z[i - 1, j])) - beta * w[i, j]
            w[i, j] = x
            s += x * z[i, j]
        rows[i] = s


@kernel(parallel=True)
def subtract_scaled(w, alpha, v, rows):
    """w -= alpha v on the inner rows; rows[i] = the sum of the new w[i]**2 (the squared 2-norm by rows)."""
    for i in prange(1, w.shape[0] - 1):
        s = 0.0
        for j in range(w.shape[1]):
            x = w[i, j] - alpha * v[i, j]
            w[i, j] = x
            s += x * x
        rows[i] = s


@kernel(parallel=True)
def add_scaled(y, factor, v):
    """y += factor * v (sums in float64 whatever the dtype of y)."""
    for i in prange(y.shape[0]):
        for j in range(y.shape[1]):
            y[i, j] = float(y[i, j]) + factor * v[i, j]


@kernel(parallel=True)
def prolong(y, sq, cls, x, shift, first, stop):
    """x = P D_c^(-1/2) y on rows first .. stop - 1 of x: every fine unknown takes the value of its block, 0
    elsewhere. Fine row i lies in coarse row (i + 1 - shift) // 2: shift 0 for the whole padded grid, 1 for a
    strip of it whose first own row is an odd grid row (relaxtui.parallel.coarse)."""
    for i in prange(first, stop):
        ci = (i + 1 - shift) // 2
        for j in range(x.shape[1]):
            if cls[i, j] != 0:
                cj = (j + 1) // 2
                x[i, j] = float(y[ci, cj]) / float(sq[ci, cj])
            else:
                x[i, j] = 0.0


@kernel(parallel=True)
def smooth_colour(x, cls, table, colour):
    """One half of a red-black Gauss-Seidel sweep of J x = x in place: x = J x on the unknowns with
    (i + j) % 2 == colour (arithmetic in float64, whatever the dtype of x)."""
    for i in prange(1, x.shape[0] - 1):
        for j in range(1 + (i + 1 + colour) % 2, x.shape[1] - 1, 2):
            c = cls[i, j]
            if c != 0:
                s = ((table[c, 0] * float(x[i - 1, j]) + table[c, 1] * float(x[i + 1, j]))
                     + table[c, 2] * float(x[i, j - 1])) + table[c, 3] * float(x[i, j + 1])
                x[i, j] = s


@kernel(parallel=True)
def rayleigh(x, cls, table, diag, num, den):
    """Per inner row i: num[i] = sum D x (J x), den[i] = sum D x x over the row's unknowns, J x computed on the
    fly (no array for it); the caller adds the rows (see :func:`apply_step`)."""
    for i in prange(1, x.shape[0] - 1):
        a = 0.0
        b = 0.0
        for j in range(1, x.shape[1] - 1):
            c = cls[i, j]
            if c != 0:
                xc = float(x[i, j])
                jx = ((table[c, 0] * float(x[i - 1, j]) + table[c, 1] * float(x[i + 1, j]))
                      + table[c, 2] * float(x[i, j - 1])) + table[c, 3] * float(x[i, j + 1])
                a += diag[c] * xc * jx
                b += diag[c] * xc * xc
        num[i] = a
        den[i] = b
