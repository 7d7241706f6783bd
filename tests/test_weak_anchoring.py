"""Randomized honesty over weakly anchored cases, for every method: `converged` is always within tolerance.

Cases held only by convection faces (coefficients down to 1e-8), sometimes a fixed pin, materials
with conductivity contrasts up to 1e8 and sources. Tiny grids are checked against exact rational
arithmetic (tests/exact_fraction.py: no float64 rounding in the answer at all); mid-size grids
against spsolve (tests/exact.py) where its own error, about kappa * eps * max |u|, is far below the
tolerance. Draws are fixed (numpy's default_rng(draw)), so every run checks the same cases.
"""

from __future__ import annotations

import numpy as np
import pytest
from cases import case_from_codes, convection, fixed, interior, outside
from exact import exact_solution
from exact_fraction import exact_fraction_solution

from relaxtui.errors import CaseError
from relaxtui.solver.driver import solve

METHODS = ["jacobi", "gauss-seidel", "sor", "red-black-sor", "multigrid"]


def weak_case(rng, rows: int, cols: int, min_log_coefficient: float = -8.0):
    """A random weakly anchored case: interior of two materials, convection on the left column (and
    maybe the right), a few outside cells, maybe one fixed pin."""
    k1 = 10.0 ** rng.uniform(-4, 4)
    k2 = k1 * 10.0 ** rng.uniform(-8, 8) if rng.random() < 0.7 else k1
    k2 = float(np.clip(k2, 1e-6, 1e6))
    s1 = float(rng.normal() * 10.0 ** rng.uniform(-3, 1)) if rng.random() < 0.5 else 0.0
    regions = [interior("a", k1, source=s1), interior("b", k2),
               convection("left", 10.0 ** rng.uniform(min_log_coefficient, 1), float(rng.uniform(-50, 50))),
               convection("right", 10.0 ** rng.uniform(min_log_coefficient, 1), float(rng.uniform(-50, 50))),
               outside("void"), fixed("pin", float(rng.uniform(-50, 50)))]
    codes = np.where(rng.random((rows, cols)) < 0.5, 0, 1).astype(np.uint8)
    codes[rng.random((rows, cols)) < 0.1] = 4
    codes[:, 0] = 2
    if rng.random() < 0.5:
        codes[:, -1] = 3
    if rng.random() < 0.2:
        codes[rng.integers(rows), rng.integers(1, cols)] = 5
    return case_from_codes(codes, regions, cell_size=float(10.0 ** rng.uniform(-2, 1)))


def check(case, exact, method, tolerance):
    result = solve(case, method=method, tolerance=tolerance, max_sweeps=50000)
    status = result.report["status"]
    if status == "converged":
        mask = np.isfinite(exact)
        err = float(np.max(np.abs(result.field[mask] - exact[mask])))
        assert err <= tolerance, (method, tolerance, err, result.report["message"])
    return status


@pytest.mark.parametrize("draw", range(24))
def test_tiny_weakly_anchored_cases_against_exact_arithmetic(draw):
    rng = np.random.default_rng(draw)
    case = weak_case(rng, int(rng.integers(2, 6)), int(rng.integers(3, 8)))
    try:
        exact = exact_fraction_solution(case)
        solve(case, method="jacobi", max_sweeps=1)  # an unanchored group (cut off by outside cells) is refused
    except (CaseError, ZeroDivisionError):
        pytest.skip("this random picture leaves a group without a convection face")
    scale = float(np.nanmax(np.abs(exact)))
    for method in METHODS:
        tolerance = scale * 10.0 ** rng.uniform(-9, -3)
        check(case, exact, method, tolerance)


@pytest.mark.parametrize("draw", range(6))
def test_mid_size_weakly_anchored_cases_against_spsolve(draw):
    rng = np.random.default_rng(1000 + draw)
    case = weak_case(rng, 20, 24, min_log_coefficient=-5.0)
    try:
        exact = exact_solution(case)
        solve(case, method="jacobi", max_sweeps=1)
    except (CaseError, ValueError):
        pytest.skip("this random picture leaves a group without a convection face")
    scale = float(np.nanmax(np.abs(exact)))
    statuses = [check(case, exact, method, scale * 10.0 ** rng.uniform(-6, -3)) for method in METHODS]
    assert statuses  # every method ran; each converged one was checked above
