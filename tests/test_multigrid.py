"""Multigrid (relaxtui/multigrid.py, kernels/multigrid.py) against outside references.

Outside references:
- tests/exact.py: the contract's equations assembled independently in plain
  Python and solved with scipy.sparse.linalg.spsolve (the answer, and the fine
  matrix A for the Galerkin checks);
- scipy.sparse products P^T A P with the interpolation exported by the
  hierarchy, for the coarse operators;
- properties of Galerkin coarsening that hold for any interpolation P (common
  practice, e.g. Trottenberg, Oosterlee & Schüller, *Multigrid*, 2001, ch. 7,
  from memory): P^T A P is symmetric, and positive definite when A is and P has
  full column rank; it keeps the row sums A 1 where P reproduces constants.
"""

from __future__ import annotations

from dataclasses import replace

import exact
import numpy as np
import pytest
import scipy.ndimage
import scipy.sparse as sp
import scipy.sparse.linalg
from cases import case_from_codes, convection, feature_case, fixed, flux, interior, make_case, model_problem, outside

from relaxtui.case import load_case
from relaxtui.errors import UsageError
from relaxtui.solver import stopping
from relaxtui.solver.driver import solve
from relaxtui.solver.methods import get_method
from relaxtui.solver.multigrid import DEFAULT_OMEGA, Hierarchy, MultigridStepper
from relaxtui.solver.assembled import Operator
from relaxtui.solver.stopping import StoppingRule

GRIDS = "grids"
SMALL_DEMOS = ("composite", "electrodes", "heat-spreader")


# --- cases ---------------------------------------------------------------------------------


def _anchor(codes, interior_codes, fixed_code, anchors):
    """Make one cell of every 4-connected interior group without a fixed/convection neighbour fixed."""
    inside = np.isin(codes, interior_codes)
    labels, n = scipy.ndimage.label(inside)
    near = scipy.ndimage.binary_dilation(np.isin(codes, anchors), structure=scipy.ndimage.generate_binary_structure(2, 1))
    anchored = np.zeros(n + 1, dtype=bool)
    anchored[np.unique(labels[near & inside])] = True
    for g in range(1, n + 1):
        if not anchored[g]:
            i, j = np.argwhere(labels == g)[0]
            codes[i, j] = fixed_code
    return codes


def random_case(draw: int, n: int = 40, p_out: float = 0.3, contrast: float = 100.0, blobs: bool = True):
    """A random picture: blobs (or noise) of outside cells, two materials in blobs, a source, isolated
    fixed cells, a convection edge, a flux edge and a fixed edge (invented test data)."""
    rng = np.random.default_rng(draw)

    def smooth(k):
        f = rng.standard_normal((n, n))
        for _ in range(k):
            f = scipy.ndimage.uniform_filter(f, 3, mode="wrap")
        return f

    out = (smooth(3) < np.quantile(smooth(3), p_out)) if blobs else rng.random((n, n)) < p_out
    codes = np.where(smooth(4) < 0, 0, 1).astype(np.uint8)
    codes[out] = 2
    codes[rng.random((n, n)) < 0.01] = 3
    codes[0, :] = 4
    codes[-1, : n // 2] = 5
    codes[-1, n // 2 :] = 3
    codes = _anchor(codes, (0, 1), 3, (3, 4))
    regions = (interior("soft", 1.0, source=0.4), interior("hard", contrast), outside(), fixed("held", 10.0),
               convection("film", 2.0, 3.0), flux("inflow", 0.5))
    return case_from_codes(codes, regions, cell_size=0.5, depth=2.0, name=f"random-{draw}")


def demo(name):
    return load_case(f"{GRIDS}/{name}.toml")


_exact: dict = {}


def exact_of(key, make):
    if key not in _exact:
        case = make()
        _exact[key] = (case, exact.exact_solution(case))
    return _exact[key]


def homogeneous(case):
    """The same operator with every fixed value, flux, ambient and source 0 (its solution is 0)."""
    regions = []
    for r in case.regions:
        kw = {k: 0.0 for k in ("value", "flux", "ambient") if getattr(r, k) is not None}
        if r.kind == "interior":
            kw["source"] = 0.0
        regions.append(replace(r, **kw))
    return replace(case, regions=tuple(regions))


def measured_factor(case, iterations=10, **kw):
    """Geometric-mean reduction of the update per iteration over the last 6, from a random start (zero solution)."""
    op = Operator(homogeneous(case))
    st = MultigridStepper(op, **kw)
    u = op.new_field(np.random.default_rng(0).random(op.shape))
    upd, res = np.zeros(iterations), np.zeros(iterations)
    st.sweep(u, DEFAULT_OMEGA, iterations, upd, res)
    return float((upd[-1] / upd[-7]) ** (1 / 6))


# --- the answer equals spsolve ----------------------------------------------------------------


@pytest.mark.parametrize("name", SMALL_DEMOS)
def test_demo_answer_matches_spsolve(name):
    case, want = exact_of(name, lambda: demo(name))
    result = solve(case, method="multigrid", tolerance=1e-10)
    mask = np.isfinite(want)
    assert result.report["status"] == "converged", result.report["message"]
    assert np.array_equal(np.isnan(result.field), ~mask)
    assert np.max(np.abs(result.field[mask] - want[mask])) <= 1e-9


RANDOM = [(1, {}, True), (1, {}, False), (2, {"blobs": False, "p_out": 0.35}, True), (3, {"contrast": 1e3, "n": 56}, True),
          (3, {"contrast": 1e3, "n": 56}, False), (4, {"p_out": 0.0, "contrast": 10.0, "n": 33}, True),
          (4, {"p_out": 0.0, "contrast": 10.0, "n": 33}, False)]


@pytest.mark.parametrize("draw,kw,krylov", RANDOM)
def test_random_answer_matches_spsolve(draw, kw, krylov):
    case, want = exact_of(f"random-{draw}", lambda: random_case(draw, **kw))
    op = Operator(case)
    st = MultigridStepper(op, krylov=krylov)
    u = op.new_field()
    upd, res = np.zeros(400), np.zeros(400)
    n = 0
    while n < 400:  # iterate to the rounding floor
        st.sweep(u, DEFAULT_OMEGA, 20, upd[n:], res[n:])
        n += 20
        if upd[n - 1] < 1e-13:
            break
    got = op.finish(u)
    mask = np.isfinite(want)
    assert np.max(np.abs(got[mask] - want[mask])) <= 1e-9 * max(1.0, np.max(np.abs(want[mask])))
    assert op.residual(u) < 1e-10


def test_small_problem_is_solved_directly():
    case = make_case(["HHHH", "#..#", "#..#", "####"], {".": interior(), "H": fixed("hot", 5.0), "#": fixed("cold", 1.0)})
    want = exact.exact_solution(case)
    result = solve(case, method="multigrid", tolerance=1e-12)
    assert result.report["status"] == "converged"
    assert "direct" in result.report["method_info"]["cycle"]
    mask = np.isfinite(want)
    assert np.max(np.abs(result.field[mask] - want[mask])) < 1e-12


# --- coarse operators ---------------------------------------------------------------------------


def _matrices(h, level):
    """(A_fine, P, A_coarse) of level -> level + 1 as scipy matrices (level 0: A from tests/exact.py)."""
    if level == 0:
        A, _, _ = exact.assemble(h.operator.case)
    else:
        r, c, v = h.stencil_entries(level)
        n = int(h.levels[level - 1].unknowns)
        A = sp.csr_matrix((v, (r, c)), shape=(n, n))
    f, c, w = h.interpolation(level)
    P = sp.csr_matrix((w, (f, c)), shape=(A.shape[0], h.levels[level].unknowns))
    r, c, v = h.stencil_entries(level + 1)
    n = h.levels[level].unknowns
    return A, P, sp.csr_matrix((v, (r, c)), shape=(n, n))


PROPERTY_CASES = {"two-materials": lambda: feature_case(True), "random": lambda: random_case(5, n=72, contrast=1e3),
                  "noise": lambda: random_case(6, n=64, blobs=False, p_out=0.4), "model": lambda: model_problem(40)}


@pytest.mark.parametrize("name", list(PROPERTY_CASES))
def test_coarse_operators_are_galerkin_products(name):
    h = Hierarchy(Operator(PROPERTY_CASES[name]()), coarsest=40)
    assert len(h.levels) >= 2
    for level in range(min(3, len(h.levels))):
        A, P, Ac = _matrices(h, level)
        want = (P.T @ A @ P).toarray()
        got = Ac.toarray()
        scale = np.abs(want).max()
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-12 * scale)  # the kernel's P^T A P is scipy's


@pytest.mark.parametrize("name", list(PROPERTY_CASES))
def test_coarse_operators_keep_what_the_solver_relies_on(name):
    op = Operator(PROPERTY_CASES[name]())
    h = Hierarchy(op, coarsest=40)
    for level in range(min(3, len(h.levels))):
        A, P, Ac = _matrices(h, level)
        dense = Ac.toarray()
        diag = np.diag(dense)
        # symmetric, positive diagonal, positive definite (Cholesky succeeds)
        np.testing.assert_allclose(dense, dense.T, rtol=0, atol=1e-14 * np.abs(dense).max())
        assert np.all(diag > 0)
        np.linalg.cholesky(dense)
        # every coarse unknown is fed by a fine cell with weight 1 to it alone (P has full rank)
        Pd = P.toarray()
        assert np.all((np.isclose(Pd, 1.0) & (np.count_nonzero(Pd, axis=1) == 1)[:, None]).any(axis=0))
        # row sums: the coarse row sums are P^T A (P 1); where P reproduces the constant (every fine cell
        # interpolated to 1 over a coarse cell's stencil neighbourhood) that is P^T (A 1): the fine
        # boundary terms (fixed and convection conductances, 0 in the bulk), restricted.
        ones_c = np.ones(Ac.shape[0])
        p1 = P @ ones_c
        assert np.all(p1 <= 1 + 1e-12) and np.all(p1 >= 0)
        rowsum_c = Ac @ ones_c
        np.testing.assert_allclose(rowsum_c, P.T @ (A @ p1), rtol=0, atol=1e-12 * diag.max())
        boundary_terms = A @ np.ones(A.shape[0])
        reach = (abs(A) @ abs(P)).tocsc()  # fine cells q next to (or in) the support of each coarse cell
        off = (np.abs(p1 - 1) > 1e-13).astype(float)
        full = (reach.T @ off) == 0  # coarse rows whose whole neighbourhood interpolates the constant exactly
        np.testing.assert_allclose(rowsum_c[full], (P.T @ boundary_terms)[full], rtol=0, atol=1e-12 * diag.max())
        # (next to held cells P 1 < 1, and a coarse row sum there may even be negative: Galerkin of a
        # non-constant P 1; definiteness, checked above, is what the smoothers and CG need)
        assert ones_c @ rowsum_c > 0  # the anchoring survives coarsening
        if level == 0 and name == "model":
            assert full.sum() > 0.3 * len(full)  # the check above is not vacuous


def test_bulk_shortcut_gives_the_same_hierarchy():
    op = Operator(demo("electrodes"))
    fast = Hierarchy(op, coarsest=100, bulk=True)
    plain = Hierarchy(op, coarsest=100, bulk=False)
    assert [L.unknowns for L in fast.levels] == [L.unknowns for L in plain.levels]
    for a, b in zip(fast.levels, plain.levels):
        np.testing.assert_allclose(a.A, b.A, rtol=0, atol=1e-13 * np.abs(b.A).max())


def test_cells_without_sources_are_aggregated_not_lost():
    # one-cell channels on odd columns (common practice: vertex coarsening keeps only even ones) are
    # invisible to a plain nodal coarse grid; here each still maps to a coarse cell
    n = 33
    codes = np.full((n, n), 2, dtype=np.uint8)
    codes[n - 3 : n - 1, 1:-1] = 0
    for j in range(1, n - 1, 4):
        codes[1 : n - 3, j] = 0
    codes[n - 1, 1:5] = 3
    regions = (interior("metal"), interior("unused"), outside(), fixed("base", 1.0))
    case = case_from_codes(codes, (regions[0], regions[1], regions[2], replace(regions[3], value=1.0)), name="comb")
    h = Hierarchy(Operator(case), coarsest=10)
    f, c, w = h.interpolation(0)
    assert np.unique(f).size == Operator(case).unknowns  # every fine unknown has an interpolation row


# --- the cycle as a preconditioner -------------------------------------------------------------------


def test_symmetric_cycle_is_symmetric():
    # CG needs a symmetric preconditioner B: with M(w) = cycle(w) - w = -B A w on the homogeneous
    # problem, a . A M(b) = -a^T A B A b must be symmetric in a and b.
    case = homogeneous(random_case(7, n=36))
    op = Operator(case)
    st = MultigridStepper(op)
    A, _, index = exact.assemble(case)
    mask = index >= 0
    rng = np.random.default_rng(3)

    def M(vec):
        st.w[...] = 0.0
        st.operator.view(st.w)[mask] = vec[index[mask]]
        st.cycle_symmetric(DEFAULT_OMEGA)
        out = np.empty(A.shape[0])
        out[index[mask]] = st.operator.view(st.w)[mask]
        return out - vec

    a, b = rng.standard_normal(A.shape[0]), rng.standard_normal(A.shape[0])
    lhs, rhs = a @ (A @ M(b)), b @ (A @ M(a))
    assert lhs == pytest.approx(rhs, rel=1e-10)
    assert -(a @ (A @ M(a))) > 0  # a^T A B A a > 0: positive definite


def test_conjugate_gradients_rescue_noise_masks():
    # measured: on a picture whose outside cells are noise, coarse grids that keep one cell in four
    # cannot represent the many one-cell pieces; the plain cycle then barely converges, CG around it does
    case = random_case(2, blobs=False, p_out=0.35)
    plain, cg = measured_factor(case, 30, krylov=False), measured_factor(case, 30, krylov=True)
    assert plain > 0.9 and cg < 0.5


# --- grid independence -------------------------------------------------------------------------------


@pytest.mark.parametrize("krylov", [True, False])
def test_factor_is_independent_of_the_grid(krylov):
    factors = [measured_factor(model_problem(n, hot=0.0), krylov=krylov) for n in (63, 127, 255)]
    # textbook multigrid reduces the error by a fixed factor per cycle, independent of h (common practice)
    assert max(factors) < 0.15
    assert max(factors) <= 1.15 * min(factors), factors


# --- honesty --------------------------------------------------------------------------------------------

HONESTY_CASES = {"model": lambda: model_problem(63, hot=100.0), "two-materials": lambda: feature_case(True),
                 "random": lambda: random_case(8, n=48, contrast=1e3), "heat-spreader": lambda: demo("heat-spreader")}


def _half_and_half(n: int, contrast: float, draw: int, low: float = 0.5):
    """n x n cells: a random mix of conductivities 1 and 1 / contrast (the fraction ``low`` of the cells),
    held at 100 on top and 0 on the other sides (a stress case: conductor and insulator grains)."""
    rng = np.random.default_rng(draw)
    mix = rng.random((n - 2, n - 2)) < low
    rows = ["H" * n] + ["C" + "".join("a" if m else "." for m in row) + "C" for row in mix] + ["C" * n]
    return make_case(rows, {"C": fixed("cold", 0.0), ".": interior("plate"), "a": interior("low", conductivity=1.0 / contrast),
                            "H": fixed("hot", 100.0)})


def _refined(case, steps: int):
    """The exact discrete solution by scipy's sparse LU (tests/exact.py's matrix) with ``steps`` steps of
    iterative refinement (common practice; plain spsolve is itself 3e-7 off on a 1:1e7 mix), and the
    unknowns' index."""
    matrix, b, index = exact.assemble(case)
    lu = scipy.sparse.linalg.splu(matrix.tocsc())
    x = lu.solve(b)
    for _ in range(steps):
        x = x + lu.solve(b - matrix @ x)
    return x, index


@pytest.mark.parametrize("contrast", [1e4, 1e8])
def test_norm_of_the_inverse_on_a_high_contrast_mix(contrast):
    # The hierarchy's CG for (I - W) w = 1 against scipy's spsolve of A w = diag(A) (as above). Its first
    # form (steepest descent, 30 steps) gave up on such mixes and the Lanczos estimate of the Jacobi
    # radius took over: 3 and 1400 times below the exact norm at contrasts 1e4 and 1e8 (measured at 128 x 128).
    case = _half_and_half(64, contrast, 3)
    matrix, _, _ = exact.assemble(case)
    want = float(np.max(scipy.sparse.linalg.spsolve(matrix.tocsc(), matrix.diagonal())))
    op = Operator(case)
    st = MultigridStepper(op)
    got = st.inverse_norm()
    assert got is not None and 1.0 - 1e-3 <= got / want <= 1.05, (got, want)


@pytest.mark.parametrize("steps", [6, 20])
def test_weighted_residual_bound_bounds_the_error(steps):
    # |u - u_exact| <= (I - W)^-1 rho cell by cell (rho: each class's largest |residual|; an M-matrix's
    # inverse is non-negative, common practice). On a 64 x 64 random 1:1e5 mix after a few CG steps the
    # weighted bound must lie above the true error (reference: spsolve, tests/exact.py) and well below
    # the plain certificate ||(I - W)^-1|| max|r| (the norm: spsolve of A w = diag(A), as above).
    case = _half_and_half(64, 1e5, 3)
    matrix, _, _ = exact.assemble(case)
    inv = float(np.max(scipy.sparse.linalg.spsolve(matrix.tocsc(), matrix.diagonal())))
    want = exact.exact_solution(case)
    op = Operator(case)
    st = MultigridStepper(op)
    u = op.new_field()
    upd, res = np.zeros(steps), np.zeros(steps)
    st.sweep(u, DEFAULT_OMEGA, steps, upd, res)
    mask = np.isfinite(want)
    error = float(np.max(np.abs(op.view(u)[mask] - want[mask])))
    plain = inv * op.residual(u)
    bound = st.residual_bound(u, inv)
    assert bound is not None and error <= bound <= plain, (error, bound, plain)
    assert bound <= 0.1 * plain, (bound, plain)


def test_multigrid_on_a_high_contrast_mix_keeps_the_converged_promise():
    # 96 x 96 cells, contrast 1e7: the condition number (about 3e9) puts float64's rounding floor above the
    # tolerance 1e-6. With the Lanczos estimate of the norm of the inverse (1e3 times too small here) the
    # floor looked fine and the run said converged, claimed error 6.5e-9, true error 4.7e-6 (measured).
    # Reference: spsolve's LU with three steps of iterative refinement (scipy.sparse.linalg.splu;
    # refinement is common practice: plain spsolve is itself 3e-7 off here).
    case = _half_and_half(96, 1e7, 2)
    x, index = _refined(case, 3)
    run = solve(case, method="multigrid", tolerance=1e-6)
    mask = index >= 0
    error = float(np.max(np.abs(run.field[mask] - x[index[mask]])))
    status = run.report["status"]
    assert status != "converged" or error <= 1e-6, (status, error, run.report["message"])
    assert status == "stalled" and "float64 cannot certify" in run.report["message"], run.report["message"]
    assert run.report["estimated_error"] >= 0.25 * error  # the floor it reports is of the error's size


@pytest.mark.parametrize("draw, low, tolerance", [(5, 0.7, 1e-3), (5, 0.3, 1e-6)])
def test_multigrid_on_jumps_of_a_million_keeps_the_converged_promise(draw, low, tolerance):
    # 96 x 96 random mixes with a conductivity jump of 1e6 (reference: spsolve's LU with two steps of
    # iterative refinement, as above). Before the residual certificate was asked of multigrid at such
    # jumps (relaxtui.solver.conditioning.CERTIFIED_CONTRAST) the first said converged, claimed 6.6e-4,
    # true error 1.6e-3; the second said diverged after 21 steps (its updates rose 1000-fold while the
    # error fell from 4.1 to 0.68: CG's residuals need not fall, multigrid now counts as convergent).
    case = _half_and_half(96, 1e6, draw, low)
    x, index = _refined(case, 2)
    run = solve(case, method="multigrid", tolerance=tolerance)
    mask = index >= 0
    error = float(np.max(np.abs(run.field[mask] - x[index[mask]])))
    status = run.report["status"]
    assert status in ("converged", "stalled"), run.report["message"]
    assert status != "converged" or error <= tolerance, (status, error, run.report["message"])
    assert run.report["estimated_error"] >= error, (error, run.report["message"])  # the certified bound


def test_multigrid_at_jumps_stalls_once_its_updates_are_rounding_noise():
    # A 96 x 96 1:1e6 mix at 1e-6: float64's attainable accuracy (about 3e-7 here) lies above every update
    # once CG's residual has reached its plateau. The run stalls then, with the certified bound (above
    # the true error, against spsolve with two refinement steps) and the reason; before, it ran on until
    # the no-progress window, which doubles with each noise minimum of the updates, gave up: 4 511
    # iterations (measured), 799 now.
    case = _half_and_half(96, 1e6, 5, 0.5)
    x, index = _refined(case, 2)
    run = solve(case, method="multigrid", tolerance=1e-6)
    mask = index >= 0
    error = float(np.max(np.abs(run.field[mask] - x[index[mask]])))
    assert run.report["status"] == "stalled" and run.report["sweeps"] <= 1500, (run.report["sweeps"], run.report["message"])
    assert "attainable accuracy" in run.report["message"], run.report["message"]
    assert run.report["estimated_error"] >= error


@pytest.mark.parametrize("name", list(HONESTY_CASES))
@pytest.mark.parametrize("tol", [1e-2, 1e-4, 1e-6, 1e-8])
def test_converged_means_within_tolerance(name, tol):
    case, want = exact_of(name, HONESTY_CASES[name])
    result = solve(case, method="multigrid", tolerance=tol)
    rep = result.report
    mask = np.isfinite(want)
    true_error = float(np.max(np.abs(result.field[mask] - want[mask])))
    assert rep["status"] == "converged", rep["message"]
    assert true_error <= tol
    assert rep["estimated_error"] >= true_error
    assert rep["sweeps"] <= 40  # and not needlessly late: every iteration gains more than a decade here
    hist = result.history
    assert len(hist) == rep["sweeps"] and np.all(np.diff(hist.seconds) >= 0)


@pytest.mark.parametrize("name", ["model", "random", "heat-spreader"])
def test_norm_of_the_inverse_from_the_hierarchy(name):
    # ||(I - W)^-1||_inf = max w for (I - W) w = 1, i.e. A w = diag(A) (relaxtui.solver.conditioning; an M-matrix's
    # inverse is non-negative, common practice): scipy's spsolve on tests/exact.py's matrix is the reference
    case, _ = exact_of(name, HONESTY_CASES[name])
    matrix, _, _ = exact.assemble(case)
    want = float(np.max(scipy.sparse.linalg.spsolve(matrix.tocsc(), matrix.diagonal())))
    op = Operator(case)
    st = MultigridStepper(op)
    u = op.new_field()
    upd, res = np.zeros(8), np.zeros(8)
    st.sweep(u, DEFAULT_OMEGA, 2, upd, res)
    table = op.table.copy()
    got = st.inverse_norm()
    # the bound max x / (1 - rho) at a residual rho <= 5e-3 (relaxtui.solver.multigrid.INVERSE_NORM_RESIDUAL) lies
    # within (1 + rho) / (1 - rho) of the norm, above it; the settled estimate adds 2 %
    assert got is not None and 1.0 - 1e-3 <= got / want <= 1.02
    assert np.array_equal(op.table, table)  # the right-hand sides are the case's again
    # the CG state it took over restarts: the iteration still reaches the discrete solution
    st.sweep(u, DEFAULT_OMEGA, 8, upd, res)
    _, want_u = exact_of(name, HONESTY_CASES[name])
    mask = np.isfinite(want_u)
    assert float(np.max(np.abs(op.view(u)[mask] - want_u[mask]))) <= 1e-6 * float(np.max(np.abs(want_u[mask])))
    assert MultigridStepper(op, krylov=False).inverse_norm() is None  # one work vector only: the caller estimates


def test_stationary_cycles_are_honest_too():
    case, want = exact_of("two-materials", HONESTY_CASES["two-materials"])
    op = Operator(case)
    for tol in (1e-3, 1e-7):
        from relaxtui.solver.driver import Run

        run = Run(case, method="multigrid", tolerance=tol, operator=op)
        run.prepare()
        run._stepper = MultigridStepper(op, krylov=False)
        run.rule = StoppingRule(tol, 1000, scale=run._scale(), **run._stepper.rule_options)
        while not run.done:
            run.step(1.0)
        mask = np.isfinite(want)
        err = float(np.max(np.abs(op.view(run.field)[mask] - want[mask])))
        assert run.status == "converged" and err <= tol and run.rule.last.estimated_error >= err


# --- stopping-rule options used by multigrid ---------------------------------------------------------------


def test_short_window_certifies_a_fast_iteration_early_and_honestly():
    # a geometric error e_k = 100 * 0.05^k: updates e_{k-1} - e_k (tests/test_stopping.py's model)
    k = np.arange(1, 30)
    err = 100 * 0.05**k
    upd = 100 * 0.05 ** (k - 1) * 0.95
    for tol in (1e-2, 1e-6):
        default, short = StoppingRule(tol, 100), StoppingRule(tol, 100, min_window=2, envelope=1)
        stops = []
        for rule in (default, short):
            for i in range(len(upd)):
                rule.add(upd[i : i + 1])
                if rule.decide().status is not None:
                    break
            assert rule.last.status == stopping.CONVERGED and err[rule.sweeps - 1] <= tol
            assert rule.last.estimated_error >= err[rule.sweeps - 1]
            stops.append(rule.sweeps)
        assert stops[1] < stops[0]  # the short window stops sooner
    with pytest.raises(ValueError):
        StoppingRule(1e-3, 10, min_window=0)


# --- the method in the registry and its stepper -----------------------------------------------------------


def test_registry_entry():
    m = get_method("multigrid")
    assert m.factor is None and not m.uses_radius and not m.needs_radius  # no Lanczos estimate is spent on it
    assert m.auto(None) == DEFAULT_OMEGA
    assert m.check_omega(1.5) == 1.5


def test_info_and_report():
    case, _ = exact_of("two-materials", HONESTY_CASES["two-materials"])
    result = solve(case, method="multigrid", tolerance=1e-6)
    info = result.report["method_info"]
    assert info["levels"][0] == {"shape": list(case.shape), "unknowns": result.report["unknowns"]}
    assert all(a["unknowns"] > b["unknowns"] for a, b in zip(info["levels"], info["levels"][1:]))
    assert info["setup_seconds"] >= 0 and "conjugate gradients" in info["cycle"] and info["memory_bytes"] > 0
    assert result.report["omega"] == DEFAULT_OMEGA


def test_stepper_validates():
    op = Operator(model_problem(7))
    with pytest.raises(UsageError, match="gamma"):
        MultigridStepper(op, gamma=3)
    with pytest.raises(UsageError, match="post"):
        MultigridStepper(op, post=0)
    st = MultigridStepper(op)
    u = op.new_field()
    with pytest.raises(UsageError, match="omega"):
        st.sweep(u, 2.0, 1, np.zeros(1), np.zeros(1))
    with pytest.raises(UsageError, match="updates"):
        st.sweep(u, 1.0, 3, np.zeros(1), np.zeros(3))
    with pytest.raises(UsageError):
        st.sweep(np.zeros((3, 3)), 1.0, 1, np.zeros(1), np.zeros(1))


def test_zero_sweeps_leave_the_field_alone():
    case = feature_case(True)
    op = Operator(case)
    for krylov in (True, False):
        st = MultigridStepper(op, krylov=krylov)
        u = op.new_field()
        before = u.copy()
        assert st.sweep(u, DEFAULT_OMEGA, 0, np.zeros(1), np.zeros(1)) == 0
        assert np.array_equal(u, before)


def _four_colour_reference(e, f, A, omega, reverse):
    """One four-colour Gauss-Seidel/SOR sweep of the 9-point planes in plain numpy, colour by colour
    (a colour's cells are not coupled to each other, so each colour is one vectorised update).
    Plane layout as documented in kernels/mg_smoother.py: A[0] centre; east/west A[1] (own / west
    neighbour's), south/north A[2], south-east/north-west A[3], south-west/north-east A[4]."""
    e = e.copy()
    R, C = e.shape[0] - 2, e.shape[1] - 2
    fp = 1 if reverse else 0
    colours = [(fp, fp), (fp, 1 - fp), (1 - fp, fp), (1 - fp, 1 - fp)]
    I, J = np.meshgrid(np.arange(1, R + 1), np.arange(1, C + 1), indexing="ij")
    for rp, cp in colours:
        sel = (((I - 1) & 1) == rp) & (((J - 1) & 1) == cp) & (A[0, I, J] > 0)
        i, j = I[sel], J[sel]
        t = (((A[1, i, j] * e[i, j + 1] + A[1, i, j - 1] * e[i, j - 1]) + (A[2, i, j] * e[i + 1, j] + A[2, i - 1, j] * e[i - 1, j]))
             + ((A[3, i, j] * e[i + 1, j + 1] + A[3, i - 1, j - 1] * e[i - 1, j - 1]) + (A[4, i, j] * e[i + 1, j - 1] + A[4, i - 1, j + 1] * e[i - 1, j + 1])))
        x = e[i, j]
        e[i, j] = x + omega * ((f[i, j] - t) / A[0, i, j] - x)
    return e


@pytest.mark.parametrize("nblk", [1, 2, 3, 5])
@pytest.mark.parametrize("reverse", [False, True])
def test_coarse_smoother_is_the_plain_four_colour_order_for_any_row_blocks(nblk, reverse):
    """The coarse-level smoother's row blocks must not change its result: each block's edge rows
    wait for every block's interior (a second parallel loop; numba's loop fusion, which merged the
    two, is off in kernels/_jit.py). Reference: the plain colour-by-colour update above (four-colour
    ordering of a 9-point stencil, common practice)."""
    from relaxtui.kernels.mg_smoother import smooth9

    rng = np.random.default_rng(7)
    R, C = 61, 47
    A = np.zeros((5, R + 2, C + 2))
    A[0, 1:-1, 1:-1] = 8.0 + rng.random((R, C))
    A[0, 1:-1, 1:-1][rng.random((R, C)) < 0.1] = 0.0  # some cells are not unknowns
    for p in range(1, 5):
        A[p, 1:-1, 1:-1] = -rng.random((R, C))
    f = np.zeros((R + 2, C + 2))
    f[1:-1, 1:-1] = rng.random((R, C))
    e0 = np.zeros((R + 2, C + 2))
    e0[1:-1, 1:-1] = rng.random((R, C))
    want = _four_colour_reference(e0, f, A, 1.3, reverse)
    got = e0.copy()
    smooth9(got, f, A, 1.3, 1, reverse, nblk)
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12)
