"""Solves checked against published closed forms and handbook correlations.

Each case is drawn on a grid, solved with the product's driver to a tight
tolerance, and its reported flows or field compared with the formula named
beside the check. Tolerances are derived from the discretisation: staircase
circles shift the effective radii by a fraction of a cell (about 1 % in the
logarithms at these sizes), the rectangle and torsion cases are second order.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from cases import case_from_codes, fixed, interior, model_problem, outside

from relaxtui.solver.driver import solve


def disc_case(size, inner_d, outer_d=None, offset=0.0, t_inner=100.0, t_outer=0.0, k=3.0, square_side=None):
    """Cells inside the inner circle held at t_inner; the outer boundary (a circle, or the
    frame of a square of side square_side, centre to centre) held at t_outer."""
    c = size / 2.0
    y, x = np.mgrid[0:size, 0:size] + 0.5
    r_in = np.hypot(x - (c + offset), y - c)
    codes = np.zeros((size, size), dtype=np.uint8)  # 0 interior
    codes[r_in <= inner_d / 2.0] = 1  # inner fixed
    if square_side is None:
        codes[np.hypot(x - c, y - c) >= outer_d / 2.0] = 2  # outer fixed
    else:
        lo = int(round(c - square_side / 2.0 - 0.5))
        hi = lo + int(square_side)
        frame = np.zeros_like(codes, dtype=bool)
        frame[lo, lo : hi + 1] = frame[hi, lo : hi + 1] = True
        frame[lo : hi + 1, lo] = frame[lo : hi + 1, hi] = True
        beyond = np.ones_like(frame)
        beyond[lo : hi + 1, lo : hi + 1] = False
        codes[frame] = 2
        codes[beyond] = 3
    regions = (interior("body", k), fixed("inner", t_inner), fixed("outer", t_outer), outside())
    return case_from_codes(codes, regions, name="discs")


def heat_rate(case):
    result = solve(case, method="red-black-sor", omega="auto", tolerance=1e-7)
    assert result.report["status"] == "converged"
    return result.report["flows"]["inner"], result


def test_concentric_circles():
    # q' = 2π k ΔT / ln(D/d), exact (any heat-transfer text; the electrostatic twin is C' = 2π ε / ln(D/d))
    d, D, k = 40, 160, 3.0
    q, result = heat_rate(disc_case(170, d, D, k=k))
    expected = 2 * math.pi * k * 100.0 / math.log(D / d)
    assert q == pytest.approx(expected, rel=0.02)
    assert result.report["flows"]["outer"] == pytest.approx(-q, rel=1e-5)  # balance


def test_eccentric_circles():
    # q' = 2π k ΔT / arccosh((D² + d² − 4z²) / (2 D d)) (Incropera & DeWitt, Table 4.1)
    d, D, z, k = 48, 160, 30.0, 3.0
    q, _ = heat_rate(disc_case(170, d, D, offset=z, k=k))
    expected = 2 * math.pi * k * 100.0 / math.acosh((D * D + d * d - 4 * z * z) / (2 * D * d))
    assert q == pytest.approx(expected, rel=0.025)


def test_circle_in_square():
    # q' = 2π k ΔT / ln(1.08 w / D), w > D (Incropera & DeWitt, Table 4.1; a correlation good to about 1 %)
    w, D, k = 160, 64, 3.0
    q, _ = heat_rate(disc_case(w + 6, D, square_side=w, k=k))
    expected = 2 * math.pi * k * 100.0 / math.log(1.08 * w / D)
    assert q == pytest.approx(expected, rel=0.025)


def torsion_series(a, b, terms=200):
    # J = (a b³/3) [1 − (192 b / (π⁵ a)) Σ_{n odd} tanh(nπa/(2b)) / n⁵] (Timoshenko & Goodier,
    # torsion of rectangular bars), for ∇²u = −2 on an a × b rectangle (a ≥ b), u = 0 on the edges
    s = sum(math.tanh(n * math.pi * a / (2 * b)) / n**5 for n in range(1, 2 * terms, 2))
    return a * b**3 / 3 * (1 - 192 * b / (math.pi**5 * a) * s)


def test_torsion_constant_of_a_square():
    # Prandtl's analogy: uniform source 2 with k = 1 in a square fixed at 0; J = 2 ∫u dA = β a⁴,
    # β = 0.141 for a/b = 1 (Timoshenko & Goodier); the series gives 0.1406 a⁴.
    n, h = 63, 1.0 / 64
    case = model_problem(n, hot=0.0)
    case.regions = tuple(r if r.kind != "interior" else interior("bar", 1.0, source=2.0) for r in case.regions)
    case.cell_size = h
    result = solve(case, method="red-black-sor", omega="auto", tolerance=1e-10)
    a = (n + 1) * h  # fixed values sit at cell centres: the side is measured centre to centre
    J = 2 * np.nansum(np.where(case.kind_codes()[case.codes] == 0, result.field, 0.0)) * h * h
    assert torsion_series(a, a) == pytest.approx(0.1406 * a**4, rel=1e-3)  # the table value, re-derived
    assert J == pytest.approx(torsion_series(a, a), rel=2e-3)  # second order: error ~ (πh)²/12 relative
    # flows: the source total leaves through the fixed frame (balance)
    assert result.report["source_total"] == pytest.approx(2.0 * n * n * h * h, rel=1e-12)
    assert result.report["imbalance"] < 1e-6


def test_largest_value_of_the_unit_square_torsion_function():
    # −∇²u = 1 on the unit square, u = 0 on the edges: max u ≈ 0.07367 (from memory; re-derived
    # here from the double sine series u = Σ 16 sin(mπx) sin(nπy) / (π⁴ m n (m² + n²)), m, n odd)
    m = np.arange(1, 400, 2)[:, None]
    nn = np.arange(1, 400, 2)[None, :]
    series = float(np.sum(16 * np.sin(m * np.pi / 2) * np.sin(nn * np.pi / 2) / (np.pi**4 * m * nn * (m * m + nn * nn))))
    assert series == pytest.approx(0.07367, abs=5e-5)
    n, h = 63, 1.0 / 64
    case = model_problem(n, hot=0.0)
    case.regions = tuple(r if r.kind != "interior" else interior("bar", 1.0, source=1.0) for r in case.regions)
    case.cell_size = h
    result = solve(case, method="red-black-sor", omega="auto", tolerance=1e-9)
    assert result.report["max"] == pytest.approx(series, rel=1e-3)
    assert result.report["max_at"]["row"] == 32 and result.report["max_at"]["col"] == 32


def test_rectangle_with_one_hot_side():
    # u(x,y) = (4 T1/π) Σ_{n odd} sin(nπx/a) sinh(nπy/a) / (n sinh(nπb/a)) (separation of
    # variables, Incropera & DeWitt §4.2), compared on the centre line away from the hot corners
    n = 63
    case = model_problem(n, hot=100.0, side="top")
    result = solve(case, method="red-black-sor", omega="auto", tolerance=1e-9)
    a = b = n + 1.0
    for row in (48, 32, 16):  # y measured from the cold bottom frame's centre line
        y = (n + 1) - row
        x = 32.0
        # sinh(kπy/a)/sinh(kπb/a) written without overflow
        ratio = lambda k: math.exp(k * math.pi * (y - b) / a) * (1 - math.exp(-2 * k * math.pi * y / a)) / (1 - math.exp(-2 * k * math.pi * b / a))
        series = sum(math.sin(k * math.pi * x / a) * ratio(k) / k for k in range(1, 400, 2)) * 4 * 100.0 / math.pi
        assert result.field[row, 32] == pytest.approx(series, rel=2e-3, abs=1e-3)


def test_square_plate_centre_is_a_quarter_of_the_hot_side():
    # superposition of the four rotated problems gives a uniform field; symmetry splits it
    # equally (common practice); exact for the discrete problem on an odd, rotation-symmetric grid
    case = model_problem(41, hot=80.0)
    result = solve(case, method="red-black-sor", omega="auto", tolerance=1e-10)
    assert result.field[21, 21] == pytest.approx(20.0, abs=1e-9)


@pytest.mark.parametrize("name", ["heat-spreader", "electrodes", "composite"])
def test_demo_balance_at_tight_tolerance(name):
    # at the exact discrete solution the flows add up to zero (references.md §14)
    from pathlib import Path

    from relaxtui.case import load_case

    grids = Path(__file__).resolve().parents[1] / "grids"
    case = load_case(grids / f"{name}.toml")
    lo, hi = _value_range(case)
    result = solve(case, method="red-black-sor", omega="auto", tolerance=1e-9 * max(1.0, hi - lo))
    assert result.report["status"] == "converged"
    assert result.report["imbalance"] < 1e-6


def _value_range(case):
    values = [r.value for r in case.regions if r.value is not None] + [r.ambient for r in case.regions if r.ambient is not None]
    return min(values), max(values)
