"""The quadratic barrier's bound on the norm of the inverse (relaxtui.solver.conditioning.barrier_inverse_norm).

Reference: ||(I - W)^-1||_inf = max w for (I - W) w = 1, i.e. A w = diag(A) on tests/exact.py's
independent assembly, solved by scipy's spsolve (an M-matrix's inverse is non-negative, common
practice). The bound must never be below it; where it exists on the equal-weight model problem it
is within a factor of 2 (from memory: max w of the continuous problem -Δw = 4 on a square of side
L is about 0.295 L², the barrier gives L²/2).
"""

import exact
import numpy as np
import pytest
import scipy.sparse.linalg
from cases import case_from_codes, feature_case, fixed, interior, make_case, model_problem, outside

from relaxtui.solver import conditioning, stopping
from relaxtui.solver.assembled import Operator
from relaxtui.solver.driver import Run


def _want(case) -> float:
    matrix, _, _ = exact.assemble(case)
    return float(np.max(scipy.sparse.linalg.spsolve(matrix.tocsc(), matrix.diagonal())))


def _insulated_channel():
    # fixed left and right ends, no-flux top and bottom (outside cells): the columns-only barrier holds
    art = ["." * 30] + ["L" + "p" * 28 + "R" for _ in range(6)] + ["." * 30]
    return make_case(art, {".": outside(), "L": fixed("left", 1.0), "R": fixed("right", 0.0), "p": interior()})


def _two_materials_rows():
    rng = np.random.default_rng(3)
    codes = np.zeros((24, 26), np.uint8)
    codes[1:-1, 1:-1] = 1 + (rng.random((22, 24)) < 0.3)
    return case_from_codes(codes, (fixed("frame", 0.0), interior("a", 1.0), interior("b", 40.0)))


CASES = {"model": lambda: model_problem(40, hot=1.0), "wide": lambda: model_problem(12, hot=1.0),
         "channel": _insulated_channel, "features": lambda: feature_case(True), "uniform features": lambda: feature_case(False),
         "two materials": _two_materials_rows}


@pytest.mark.parametrize("name", list(CASES))
def test_the_barrier_bounds_the_norm_from_above(name):
    case = CASES[name]()
    want = _want(case)
    got = conditioning.barrier_inverse_norm(Operator(case))
    if name in ("model", "wide", "channel"):
        assert got is not None  # equal weights (and insulated faces along the barrier's flat direction)
        assert got <= 2.0 * want
    if got is not None:
        assert got >= want * (1.0 - 1e-12)


def test_a_loose_bound_is_replaced_before_it_refuses_a_stop():
    # a tolerance between the attainable-accuracy floor of a closer norm and the barrier's looser one: the
    # rule asks for the closer norm instead of stalling (the cached norm is set to the barrier's by hand,
    # the closer one is a stand-in a quarter of it; rounding_floor is linear in the norm and the scale)
    case = model_problem(40, hot=1.0)
    run = Run(case, method="multigrid", tolerance=1e-6)
    run.prepare()
    op = run.operator
    bound = conditioning.barrier_inverse_norm(op)
    op.inverse_norm = (bound, conditioning.BARRIER_HOW)
    asked = []
    run.rule.tighter_inverse_norm = lambda: asked.append(1) or (bound / 4.0, "closer")
    run.rule.scale = 2.0 * run.rule.tolerance / conditioning.rounding_floor(bound, 1.0, run.rule.floor_cells)
    # floor(bound) = 2 x tolerance (a stall on its own), floor(bound / 4) = 0.5 x tolerance
    est = stopping.Estimate(run.rule.tolerance * 0.1, 0.1, 0.1, True)
    status, out = run.rule._certify(stopping.CONVERGED, est, False)
    assert asked and status == stopping.CONVERGED
    assert out.error == pytest.approx(0.5 * run.rule.tolerance)
