"""The kernels against published iterative-method theory and closed-form answers.

Sources (see the published check values (references.md)): §9 model problem factors (D. M. Young,
*Iterative Solution of Large Linear Systems*, 1971; R. S. Varga, *Matrix
Iterative Analysis*), §10 red-black vs lexicographic Gauss-Seidel (Young 1971),
§11 weighted Jacobi (Saad, *Iterative Methods for Sparse Linear Systems*, ch. 4),
§1 the square plate by superposition (common practice), §6 the series thermal
resistance network (Incropera & DeWitt, *Fundamentals of Heat and Mass
Transfer*, ch. 3), §12 the maximum principle (common practice).

Factors are measured from the kernels' own per-sweep residual history:
f = (r[k2] / r[k1]) ** (1 / (k2 - k1)) well after the start-up transient.
"""

import numpy as np
import pytest
from cases import convection, fixed, interior, make_case, model_problem, outside

from relaxtui.solver.assembled import Operator

N = 31  # model problem: 31 x 31 unknowns, h = 1/32
H = 1.0 / (N + 1)
OMEGA_OPT = 2.0 / (1.0 + np.sin(np.pi * H))  # references.md §9


@pytest.fixture(scope="module")
def model():
    return Operator(model_problem(N, hot=0.0))  # homogeneous: the field is the error


def factor(op, method, omega, k1, k2):
    u = op.new_field(np.ones(op.shape))  # a smooth, positive start
    updates, residuals = np.zeros(k2), np.zeros(k2)
    assert op.sweep(u, method, omega, k2, updates, residuals) == k2
    return (residuals[k2 - 1] / residuals[k1 - 1]) ** (1.0 / (k2 - k1))


def test_jacobi_factor_is_cos_pi_h(model):
    # references.md §9: rho(Jacobi) = cos(pi h) (Young 1971; Varga)
    assert factor(model, "jacobi", 1.0, 300, 600) == pytest.approx(np.cos(np.pi * H), abs=1e-3)


def test_gauss_seidel_factor_is_cos_squared(model):
    # references.md §9: rho(Gauss-Seidel) = cos^2(pi h) (Young 1971; Varga)
    assert factor(model, "gauss-seidel", 1.0, 300, 600) == pytest.approx(np.cos(np.pi * H) ** 2, abs=1e-3)


def test_red_black_and_lexicographic_gauss_seidel_share_the_rate(model):
    # references.md §10: both orderings are consistently ordered, same asymptotic factor (Young 1971; from memory)
    lex = factor(model, "gauss-seidel", 1.0, 300, 600)
    rb = factor(model, "red-black-sor", 1.0, 300, 600)
    assert rb == pytest.approx(lex, abs=1e-3)
    assert rb == pytest.approx(np.cos(np.pi * H) ** 2, abs=1e-3)


@pytest.mark.parametrize("weight", [0.6, 0.85])
def test_weighted_jacobi_factor(model, weight):
    # references.md §11: factor = max |1 - w (1 - lambda)| over the Jacobi eigenvalues (Saad, ch. 4);
    # the model problem's Jacobi eigenvalues are (cos(p pi h) + cos(q pi h)) / 2, p, q = 1..N
    p = np.arange(1, N + 1)
    lam = (np.cos(p[:, None] * np.pi * H) + np.cos(p[None, :] * np.pi * H)) / 2
    want = np.max(np.abs(1 - weight * (1 - lam)))
    assert factor(model, "jacobi", weight, 1500, 3000) == pytest.approx(want, abs=1e-3)


@pytest.mark.parametrize("method", ["sor", "red-black-sor"])
def test_sor_at_the_optimum_converges_at_omega_minus_one(model, method):
    # references.md §9: rho(SOR at omega_opt) = omega_opt - 1, omega_opt = 2 / (1 + sin(pi h)); for a
    # consistently ordered matrix omega_opt = 2 / (1 + sqrt(1 - rho_J^2)), the same number here
    rho_j = np.cos(np.pi * H)
    assert 2.0 / (1.0 + np.sqrt(1.0 - rho_j**2)) == pytest.approx(OMEGA_OPT, rel=1e-12)
    measured = factor(model, method, OMEGA_OPT, 200, 400)
    # at omega_opt the iteration matrix is defective (a 2x2 Jordan block), so the measured factor
    # approaches omega_opt - 1 from above like (k2/k1)^(1/(k2-k1)): 0.4 % over 200..400 sweeps
    assert measured == pytest.approx(OMEGA_OPT - 1.0, abs=0.01)
    assert measured < factor(model, "gauss-seidel", 1.0, 200, 400) - 0.1


def converge(op, u, method, omega, tol=1e-14, cap=100_000):
    updates, residuals = np.zeros(1000), np.zeros(1000)
    done = 0
    while done < cap:
        n = op.sweep(u, method, omega, 1000, updates, residuals)
        done += n
        if residuals[n - 1] <= tol:
            return
    raise AssertionError("no convergence")


@pytest.mark.parametrize("method,omega", [("red-black-sor", 1.8), ("sor", 1.8)])
def test_square_plate_centre_is_a_quarter_of_the_hot_side(method, omega):
    # references.md §1 (common practice): superposition of the four rotated one-hot-side problems is
    # uniform T1, and symmetry splits it equally: the centre is T1 / 4, exactly for an odd grid.
    n = 21
    fields = []
    for side in ("top", "right", "bottom", "left"):
        case = model_problem(n, hot=8.0, side=side)
        op = Operator(case)
        u = op.new_field()
        converge(op, u, method, omega)
        fields.append(op.view(u)[1:-1, 1:-1].copy())
    centre = n // 2
    for f in fields:
        assert f[centre, centre] == pytest.approx(2.0, abs=1e-12)
    np.testing.assert_allclose(sum(fields), 8.0, rtol=0, atol=1e-11)


def test_series_slabs_with_a_film_reproduce_the_resistance_network():
    # references.md §6 (Incropera & DeWitt, ch. 3): q'' = (T_hot - T_amb) / (sum L_i / k_i + 1 / h_c).
    # Lengths run from the fixed cell's centre: slab A spans n_a cells plus the fixed cell's half,
    # slab B n_b cells (its last half cell is in the contract's film U). Exact for the scheme: to rounding.
    n_a, n_b = 7, 5
    k_a, k_b, h_c = 4.0, 0.5, 25.0
    t_hot, t_amb = 80.0, 20.0
    h, depth, rows = 0.01, 0.2, 3
    art = ["H" + "a" * n_a + "b" * n_b + "~"] * rows
    case = make_case(art, {"H": fixed("wall", t_hot), "a": interior("A", k_a), "b": interior("B", k_b),
                           "~": convection("air", h_c, t_amb)}, cell_size=h, depth=depth)
    op = Operator(case)
    u = op.new_field()
    converge(op, u, "red-black-sor", 1.5, tol=1e-12)  # field values near 80: a few ulps
    l_a, l_b = (n_a + 0.5) * h, n_b * h
    q = (t_hot - t_amb) / (l_a / k_a + l_b / k_b + 1.0 / h_c)
    flows, _, imbalance = op.flows(u)
    area = rows * h * depth
    assert flows["wall"] == pytest.approx(q * area, rel=1e-11)
    assert flows["air"] == pytest.approx(-q * area, rel=1e-11)
    assert imbalance < 1e-12
    # temperatures at the cell centres: linear in each slab
    x = (np.arange(n_a + n_b) + 1.0) * h  # distance of each centre from the fixed cell's centre
    t_if = t_hot - q * l_a / k_a
    want = np.where(np.arange(n_a + n_b) < n_a, t_hot - q * x / k_a, t_if - q * (x - l_a) / k_b)
    field = op.finish(u)
    for r in range(rows):
        np.testing.assert_allclose(field[r, 1:-1], want, rtol=0, atol=1e-10)


@pytest.mark.parametrize("method,omega", [("jacobi", 1.0), ("jacobi", 0.5), ("gauss-seidel", 1.0), ("sor", 0.7),
                                          ("red-black-sor", 1.0), ("red-black-sor", 0.8)])
def test_maximum_principle_after_every_sweep(method, omega):
    # references.md §12 (common practice): without sources, flux or convection every interior value
    # lies between the smallest and largest fixed values. For omega <= 1 each update is a convex
    # combination of the old value and the neighbours, so it holds after every sweep as well.
    art = [
        "xxAAAAAAAAAAAAAAAAAAAAxxxxxxxxx",
        "x.....................xxxxxxxxx",
        "x..........xxxxx...........Bxxx",
        "C..........xxxxx............xxx",
        "C.....B....xxxxx............xxx",
        "C...........................xxx",
        "xxxxxxxx.xxxxxxxxxxxxxxx....xxx",
        "xxxxxxxx.xxxxxxxxxxxxxxx....CCC",
    ]
    case = make_case(art, {".": interior("plate", 2.0), "A": fixed("a", 0.9), "B": fixed("b", 0.5),
                           "C": fixed("c", 0.2), "x": outside()})
    op = Operator(case)
    rng = np.random.default_rng(9)
    u = op.new_field(0.2 + 0.7 * rng.random(op.shape))
    inside = op.cls != 0
    one = np.zeros(1)
    for _ in range(80):
        op.sweep(u, method, omega, 1, one, np.zeros(1))
        assert u[inside].min() >= 0.2 - 1e-15
        assert u[inside].max() <= 0.9 + 1e-15
