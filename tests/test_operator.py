"""The Python layer of the operator: converged fields and flows against scipy, validation, layout.

Outside references: tests/exact.py assembles the contract's equations
independently and solves them with scipy.sparse.linalg.spsolve; flows and
balance follow the contract's "Flows and balance" section.
"""

import subprocess
import sys

import exact
import numpy as np
import pytest
from cases import (
    convection,
    feature_case,
    fixed,
    flux,
    interior,
    make_case,
    model_problem,
    outside,
)

from relaxtui.errors import CaseError, UsageError
from relaxtui.solver.assembled import Operator

CASES = {
    "uniform": feature_case(False),
    "two-material": feature_case(True),
    "model-7": model_problem(7),
    # interior cells touching the image border (which must act as 'outside'), a convection-only anchor
    "border": make_case(
        ["......~", "..bb..~", "..bb..~", "^^...x~"],
        {".": interior("plate", 2.0, source=0.3), "b": interior("core", 7.0), "~": convection("film", 9.0, -1.0),
         "^": flux("in", 0.4), "x": outside()},
        cell_size=0.1, depth=0.01,
    ),
}


def solve(op, u, method, omega, tol=1e-13, cap=400_000):
    updates = np.zeros(2000)
    residuals = np.zeros(2000)
    done = 0
    while done < cap:
        n = op.sweep(u, method, omega, 2000, updates, residuals)
        done += n
        if residuals[n - 1] < tol:
            return done
    raise AssertionError(f"{method} did not reach {tol} in {cap} sweeps")


@pytest.mark.parametrize("name", list(CASES))
@pytest.mark.parametrize("method,omega", [("jacobi", 1.0), ("jacobi", 0.8), ("gauss-seidel", 1.0), ("sor", 1.7), ("red-black-sor", 1.7), ("red-black-sor", 1.0)])
def test_converged_field_matches_scipy(name, method, omega):
    case = CASES[name]
    op = Operator(case)
    u = op.new_field()
    solve(op, u, method, omega)
    want = exact.exact_solution(case)  # scipy.sparse.linalg.spsolve of the contract's equations
    got = op.finish(u)
    assert np.array_equal(np.isnan(got), np.isnan(want))
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-9 * max(1.0, np.nanmax(np.abs(want))))
    assert op.residual(u) < 1e-12


@pytest.mark.parametrize("name", list(CASES))
def test_flows_match_the_contract(name):
    case = CASES[name]
    op = Operator(case)
    rng = np.random.default_rng(1)
    field = rng.random(case.codes.shape) * 3 - 1
    u = op.new_field(field)
    flows, source_total, imbalance = op.flows(u)
    want, want_source, want_imbalance = exact.exact_flows(case, op.finish(u))
    assert list(flows) == list(want)  # every fixed, flux and convection region, in declaration order
    for region in want:
        assert flows[region] == pytest.approx(want[region], rel=1e-12, abs=1e-12)
    assert source_total == pytest.approx(want_source, rel=1e-12, abs=1e-15)
    assert imbalance == pytest.approx(want_imbalance, rel=1e-9, abs=1e-15)
    # at the exact discrete solution the flows and sources balance (contract; references.md §14)
    u = op.new_field(exact.exact_solution(case))
    assert op.flows(u)[2] < 1e-9


def test_absent_regions_report_zero_flow():
    case = CASES["uniform"]
    op = Operator(case)
    flows, _, _ = op.flows(op.new_field())
    assert flows["unused"] == 0.0 and "void" not in flows and "plate" not in flows


@pytest.mark.parametrize("name", list(CASES))
def test_residual_field_matches_scipy_residual(name):
    case = CASES[name]
    op = Operator(case)
    field = np.random.default_rng(4).random(case.codes.shape)
    u = op.new_field(field)
    want = exact.exact_residual(case, op.finish(u))  # (b - A x) / diag(A), from the independent assembly
    got = op.residual_field(u)
    assert np.array_equal(np.isnan(got), np.isnan(want))
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12)
    assert op.residual(u) == pytest.approx(np.nanmax(np.abs(want)), abs=1e-12)


def test_jacobi_apply_and_symmetric_scaling():
    case = CASES["border"]
    op = Operator(case)
    matrix, _b, index = exact.assemble(case)
    diag = matrix.diagonal()
    n = matrix.shape[0]
    rng = np.random.default_rng(2)
    x = op.new_field()
    x[:] = 0.0
    values = rng.random(n)
    mask = index >= 0
    op.view(x)[mask] = values[index[mask]]
    out = op.new_field()
    op.jacobi_apply(x, out)
    want = values - (matrix @ values) / diag  # J = I - D^-1 A
    assert np.all(out[op.cls == 0] == 0.0)
    np.testing.assert_allclose(op.view(out)[mask], want[index[mask]], rtol=0, atol=1e-14)
    s = op.view(op.sqrt_diag())
    np.testing.assert_allclose(s[mask] ** 2, diag[index[mask]], rtol=1e-14)
    assert np.all(s[~mask] == 0.0)
    # D^1/2 J D^-1/2 is symmetric: build it column by column through jacobi_apply
    dense = np.zeros((n, n))
    cells = np.argwhere(mask)
    for col, (i, j) in enumerate(cells):
        x[:] = 0.0
        op.view(x)[i, j] = 1.0 / s[i, j]
        op.jacobi_apply(x, out)
        dense[:, col] = (op.view(out) * s)[tuple(cells.T)]  # argwhere order is the unknowns' order
    np.testing.assert_allclose(dense, dense.T, rtol=0, atol=1e-14)
    assert np.allclose(np.diag(dense), 0.0)


def test_layout_view_and_finish():
    case = CASES["uniform"]
    op = Operator(case)
    assert op.shape == case.codes.shape
    assert op.unknowns == sum(int((case.codes == n).sum()) for n, r in enumerate(case.regions) if r.kind == "interior")
    u = op.new_field()
    v = op.view(u)
    assert v.shape == op.shape and np.shares_memory(v, u)
    out = op.finish(u)
    assert out.dtype == np.float64 and out.flags.c_contiguous and not np.shares_memory(out, u)
    kinds = np.array([r.kind for r in case.regions])[case.codes]
    assert np.all(np.isnan(out[(kinds != "interior") & (kinds != "fixed")]))
    assert not np.any(np.isnan(out[(kinds == "interior") | (kinds == "fixed")]))
    for n, r in enumerate(case.regions):
        if r.kind == "fixed":
            assert np.all(out[case.codes == n] == r.value)
    assert np.all(np.isfinite(u))  # the working array holds no NaN, not even outside


def test_default_guess_is_the_face_weighted_mean():
    case = CASES["two-material"]
    op = Operator(case)
    # count faces between interior cells and fixed / convection cells by hand
    total = weight = 0.0
    rows, cols = case.codes.shape
    for i in range(rows):
        for j in range(cols):
            if case.regions[case.codes[i, j]].kind != "interior":
                continue
            for a, b in ((i - 1, j), (i + 1, j), (i, j - 1), (i, j + 1)):
                if 0 <= a < rows and 0 <= b < cols:
                    r = case.regions[case.codes[a, b]]
                    if r.kind == "fixed":
                        total += r.value
                        weight += 1
                    elif r.kind == "convection":
                        total += r.ambient
                        weight += 1
    guess = total / weight
    assert op.default_guess() == pytest.approx(guess, rel=1e-14)
    u = op.new_field()
    interior_cells = op.cls != 0
    assert np.allclose(u[interior_cells], guess, rtol=1e-14)


def test_initial_field_is_validated():
    case = CASES["uniform"]
    op = Operator(case)
    rows, cols = op.shape
    good = np.zeros((rows, cols))
    good[case.codes == [r.name for r in case.regions].index("void")] = np.nan  # NaN outside the domain is fine
    good[case.codes == [r.name for r in case.regions].index("hot")] = np.nan  # and on fixed cells
    op.new_field(good)
    op.new_field(np.zeros((rows, cols), dtype=np.int32))
    with pytest.raises(UsageError, match="shape"):
        op.new_field(np.zeros((rows + 1, cols)))
    with pytest.raises(UsageError, match="real numbers"):
        op.new_field(np.zeros((rows, cols), dtype=complex))
    with pytest.raises(UsageError, match="numpy array"):
        op.new_field([[0.0] * cols] * rows)
    bad = np.zeros((rows, cols))
    bad[2, 7] = np.inf
    with pytest.raises(UsageError, match="row 2, column 7"):
        op.new_field(bad)


def test_sweep_arguments_are_validated():
    op = Operator(CASES["model-7"])
    u = op.new_field()
    a, b = np.zeros(4), np.zeros(4)
    with pytest.raises(UsageError, match="unknown method"):
        op.sweep(u, "chebyshev", 1.0, 1, a, b)
    with pytest.raises(UsageError, match="not a relaxation sweep"):
        op.sweep(u, "multigrid", 1.0, 1, a, b)
    for omega in (0.0, 2.0, -1.0, float("nan"), "fast"):
        with pytest.raises(UsageError, match="omega"):
            op.sweep(u, "sor", omega, 1, a, b)
    with pytest.raises(UsageError, match="gauss-seidel takes omega = 1"):
        op.sweep(u, "gauss-seidel", 1.5, 1, a, b)
    for sweeps in (-1, 1.5, True):
        with pytest.raises(UsageError, match="sweeps"):
            op.sweep(u, "sor", 1.5, sweeps, a, b)
    with pytest.raises(UsageError, match="updates"):
        op.sweep(u, "sor", 1.5, 5, a, b)
    with pytest.raises(UsageError, match="residuals"):
        op.sweep(u, "sor", 1.5, 2, a, np.zeros(2, dtype=np.float32))
    with pytest.raises(UsageError, match="working array"):
        op.sweep(op.view(u), "sor", 1.5, 1, a, b)
    with pytest.raises(UsageError, match="working array"):
        op.residual(np.zeros(3))
    assert op.sweep(u, "sor", 1.5, 0, a, b) == 0


def test_ill_posed_groups_are_refused():
    # a pocket of 2 x 3 interior cells walled off by outside cells, with only a flux face: no unique solution
    art = ["H....xxxxx", "H....x...x", "H....x...^", "H....xxxxx"]
    case = make_case(art, {"H": fixed("hot", 1.0), ".": interior(), "x": outside(), "^": flux("q", 1.0)})
    with pytest.raises(CaseError, match=r"group of 6 interior cells \(one (?:of them )?at row 1, column 6\)"):
        Operator(case)
    # a single interior cell with no neighbour at all
    case = make_case(["xxx", "x.x", "xxx"], {".": interior(), "x": outside(), "H": fixed("h", 0.0)})
    with pytest.raises(CaseError, match="group of 1 interior cells? "):
        Operator(case)
    # touching a convection face is enough
    Operator(make_case(["x..~"], {".": interior(), "x": outside(), "~": convection("c", 1.0, 0.0)}))


@pytest.mark.parametrize("region,message", [
    (interior("p", 0.0), "conductivity must be > 0"),
    (interior("p", 1.0, source=float("nan")), "source must be a finite number"),
])
def test_bad_region_values_are_refused(region, message):
    case = make_case(["H.."], {"H": fixed("hot", 1.0), ".": region})
    with pytest.raises(CaseError, match=message):
        Operator(case)


def test_bad_codes_and_sizes_are_refused():
    case = make_case(["H.."], {"H": fixed("hot", 1.0), ".": interior()})
    case.codes[0, 2] = 5
    with pytest.raises(CaseError, match="no region"):
        Operator(case)
    case = make_case(["H.."], {"H": fixed("hot", 1.0), ".": interior()}, cell_size=1.0)
    case.cell_size = -1.0
    with pytest.raises(CaseError, match="cell_size"):
        Operator(case)


def test_a_case_without_unknowns():
    case = make_case(["HH", "CC"], {"H": fixed("hot", 1.0), "C": fixed("cold", 0.0)})
    op = Operator(case)
    assert op.unknowns == 0
    u = op.new_field()
    upd, res = np.zeros(3), np.zeros(3)
    for method in ("jacobi", "sor", "red-black-sor"):
        assert op.sweep(u, method, 1.0, 3, upd, res) == 3
        assert np.all(upd == 0.0)
    assert op.residual(u) == 0.0
    assert op.flows(u) == ({"hot": 0.0, "cold": 0.0}, 0.0, 0.0)
    np.testing.assert_array_equal(op.finish(u), [[1.0, 1.0], [0.0, 0.0]])


def test_memory_bytes_counts_the_jacobi_buffer():
    op = Operator(CASES["model-7"])
    field = 8 * (op.shape[0] + 2) * (op.shape[1] + 2)
    rb = op.memory_bytes("red-black-sor")
    assert rb >= field + 8 * op.shape[0] * op.shape[1] + op.cls.nbytes
    assert op.memory_bytes("jacobi") == rb + field
    with pytest.raises(UsageError):
        op.memory_bytes("nothing")


def test_importing_does_not_load_numba():
    code = "import sys, relaxtui, relaxtui.solver.assembled; assert 'numba' not in sys.modules, 'numba imported'"
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
