"""The contract's discrete equations in exact rational arithmetic (fractions.Fraction), for tiny grids.

The same equations as tests/exact.py (the case-format contract, "The
discrete equations"), but every coefficient is the exact rational value of
the contract's formula applied to the float64 inputs (a float64 is a
rational number), and the system is solved by Gaussian elimination over
the rationals. The result is the exact discrete solution, rounded once to
float64 at the end: an answer float64 rounding cannot have touched, which is
what near-singular cases (condition numbers of 1e10 and more) need, where
spsolve's own answer is off by kappa * eps.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
from cases import number_unknowns

STEPS = ((-1, 0), (1, 0), (0, -1), (0, 1))


def _q(x) -> Fraction:
    return Fraction(float(x))


def _k(region) -> Fraction:
    return Fraction(1) if region.conductivity is None else _q(region.conductivity)


def _g(kp: Fraction, neighbour) -> Fraction:
    if neighbour.kind == "fixed" and neighbour.conductivity is None:
        kn = kp
    else:
        kn = _q(neighbour.conductivity) if neighbour.conductivity is not None else Fraction(1)
    return 2 * kp * kn / (kp + kn)


def assemble(case):
    """(A as a list of dicts {column: Fraction}, b as a list of Fractions, index (rows, cols) or -1)."""
    codes = case.codes
    rows, cols = codes.shape
    h = _q(case.cell_size)
    index, n = number_unknowns(case)
    A = [dict() for _ in range(n)]
    b = [Fraction(0)] * n
    for i in range(rows):
        for j in range(cols):
            p = int(index[i, j])
            if p < 0:
                continue
            rp = case.regions[int(codes[i, j])]
            kp = _k(rp)
            diag = Fraction(0)
            for di, dj in STEPS:
                a, c = i + di, j + dj
                if not (0 <= a < rows and 0 <= c < cols):
                    continue
                rn = case.regions[int(codes[a, c])]
                if rn.kind == "interior":
                    g = _g(kp, rn)
                    diag += g
                    A[p][int(index[a, c])] = A[p].get(int(index[a, c]), Fraction(0)) - g
                elif rn.kind == "fixed":
                    g = _g(kp, rn)
                    diag += g
                    b[p] += g * _q(rn.value)
                elif rn.kind == "flux":
                    b[p] += _q(rn.flux) * h
                elif rn.kind == "convection":
                    film = h / (1 / _q(rn.coefficient) + h / (2 * kp))
                    diag += film
                    b[p] += film * _q(rn.ambient)
            b[p] += _q(rp.source) * h * h
            A[p][p] = A[p].get(p, Fraction(0)) + diag
    return A, b, index


def solve_exactly(A, b) -> list[Fraction]:
    """Gaussian elimination over the rationals (the matrix is symmetric positive definite: no pivoting needed)."""
    n = len(b)
    rows = [dict(r) for r in A]
    rhs = list(b)
    for k in range(n):
        pivot = rows[k][k]
        for i in range(k + 1, n):
            f = rows[i].get(k)
            if not f:
                continue
            f = f / pivot
            for c, v in rows[k].items():
                if c >= k:
                    rows[i][c] = rows[i].get(c, Fraction(0)) - f * v
            rhs[i] -= f * rhs[k]
    x = [Fraction(0)] * n
    for k in range(n - 1, -1, -1):
        s = rhs[k] - sum(v * x[c] for c, v in rows[k].items() if c > k)
        x[k] = s / rows[k][k]
    return x


def exact_fraction_solution(case) -> np.ndarray:
    """(rows, cols) float64: the exact discrete solution rounded once; NaN outside interior and fixed cells."""
    A, b, index = assemble(case)
    x = solve_exactly(A, b)
    field = np.full(case.codes.shape, np.nan)
    mask = index >= 0
    field[mask] = [float(x[int(k)]) for k in index[mask]]
    for n, region in enumerate(case.regions):
        if region.kind == "fixed":
            field[case.codes == n] = float(region.value)
    return field
