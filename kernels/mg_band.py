"""Multigrid, direct solves: banded Cholesky of the coarsest level (or of a small level 0 as planes)."""

import numpy as np
from numba import prange
from relaxtui.kernels._jit import kernel
from relaxtui.kernels.mg_galerkin import stencil9


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
    outer = r2 if by_rows else c2
    inner = c2 if by_rows else r2
    for a in range(1, outer - 1):
        for b in range(1, inner - 1):
            i, j = (a, b) if by_rows else (b, a)
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
    s9 = np.zeros(9)
    for k in range(n):
        i = cells[k, 0]
        j = cells[k, 1]
        stencil9(A, i, j, s9)
        for di in range(-1, 2):
            for dj in range(-1, 2):
                m = index[i + di, j + dj]
                if 0 <= m <= k:
                    L[k, k - m] = s9[3 * (di + 1) + dj + 1]
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


@kernel(parallel=True)
def planes0(cls, table, diag, A, b):
    """Level 0 as the 5-plane symmetric storage of coarse levels: A (5, rows + 2, cols + 2) and the
    unnormalised right-hand side b (rows + 2, cols + 2); both zero on entry (a small problem's direct solve)."""
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
