"""The contract's discrete equations as a scipy.sparse matrix, assembled with numpy (for 4096² grids).

This is the approach of ``tests/exact.py`` (an assembly written from the text
of the case-format contract, ``case-format.md``, "The discrete equations",
reading nothing of relaxtui but the :class:`relaxtui.case.model.Case` data),
vectorised over the grid so that a 16-million-cell picture assembles in
seconds instead of hours. Benchmarks must not import from ``tests/``, so it
lives here. For each interior cell P with h = cell_size:

    sum over domain neighbours N of  G_PN (u_N - u_P)
  + sum over flux faces            of  flux * h
  + sum over convection faces      of  U * h * (ambient - u_P)
  + s_P * h**2                                               = 0

with G_PN = 2 k_P k_N / (k_P + k_N) (a fixed cell without its own
conductivity takes k_N = k_P), U = 1 / (1/coefficient + h / (2 k_P)); the
image border and ``outside`` cells carry nothing. The rows are these
equations times -1 (A = diag - conductances: symmetric positive definite),
unknowns numbered row-major over the interior cells.

Also here: :func:`model_exact`, the exact discrete solution of the model
problem (N x N unknowns in a one-cell frame, top row 1, the rest 0) by the
discrete sine transform, which diagonalises the 5-point Dirichlet Laplacian
(any numerical-analysis text, e.g. the fast Poisson solvers of Hockney's
method; common practice). It is independent of every solver compared.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse

KINDS = ("interior", "fixed", "outside", "flux", "convection")


def _region_table(case):
    """Per-region parameter arrays, plus one sentinel entry (index len(regions)) for the image border."""
    n = len(case.regions)
    kind = np.full(n + 1, KINDS.index("outside"), dtype=np.int8)
    k = np.ones(n + 1)  # interior conductivity (default 1)
    k_fixed = np.full(n + 1, np.nan)  # a fixed region's own conductivity, NaN if none
    value = np.zeros(n + 1)
    flux = np.zeros(n + 1)
    coef = np.ones(n + 1)
    ambient = np.zeros(n + 1)
    source = np.zeros(n + 1)
    for i, r in enumerate(case.regions):
        kind[i] = KINDS.index(r.kind)
        if r.kind == "interior":
            k[i] = 1.0 if r.conductivity is None else float(r.conductivity)
            source[i] = float(r.source)
        elif r.kind == "fixed":
            value[i] = float(r.value)
            if r.conductivity is not None:
                k_fixed[i] = float(r.conductivity)
        elif r.kind == "flux":
            flux[i] = float(r.flux)
        elif r.kind == "convection":
            coef[i] = float(r.coefficient)
            ambient[i] = float(r.ambient)
    return kind, k, k_fixed, value, flux, coef, ambient, source


def assemble(case):
    """Return (A as CSR with int32 indices, b, index): index[row, col] = unknown number or -1 (int32)."""
    codes = np.ascontiguousarray(case.codes)
    rows, cols = codes.shape
    h = float(case.cell_size)
    kind, k, k_fixed, value, flux, coef, ambient, source = _region_table(case)
    border = len(case.regions)
    interior = kind[codes] == 0
    count = int(interior.sum())
    index = np.full((rows, cols), -1, dtype=np.int32)
    index[interior] = np.arange(count, dtype=np.int32)
    ip, jp = np.nonzero(interior)  # row-major order = unknown order
    rp = codes[ip, jp]
    kp = k[rp]
    diag = np.zeros(count)
    b = source[rp] * h * h
    # neighbours in column order of the unknown numbering: north, west, (diagonal), east, south
    off_vals = np.zeros((count, 5))
    off_cols = np.zeros((count, 5), dtype=np.int32)
    present = np.zeros((count, 5), dtype=bool)
    for slot, (di, dj) in ((0, (-1, 0)), (1, (0, -1)), (3, (0, 1)), (4, (1, 0))):
        a, c = ip + di, jp + dj
        inside = (a >= 0) & (a < rows) & (c >= 0) & (c < cols)
        a_c, c_c = np.clip(a, 0, rows - 1), np.clip(c, 0, cols - 1)
        rn = np.where(inside, codes[a_c, c_c], border)
        kn_kind = kind[rn]
        # interior neighbour
        m = kn_kind == 0
        g = 2.0 * kp * k[rn] / (kp + k[rn])
        diag += np.where(m, g, 0.0)
        off_vals[:, slot] = np.where(m, -g, 0.0)
        off_cols[:, slot] = np.where(m, index[a_c, c_c], 0)
        present[:, slot] = m
        # fixed neighbour
        m = kn_kind == 1
        kn = np.where(np.isnan(k_fixed[rn]), kp, k_fixed[rn])
        g = 2.0 * kp * kn / (kp + kn)
        diag += np.where(m, g, 0.0)
        b += np.where(m, g * value[rn], 0.0)
        # flux face
        b += np.where(kn_kind == 3, flux[rn] * h, 0.0)
        # convection face
        m = kn_kind == 4
        uh = h / (1.0 / coef[rn] + h / (2.0 * kp))
        diag += np.where(m, uh, 0.0)
        b += np.where(m, uh * ambient[rn], 0.0)
        del a, c, inside, a_c, c_c, rn, kn_kind, m, g, kn, uh
    off_vals[:, 2] = diag
    off_cols[:, 2] = np.arange(count, dtype=np.int32)
    present[:, 2] = True
    indptr = np.zeros(count + 1, dtype=np.int64)
    np.cumsum(present.sum(axis=1), out=indptr[1:])
    data = off_vals[present]
    indices = off_cols[present]
    del off_vals, off_cols, present
    matrix = scipy.sparse.csr_matrix((data, indices, indptr.astype(np.int32)), shape=(count, count))
    return matrix, b, index


def scatter(x, index, case) -> np.ndarray:
    """The (rows, cols) field of a solution vector: fixed cells at their value, NaN outside the domain."""
    held = np.array([r.kind == "fixed" for r in case.regions])
    value = np.array([float(r.value) if r.kind == "fixed" else np.nan for r in case.regions])
    field = np.where(held[case.codes], value[case.codes], np.nan)
    field[index >= 0] = x[index[index >= 0]]
    return field


def model_exact(n: int) -> np.ndarray:
    """Exact discrete solution (n x n unknowns) of the model problem: 5-point Laplacian, top frame row 1, others 0.

    A = T (x) I + I (x) T with T = tridiag(-1, 2, -1); the orthonormal DST-I
    matrix S diagonalises T (eigenvalues 2 - 2 cos(j pi / (n + 1))), so
    u = S ((S b S) / lambda) S. Returns the unknowns only (n x n).
    """
    from scipy.fft import dstn, idstn

    b = np.zeros((n, n))
    b[0, :] = 1.0  # the hot frame row above the first row of unknowns
    lam1 = 2.0 - 2.0 * np.cos(np.arange(1, n + 1) * np.pi / (n + 1))
    lam = lam1[:, None] + lam1[None, :]
    return idstn(dstn(b, type=1, norm="ortho") / lam, type=1, norm="ortho")
