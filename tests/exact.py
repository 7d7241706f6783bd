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
from cases import number_unknowns

STEPS = ((-1, 0), (1, 0), (0, -1), (0, 1))  # north, south, west, east

# Case format v1.1 (docs/case-format.md, "v1.1 additions"), read from the text of that section:
# x faces use kx, y faces ky (an orthotropic interior region gives conductivity = [kx, ky]);
# a coefficient map gives the k (both directions) or s of each cell of its region; a contact of
# resistance R between two regions makes a face's conductance 1 / (1/G + R/h); axisymmetric
# geometry multiplies every face term by the radius of the face (x faces r = j*h for the west
# face of column j, (j+1)*h for the east; y faces and sources by the centre's (j + 1/2)*h) and
# the flows by 2*pi instead of the depth.


def _k_interior(region, case=None, cell=None, direction="x") -> float:
    if case is not None and cell is not None:
        for m in getattr(case, "maps", ()):
            if m.key == "conductivity" and m.region == region.name:
                return float(m.values[cell])
    if direction == "y" and getattr(region, "conductivity_y", None) is not None:
        return float(region.conductivity_y)
    return 1.0 if region.conductivity is None else float(region.conductivity)


def _source(region, case, cell) -> float:
    for m in getattr(case, "maps", ()):
        if m.key == "source" and m.region == region.name:
            return float(m.values[cell])
    return float(region.source)


def _conductance(k_p: float, neighbour, k_n_interior=None) -> float:
    """G_PN for a face between an interior cell of conductivity k_p and a domain cell."""
    if neighbour.kind == "fixed" and neighbour.conductivity is None:
        k_n = k_p
    elif neighbour.kind == "interior" and k_n_interior is not None:
        k_n = k_n_interior
    else:
        k_n = float(neighbour.conductivity) if neighbour.conductivity is not None else 1.0
    return 2.0 * k_p * k_n / (k_p + k_n)


def _contact(case, rp, rn) -> float:
    for c in getattr(case, "contacts", ()):
        if {c.a, c.b} == {rp.name, rn.name}:
            return float(c.resistance)
    return 0.0


def _radius(case, j, step) -> float:
    """The axisymmetric weight of a face of a cell in column j (1.0 when planar)."""
    if getattr(case, "geometry", "planar") != "axisymmetric":
        return 1.0
    h = float(case.cell_size)
    if step == (0, -1):
        return j * h
    if step == (0, 1):
        return (j + 1) * h
    return (j + 0.5) * h


def _film(region_p, convection, h: float, k_p=None) -> float:
    """U * h for a convection face of interior cell P (contract, region kinds table)."""
    if k_p is None:
        k_p = _k_interior(region_p)
    u = 1.0 / (1.0 / float(convection.coefficient) + h / (2.0 * k_p))
    return u * h


def _faces(case, i, j):
    """Yield (row, col, region, step) of each of the 4 neighbours of (i, j) inside the picture."""
    rows, cols = case.codes.shape
    for di, dj in STEPS:
        a, b = i + di, j + dj
        if 0 <= a < rows and 0 <= b < cols:
            yield a, b, case.regions[int(case.codes[a, b])], (di, dj)


def _face_terms(case, i, j, a, c, rp, rn, step):
    """(G to the neighbour or U*h, rhs constant) of one face of interior cell (i, j), radius-weighted."""
    h = float(case.cell_size)
    direction = "x" if step[0] == 0 else "y"
    f = _radius(case, j, step)
    k_p = _k_interior(rp, case, (i, j), direction)
    if rn.kind in ("interior", "fixed"):
        k_n = _k_interior(rn, case, (a, c), direction) if rn.kind == "interior" else None
        g = _conductance(k_p, rn, k_n)
        r = _contact(case, rp, rn)
        if r > 0:
            g = 1.0 / (1.0 / g + r / h)
        return g * f, (g * f * float(rn.value) if rn.kind == "fixed" else 0.0)
    if rn.kind == "flux":
        return 0.0, float(rn.flux) * h * f
    if rn.kind == "convection":
        uh = _film(rp, rn, h, k_p) * f
        return uh, uh * float(rn.ambient)
    return 0.0, 0.0


def assemble(case):
    """Return (A as CSR, b, index) with index[row, col] = unknown number or -1."""
    codes = case.codes
    rows, cols = codes.shape
    h = float(case.cell_size)
    index, count = number_unknowns(case)
    data, ri, ci = [], [], []
    b = np.zeros(count)
    for i in range(rows):
        for j in range(cols):
            p = index[i, j]
            if p < 0:
                continue
            rp = case.regions[int(codes[i, j])]
            diag = 0.0
            for a, c, rn, step in _faces(case, i, j):
                g, const = _face_terms(case, i, j, a, c, rp, rn, step)
                diag += g
                b[p] += const
                if rn.kind == "interior":
                    data.append(-g)
                    ri.append(p)
                    ci.append(index[a, c])
                # outside: nothing
            b[p] += _source(rp, case, (i, j)) * h * h * _radius(case, j, (0, 0))
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
    d = 2.0 * np.pi if getattr(case, "geometry", "planar") == "axisymmetric" else float(case.depth)
    flows = {r.name: 0.0 for r in case.regions if r.kind in ("fixed", "flux", "convection")}
    source_total = 0.0
    for i in range(rows):
        for j in range(cols):
            rp = case.regions[int(codes[i, j])]
            if rp.kind != "interior":
                continue
            u_p = float(field[i, j])
            source_total += d * _source(rp, case, (i, j)) * h * h * _radius(case, j, (0, 0))
            for a, c, rn, step in _faces(case, i, j):
                if rn.kind in ("fixed", "flux", "convection"):
                    g, const = _face_terms(case, i, j, a, c, rp, rn, step)
                    flows[rn.name] += d * (const - g * u_p)
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
