"""The contract's discrete equations, assembled independently and solved with scipy.

This module is the tests' outside reference for the operator: it reads the
text of ``the case-format contract (case-format.md)`` ("The discrete equations", "Flows and
balance") and nothing of relaxtui except the :class:`relaxtui.case.model.Case`
data it is given. It loops over cells in plain Python, builds a
``scipy.sparse`` CSR matrix and solves it with ``scipy.sparse.linalg.spsolve``.

For each interior cell P with h = cell_size (contract, "The discrete equations"):

    sum over domain neighbours N of  G_PN (u_N - u_P)
  + sum over flux faces            of  flux * h
  + sum over convection faces      of  U * h * (ambient - u_P)
  + s_P * h**2                                               = 0

G_PN = 2 k_P k_N / (k_P + k_N); a fixed cell without its own conductivity
takes k_N = k_P; U = 1 / (1/coefficient + h / (2 k_P)); the image border and
``outside`` cells carry nothing.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse
import scipy.sparse.linalg

STEPS = ((-1, 0), (1, 0), (0, -1), (0, 1))  # north, south, west, east


def _k_interior(region) -> float:
    return 1.0 if region.conductivity is None else float(region.conductivity)


def _conductance(k_p: float, neighbour) -> float:
    """G_PN for a face between an interior cell of conductivity k_p and a domain cell."""
    if neighbour.kind == "fixed" and neighbour.conductivity is None:
        k_n = k_p
    else:
        k_n = float(neighbour.conductivity) if neighbour.conductivity is not None else 1.0
    return 2.0 * k_p * k_n / (k_p + k_n)


def _film(region_p, convection, h: float) -> float:
    """U * h for a convection face of interior cell P (contract, region kinds table)."""
    k_p = _k_interior(region_p)
    u = 1.0 / (1.0 / float(convection.coefficient) + h / (2.0 * k_p))
    return u * h


def _faces(case, i, j):
    """Yield the region of each of the 4 neighbours of (i, j) that lies inside the picture."""
    rows, cols = case.codes.shape
    for di, dj in STEPS:
        a, b = i + di, j + dj
        if 0 <= a < rows and 0 <= b < cols:
            yield a, b, case.regions[int(case.codes[a, b])]


def assemble(case):
    """Return (A as CSR, b, index) with index[row, col] = unknown number or -1."""
    codes = case.codes
    rows, cols = codes.shape
    h = float(case.cell_size)
    index = -np.ones((rows, cols), dtype=np.int64)
    count = 0
    for i in range(rows):
        for j in range(cols):
            if case.regions[int(codes[i, j])].kind == "interior":
                index[i, j] = count
                count += 1
    data, ri, ci = [], [], []
    b = np.zeros(count)
    for i in range(rows):
        for j in range(cols):
            p = index[i, j]
            if p < 0:
                continue
            rp = case.regions[int(codes[i, j])]
            k_p = _k_interior(rp)
            diag = 0.0
            for a, c, rn in _faces(case, i, j):
                if rn.kind == "interior":
                    g = _conductance(k_p, rn)
                    diag += g
                    data.append(-g)
                    ri.append(p)
                    ci.append(index[a, c])
                elif rn.kind == "fixed":
                    g = _conductance(k_p, rn)
                    diag += g
                    b[p] += g * float(rn.value)
                elif rn.kind == "flux":
                    b[p] += float(rn.flux) * h
                elif rn.kind == "convection":
                    uh = _film(rp, rn, h)
                    diag += uh
                    b[p] += uh * float(rn.ambient)
                # outside: nothing
            b[p] += float(rp.source) * h * h
            data.append(diag)
            ri.append(p)
            ci.append(p)
    matrix = scipy.sparse.csr_matrix((data, (ri, ci)), shape=(count, count))
    return matrix, b, index


def exact_solution(case) -> np.ndarray:
    """The exact discrete solution: (rows, cols) float64, NaN outside interior and fixed cells."""
    matrix, b, index = assemble(case)
    field = np.full(case.codes.shape, np.nan)
    if matrix.shape[0]:
        x = scipy.sparse.linalg.spsolve(matrix.tocsc(), b)
        x = np.atleast_1d(x)
        if not np.all(np.isfinite(x)):
            raise ValueError("the assembled system is singular (a group of interior cells without a fixed or convection face)")
        mask = index >= 0
        field[mask] = x[index[mask]]
    for n, region in enumerate(case.regions):
        if region.kind == "fixed":
            field[case.codes == n] = float(region.value)
    return field


def exact_flows(case, field):
    """Flows per the contract's "Flows and balance" section.

    Returns (flows, source_total, imbalance): ``flows`` maps every fixed, flux
    and convection region's name to d * (sum over its faces with interior
    cells), 0.0 when the region is absent; ``field`` supplies u_P at interior
    cells (fixed cells use their region's value).
    """
    codes = case.codes
    rows, cols = codes.shape
    h = float(case.cell_size)
    d = float(case.depth)
    flows = {r.name: 0.0 for r in case.regions if r.kind in ("fixed", "flux", "convection")}
    source_total = 0.0
    for i in range(rows):
        for j in range(cols):
            rp = case.regions[int(codes[i, j])]
            if rp.kind != "interior":
                continue
            u_p = float(field[i, j])
            k_p = _k_interior(rp)
            source_total += d * float(rp.source) * h * h
            for _a, _c, rn in _faces(case, i, j):
                if rn.kind == "fixed":
                    flows[rn.name] += d * _conductance(k_p, rn) * (float(rn.value) - u_p)
                elif rn.kind == "flux":
                    flows[rn.name] += d * float(rn.flux) * h
                elif rn.kind == "convection":
                    flows[rn.name] += d * _film(rp, rn, h) * (float(rn.ambient) - u_p)
    total = sum(flows.values()) + source_total
    scale = sum(abs(v) for v in flows.values()) + abs(source_total)
    imbalance = abs(total) / scale if scale > 0 else 0.0
    return flows, source_total, imbalance


def exact_residual(case, field) -> np.ndarray:
    """Contract residual (the change one Jacobi update would make), NaN outside interior cells."""
    matrix, b, index = assemble(case)
    mask = index >= 0
    x = np.zeros(matrix.shape[0])
    x[index[mask]] = field[mask]
    diag = matrix.diagonal()
    r = (b - matrix @ x) / diag
    out = np.full(case.codes.shape, np.nan)
    out[mask] = r[index[mask]]
    return out
