"""Case format v1.1 physics: contact resistance, orthotropy, coefficient maps, axisymmetry.

Outside references: published formulas (named beside each check) and tests/exact.py, the
independent scipy assembly of the contract's equations extended to the v1.1 section of
docs/case-format.md. Every method of the registry is run on every feature against it.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

import exact
from cases import convection, fixed, flux, interior, outside
from relaxtui.case.loader import build_case
from relaxtui.case.physics import CoefficientMap, Contact
from relaxtui.errors import CaseError
from relaxtui.solver.driver import solve
from relaxtui.solver.methods import METHODS
from relaxtui.solver.assembled import Operator

ALL_METHODS = tuple(METHODS)  # every method in the registry


def _colour(regions):
    return [replace(r, color=f"#00{i // 256:02x}{i % 256:02x}") for i, r in enumerate(regions)]


def _case(codes, regions, **kw):
    return build_case(np.asarray(codes, dtype=np.uint8), _colour(regions), **kw)


def _strip(cols_per_layer, rows=3):
    """Codes of a 1-D wall in x: hot fixed column, layers of interior cells, cold fixed column."""
    cols = 2 + sum(cols_per_layer)
    codes = np.zeros((rows, cols), dtype=np.uint8)
    j = 1
    for n, width in enumerate(cols_per_layer):
        codes[:, j : j + width] = 2 + n
        j += width
    codes[:, -1] = 1
    return codes


# --- contact resistance -----------------------------------------------------------------------


def test_two_layer_wall_with_interface_resistance_matches_the_series_formula():
    # Incropera & DeWitt, Fundamentals of Heat and Mass Transfer, ch. 3 (thermal resistance
    # network with a contact resistance R''_tc): q'' = (T1 - T2) / (L1/k1 + R''_tc + L2/k2).
    # Exact for the discrete equations: fixed values sit at cell centres, so each layer's L runs
    # from a fixed centre (or the interface) and includes the half cell beside it.
    h, k1, k2, r_tc, t_hot, t_cold, depth = 0.01, 2.0, 0.5, 0.004, 80.0, 20.0, 0.3
    n1, n2, rows = 5, 7, 3
    regions = [fixed("hot", t_hot), fixed("cold", t_cold), interior("inner", k1), interior("outer", k2)]
    case = _case(_strip([n1, n2], rows), regions, cell_size=h, depth=depth, contacts=[Contact("inner", "outer", r_tc)])
    l1, l2 = (n1 + 0.5) * h, (n2 + 0.5) * h
    q = (t_hot - t_cold) / (l1 / k1 + r_tc + l2 / k2)
    field = exact.exact_solution(case)
    flows, _, _ = exact.exact_flows(case, field)
    assert flows["hot"] == pytest.approx(q * rows * h * depth, rel=1e-12)
    jump = field[1, n1] - field[1, n1 + 1]  # across the interface: two half cells and the contact
    assert jump == pytest.approx(q * (h / (2 * k1) + r_tc + h / (2 * k2)), rel=1e-11)
    for method in ALL_METHODS:
        r = solve(case, method=method, tolerance=1e-8)
        assert r.report["status"] == "converged", method
        assert np.nanmax(np.abs(r.field - field)) <= 1e-8, method
        assert r.report["flows"]["hot"] == pytest.approx(q * rows * h * depth, rel=1e-6), method


def test_contact_with_a_fixed_region_and_without_contacts_the_v1_operator():
    # a contact on the faces to a held region is in series with G (same network as above, one layer)
    h, k, r_tc = 0.02, 3.0, 0.01
    regions = [fixed("hot", 1.0), fixed("cold", 0.0), interior("slab", k)]
    codes = _strip([6])
    plain = _case(codes, regions, cell_size=h)
    held = _case(codes, regions, cell_size=h, contacts=[Contact("hot", "slab", r_tc)])
    assert Operator(plain).physics is None  # a v1 case takes the v1 assembly
    q = 1.0 / ((6 + 1) * h / k + r_tc)  # Incropera & DeWitt ch. 3, series resistances
    flows, _, _ = exact.exact_flows(held, exact.exact_solution(held))
    assert flows["hot"] == pytest.approx(q * 3 * h, rel=1e-12)
    op = Operator(held)
    u = op.new_field(exact.exact_solution(held))
    assert op.flows(u)[0]["hot"] == pytest.approx(q * 3 * h, rel=1e-12)


def test_the_class_table_without_v11_keys_equals_the_v1_kernel_table():
    # The v1.1 class table (numpy) reproduces the v1 kernel's table bit for bit on a v1 case:
    # one formula, two codes (the v1 code path itself is untouched for v1 cases).
    from relaxtui.solver.assembly import Physics

    codes = np.array([[2, 2, 2, 2, 2, 2], [4, 0, 0, 1, 1, 5], [4, 0, 0, 1, 1, 5], [3, 3, 6, 6, 3, 3]])
    regions = [interior("a", 2.0, 1.5), interior("b", 7.0), fixed("cold", 0.0), fixed("hot", 2.0, conductivity=4.0),
               flux("in", 3.0), convection("air", 5.0, 1.0), outside()]
    case = _case(codes, regions, cell_size=0.1)
    op = Operator(case)
    table, diag = op.table.copy(), op.diag.copy()
    Physics(op, case)._class_table()
    assert np.array_equal(op.table, table) and np.array_equal(op.diag, diag)


# --- orthotropy ----------------------------------------------------------------------------------


def _rectangular_cells_solution(codes, kinds, values, k, hx, hy):
    """Isotropic conductivity k on cells hx wide and hy high: the cell-centred 5-point scheme
    (Patankar, Numerical Heat Transfer and Fluid Flow, ch. 4: face conductance k * area / distance,
    here k hy / hx across x faces and k hx / hy across y faces; common practice). Dirichlet cells
    ('f' with values) and insulated borders / holes ('o')."""
    import scipy.sparse
    import scipy.sparse.linalg

    rows, cols = codes.shape
    idx = -np.ones((rows, cols), dtype=int)
    cells = [(i, j) for i in range(rows) for j in range(cols) if kinds[codes[i, j]] == "i"]
    for n, (i, j) in enumerate(cells):
        idx[i, j] = n
    A = scipy.sparse.lil_matrix((len(cells), len(cells)))
    b = np.zeros(len(cells))
    for n, (i, j) in enumerate(cells):
        for di, dj, g in ((-1, 0, k * hx / hy), (1, 0, k * hx / hy), (0, -1, k * hy / hx), (0, 1, k * hy / hx)):
            a, c = i + di, j + dj
            if not (0 <= a < rows and 0 <= c < cols):
                continue
            kind = kinds[codes[a, c]]
            if kind == "i":
                A[n, n] += g
                A[n, idx[a, c]] -= g
            elif kind == "f":
                A[n, n] += g
                b[n] += g * values[codes[a, c]]
    x = scipy.sparse.linalg.spsolve(A.tocsc(), b)
    out = np.full((rows, cols), np.nan)
    for n, (i, j) in enumerate(cells):
        out[i, j] = x[n]
    return out


def test_orthotropic_rectangle_equals_the_stretched_isotropic_one():
    # Stretched coordinates (Carslaw & Jaeger, Conduction of Heat in Solids, §1.18, anisotropic
    # solids; Bear, Dynamics of Fluids in Porous Media, §7.6 for aquifers; from memory): kx, ky on
    # square cells h is isotropic k = sqrt(kx ky) on cells h wide and h sqrt(kx / ky) high. The
    # face conductances agree exactly (k hy/hx = kx, k hx/hy = ky), so the discrete fields are equal.
    kx, ky, h = 9.0, 1.0, 0.05
    rng = np.random.default_rng(7)
    codes = np.zeros((14, 17), dtype=np.uint8)
    codes[0, :] = 1
    codes[-1, 3:11] = 2
    codes[5:8, 5:9] = 3  # an insulated hole
    codes[rng.random(codes.shape) < 0.03] = 3
    codes[0, :] = 1
    regions = [replace(interior("laminate", kx), conductivity_y=ky), fixed("top", 10.0), fixed("foot", -4.0), outside()]
    case = _case(codes, regions, cell_size=h)
    want = _rectangular_cells_solution(codes, "iffo", {1: 10.0, 2: -4.0}, math.sqrt(kx * ky), h, h * math.sqrt(kx / ky))
    got = exact.exact_solution(case)
    dom = codes == 0
    assert np.max(np.abs(got[dom] - want[dom])) <= 1e-11
    for method in ALL_METHODS:
        r = solve(case, method=method, tolerance=1e-9)
        assert r.report["status"] == "converged", method
        assert np.max(np.abs(r.field[dom] - want[dom])) <= 1e-9, method


@pytest.mark.parametrize("direction", ["along", "across"])
def test_layered_strip_flow_is_the_arithmetic_or_harmonic_mean(direction):
    # A laminate of isotropic layers conducts like an orthotropic solid with the thickness-weighted
    # arithmetic mean along the layers (parallel resistances) and the harmonic mean across them
    # (series resistances): Incropera & DeWitt ch. 3, composite walls; common practice for layered
    # aquifers (Freeze & Cherry, Groundwater, §2.7: K_x arithmetic, K_z harmonic; from memory).
    # Exact for 1-D discrete flows with whole-cell layers.
    h = 0.01
    ks = (4.0, 0.25, 1.5)
    thick = (3, 2, 4)  # cells
    n_flow = 8  # interior cells along the flow
    layers = np.repeat(np.arange(3), thick)  # layer of each row (along) / column (across)
    if direction == "along":
        codes = np.zeros((len(layers), n_flow + 2), dtype=np.uint8)
        codes[:, 1:-1] = (3 + layers)[:, None]
        codes[:, 0], codes[:, -1] = 1, 2
        k_eff = sum(k * t for k, t in zip(ks, thick)) / sum(thick)
        l_eff = (n_flow + 1) * h
        area = sum(thick) * h
    else:
        codes = np.zeros((n_flow, len(layers) + 2), dtype=np.uint8)
        codes[:, 1:-1] = (3 + layers)[None, :]
        codes[:, 0], codes[:, -1] = 1, 2
        widths = list(thick)
        widths[0] += 0.5  # the half cells beside the fixed centres belong to the end layers
        widths[-1] += 0.5
        k_eff = sum(widths) / sum(w / k for w, k in zip(widths, ks))
        l_eff = sum(widths) * h
        area = n_flow * h
    regions = [outside(), fixed("hot", 1.0), fixed("cold", 0.0)] + [interior(f"ply{n}", k) for n, k in enumerate(ks)]
    layered = _case(codes, regions, cell_size=h)
    flow = exact.exact_flows(layered, exact.exact_solution(layered))[0]["hot"]
    assert flow == pytest.approx(k_eff * area / l_eff, rel=1e-12)
    # the same strip as one orthotropic block with the mean conductivities
    block = codes.copy()
    block[block >= 3] = 3
    kxy = (k_eff, 1.0)  # the flow runs in x: kx is the layers' mean (ky does not matter in a 1-D flow)
    ortho = _case(block, regions[:3] + [replace(interior("board", kxy[0]), conductivity_y=kxy[1])], cell_size=h)
    for method in ALL_METHODS:
        r = solve(ortho, method=method, tolerance=1e-11)
        assert r.report["flows"]["hot"] == pytest.approx(flow, rel=1e-7), method


# --- coefficient maps ------------------------------------------------------------------------------


def _blocks():
    codes = np.zeros((16, 20), dtype=np.uint8)
    codes[:, 10:] = 1
    codes[0, :] = 2
    codes[-1, 4:16] = 3
    codes[6:9, 0] = 4
    return codes


def test_a_map_constant_per_block_equals_the_blocks_drawn_as_regions():
    # Two ways of writing the same equations (docs/case-format.md, v1.1 maps): the per-cell path
    # must give the class path's field.
    codes = _blocks()
    regions = [interior("left", 2.0, 3.0), interior("right", 0.5, -1.0), fixed("top", 1.0), fixed("foot", 0.0), flux("in", 2.0)]
    drawn = _case(codes, regions, cell_size=0.1)
    merged = codes.copy()
    merged[merged == 1] = 0
    k = np.where(codes == 1, 0.5, 2.0)
    s = np.where(codes == 1, -1.0, 3.0)
    mapped = _case(merged, [interior("board", 1.0)] + regions[1:], cell_size=0.1,
                   maps=[CoefficientMap("board", "conductivity", "k.npy", k), CoefficientMap("board", "source", "s.npy", s)])
    op = Operator(mapped)
    assert op.physics.per_cell
    want = exact.exact_solution(drawn)
    assert np.nanmax(np.abs(exact.exact_solution(mapped) - want)) <= 1e-12
    want_flows = exact.exact_flows(drawn, want)
    for method in ALL_METHODS:
        r = solve(mapped, method=method, tolerance=1e-9)
        assert r.report["status"] == "converged", method
        assert np.nanmax(np.abs(r.field - want)) <= 1e-9, method
        for name, v in want_flows[0].items():
            assert r.report["flows"][name] == pytest.approx(v, rel=1e-6, abs=1e-9), (method, name)


def _smooth_map(shape, draw, lo, hi):
    """A smooth random map: a few low Fourier modes, scaled to [lo, hi]."""
    rng = np.random.default_rng(draw)
    y, x = np.mgrid[0 : shape[0], 0 : shape[1]] / max(shape)
    f = np.zeros(shape)
    for _ in range(6):
        a, b, p = rng.uniform(0.5, 3, 3)
        f += rng.normal() * np.sin(math.pi * (a * x + b * y) + p * 6)
    f = (f - f.min()) / (f.max() - f.min())
    return lo + (hi - lo) * f


def test_a_random_smooth_map_against_the_scipy_reference():
    codes = _blocks()
    codes[codes == 1] = 0
    regions = [interior("aquifer"), interior("unused"), fixed("river", 3.0), fixed("lake", 1.0), convection("leak", 0.5, 2.0)]
    k = _smooth_map(codes.shape, 3, 0.1, 20.0)
    s = _smooth_map(codes.shape, 4, -2.0, 2.0)
    case = _case(codes, regions, cell_size=5.0, depth=2.0, maps=[CoefficientMap("aquifer", "conductivity", "t.npy", k),
                                                                  CoefficientMap("aquifer", "source", "r.npy", s)])
    want = exact.exact_solution(case)  # spsolve of the v1.1 equations, assembled in plain loops
    want_flows, want_source, _ = exact.exact_flows(case, want)
    for method in ALL_METHODS:
        r = solve(case, method=method, tolerance=1e-8)
        assert r.report["status"] == "converged", method
        assert np.nanmax(np.abs(r.field - want)) <= 1e-8, method
        assert r.report["source_total"] == pytest.approx(want_source, rel=1e-12), method
        for name, v in want_flows.items():
            assert r.report["flows"][name] == pytest.approx(v, rel=1e-5, abs=1e-8), (method, name)


def test_bad_map_values_name_a_cell():
    codes = _blocks()
    k = np.ones(codes.shape)
    k[3, 4] = 0.0
    regions = [interior("a"), interior("b"), fixed("top", 1.0), fixed("foot", 0.0), flux("in", 2.0)]
    with pytest.raises(CaseError, match=r"row 3, column 4.*> 0"):
        _case(codes, regions, maps=[CoefficientMap("a", "conductivity", "k.npy", k)])
    s = np.zeros(codes.shape)
    s[2, 15] = np.nan
    with pytest.raises(CaseError, match=r"row 2, column 15"):
        _case(codes, regions, maps=[CoefficientMap("b", "source", "s.npy", s)])
    s[2, 15] = 0.0
    s[0, 0] = np.nan  # not a cell of region b: ignored
    _case(codes, regions, maps=[CoefficientMap("b", "source", "s.npy", s)])


# --- axisymmetric geometry ----------------------------------------------------------------------------


def _midpoint_error(r1, r2, h):
    """Leading error of the midpoint rule for the integral of 1/r over [r1, r2] with step h:
    (h^2 / 24) * integral of (1/r)'' = (h^2 / 24) (1/r1^2 - 1/r2^2) (any numerical analysis text,
    e.g. Burden & Faires, Numerical Analysis, §4.3). The scheme's sum of h / r_face underestimates
    ln(r2/r1) by about this much (1/r is convex)."""
    return h * h / 24.0 * (1.0 / r1**2 - 1.0 / r2**2)


def _annulus(j1, j2, rows=4, k=1.0):
    """Axisymmetric strip: columns < j1 outside... inner fixed at column j1, outer fixed at column j2."""
    codes = np.full((rows, j2 + 1), 3, dtype=np.uint8)
    codes[:, j1] = 1
    codes[:, j1 + 1 : j2] = 0
    codes[:, j2] = 2
    return codes


def test_radial_conduction_through_a_cylinder_wall():
    # Incropera & DeWitt ch. 3, radial systems: q = 2 pi k L (T1 - T2) / ln(r2 / r1).
    # The scheme's face radii make the discrete resistance sum(h / r_face) / (2 pi k L): the
    # midpoint rule for ln(r2/r1) (exact for the discrete equations); against the formula it is
    # off by the midpoint rule's error, bounded below.
    h, k, t1, t2 = 0.001, 45.0, 120.0, 30.0
    j1, j2, rows = 6, 30, 4
    r1, r2, length = (j1 + 0.5) * h, (j2 + 0.5) * h, rows * h
    regions = [interior("steel", k), fixed("bore", t1), fixed("skin", t2), outside()]
    case = _case(_annulus(j1, j2, rows), regions, cell_size=h, geometry="axisymmetric")
    s = sum(h / (j * h) for j in range(j1 + 1, j2 + 1))
    q_discrete = 2 * math.pi * k * length * (t1 - t2) / s
    q_formula = 2 * math.pi * k * length * (t1 - t2) / math.log(r2 / r1)
    rel = 1.05 * _midpoint_error(r1, r2, h) / math.log(r2 / r1)
    for method in ALL_METHODS:
        r = solve(case, method=method, tolerance=1e-7)
        assert r.report["status"] == "converged", method
        q = r.report["flows"]["bore"]
        assert q == pytest.approx(q_discrete, rel=1e-6), method
        assert abs(q - q_formula) <= rel * q_formula, method
        assert -r.report["flows"]["skin"] == pytest.approx(q, rel=1e-6), method
    assert abs(q_discrete - q_formula) > 0.1 * rel * q_formula  # the tolerance is not slack


def test_thiem_steady_drawdown_around_a_well():
    # Thiem's equation (Thiem 1906; Freeze & Cherry, Groundwater, 1979, §8.3; from memory): in a
    # confined aquifer of transmissivity T pumped at Q, the steady head between the well (radius
    # r_w, head h_w) and a boundary of fixed head h_0 at R is h(r) = h_w + (h_0 - h_w) ln(r/r_w) / ln(R/r_w),
    # and Q = 2 pi T (h_0 - h_w) / ln(R / r_w). Discretely, ln is replaced by the midpoint sums.
    h, conductivity, b = 1.0, 2e-4, 12.0  # cell 1 m, hydraulic conductivity m/s, aquifer thickness m
    jw, jr = 1, 60  # the well's columns 0..jw are held at h_w; column jr is the outer boundary
    rows = int(b / h)
    codes = np.zeros((rows, jr + 1), dtype=np.uint8)
    codes[:, : jw + 1] = 1
    codes[:, jr] = 2
    h_w, h_0 = 40.0, 52.0
    regions = [interior("aquifer", conductivity), fixed("well", h_w), fixed("boundary", h_0), outside()]
    case = _case(codes, regions, cell_size=h, geometry="axisymmetric")
    r_w, big_r = (jw + 0.5) * h, (jr + 0.5) * h
    l_t = math.log(big_r / r_w)
    e_t = 1.05 * _midpoint_error(r_w, big_r, h)
    q_formula = 2 * math.pi * conductivity * b * (h_0 - h_w) / l_t
    for method in ALL_METHODS:
        r = solve(case, method=method, tolerance=1e-7)
        assert r.report["status"] == "converged", method
        heads = r.field[rows // 2, jw + 1 : jr]
        radii = (np.arange(jw + 1, jr) + 0.5) * h
        l_p = np.log(radii / r_w)
        e_p = 1.05 * np.array([_midpoint_error(r_w, x, h) for x in radii])
        thiem = h_w + (h_0 - h_w) * l_p / l_t
        # |S_p/S_t - L_p/L_t| <= (L_p e_t + L_t e_p) / (L_t (L_t - e_t)), S = L - e (derived in the comment above)
        bound = (h_0 - h_w) * (l_p * e_t + l_t * e_p) / (l_t * (l_t - e_t)) + 2e-7
        assert np.all(np.abs(heads - thiem) <= bound), method
        q = -r.report["flows"]["well"]  # the well takes the water out
        assert abs(q - q_formula) <= (e_t / (l_t - e_t)) * q_formula + 1e-6 * q_formula, method


def test_solid_cylinder_with_uniform_generation():
    # Incropera & DeWitt ch. 3, §3.5 (radial systems with generation): T(r) = T_s + q (r_o^2 - r^2) / (4 k),
    # so T_centre - T_surface = q r_o^2 / (4 k). The field is quadratic in r, which the scheme's
    # radius-weighted faces and cell volumes reproduce exactly at the cell centres; the axis is at
    # r = 0, half a cell from the first centre, so T_c - T_s from the first centre is short by
    # q (h/2)^2 / (4 k).
    h, k, q, t_s = 0.002, 16.0, 2.5e6, 25.0
    n, rows = 20, 3
    codes = np.zeros((rows, n + 1), dtype=np.uint8)
    codes[:, n] = 1
    regions = [interior("pin", k, q), fixed("surface", t_s)]
    case = _case(codes, regions, cell_size=h, geometry="axisymmetric")
    r_o = (n + 0.5) * h
    field = exact.exact_solution(case)
    r0 = 0.5 * h
    assert field[1, 0] - t_s == pytest.approx(q * (r_o**2 - r0**2) / (4 * k), rel=1e-12)
    for method in ALL_METHODS:
        r = solve(case, method=method, tolerance=1e-8)
        assert r.report["status"] == "converged", method
        centre_rise = r.report["max"] - t_s
        assert abs(centre_rise - q * r_o**2 / (4 * k)) <= q * r0**2 / (4 * k) + 1e-8, method
        # all the heat leaves through the surface: q pi r_i^2 L summed as the scheme's volumes
        volume = math.pi * (n * h) ** 2 * rows * h
        assert -r.report["flows"]["surface"] == pytest.approx(q * volume, rel=1e-7), method
        assert r.report["source_total"] == pytest.approx(q * volume, rel=1e-12), method


def test_axisymmetric_refuses_depth():
    with pytest.raises(CaseError, match="depth"):
        from relaxtui.case import physics

        physics.check_case_extras((), np.zeros((1, 1), np.uint8), (), (), "axisymmetric", (), 1.0, True, "c.toml")


# --- every method on every feature, against the scipy reference ------------------------------------------


def _feature_case(variant):
    rng = np.random.default_rng(11)
    rows, cols = 18, 22
    codes = np.zeros((rows, cols), np.uint8)
    codes[:, 11:] = 1
    codes[0, :] = 2
    codes[-1, :5] = 3
    codes[5:8, 0] = 4
    codes[9:13, -1] = 5
    codes[14:16, 6:9] = 6
    regions = [interior("a", 2.0, 1.0), replace(interior("b", 5.0), conductivity_y=0.5), fixed("cold", 0.0),
               fixed("hot", 3.0, conductivity=4.0), flux("in", 2.0), convection("air", 3.0, 1.0), outside("hole")]
    kw = {"contacts": [Contact("a", "b", 0.3), Contact("b", "hot", 0.1)], "cell_size": 0.1}
    if variant in ("maps", "axisymmetric+maps"):
        kw["maps"] = [CoefficientMap("a", "conductivity", "<array>", 1 + rng.random((rows, cols))),
                      CoefficientMap("b", "source", "<array>", rng.random((rows, cols)))]
    if variant.startswith("axisymmetric"):
        kw["geometry"] = "axisymmetric"
    return _case(codes, regions, **kw)


@pytest.mark.parametrize("variant", ["contacts+orthotropy", "maps", "axisymmetric", "axisymmetric+maps"])
@pytest.mark.parametrize("method", ALL_METHODS)
def test_every_method_on_every_feature_matches_scipy(variant, method):
    case = _feature_case(variant)
    want = exact.exact_solution(case)
    want_flows, want_source, _ = exact.exact_flows(case, want)
    r = solve(case, method=method, tolerance=1e-9)
    assert r.report["status"] == "converged"
    assert np.nanmax(np.abs(r.field - want)) <= 1e-9  # the promise of "converged"
    assert r.report["source_total"] == pytest.approx(want_source, rel=1e-12)
    for name, v in want_flows.items():
        assert r.report["flows"][name] == pytest.approx(v, rel=1e-6, abs=1e-8), name
    # the residual agrees with the reference's (b - A x) / diag
    op = Operator(case)
    if variant == "axisymmetric+maps":
        assert op.classes == op.unknowns + 1  # the per-cell path: every unknown its own class
    u = op.new_field(want)
    assert op.residual(u) <= 1e-12
    assert np.nanmax(np.abs(op.residual_field(op.new_field(r.field)) - exact.exact_residual(case, r.field))) <= 1e-12


def test_a_map_on_part_of_the_picture_gives_own_classes_only_where_it_reaches():
    # a conductivity map changes the equations of its region's cells and of their neighbours (the
    # harmonic-mean faces); every other cell keeps its class-coded equation
    codes = np.zeros((40, 60), dtype=np.uint8)
    codes[10:20, 10:25] = 1
    codes[0, :] = 2
    codes[-1, :] = 3
    regions = [interior("plate", 3.0), interior("insert", 1.0), fixed("top", 1.0), fixed("foot", 0.0)]
    k = _smooth_map(codes.shape, 5, 0.5, 4.0)
    case = _case(codes, regions, maps=[CoefficientMap("insert", "conductivity", "k.npy", k)])
    op = Operator(case)
    insert = codes == 1
    reach = insert.copy()
    reach[1:] |= insert[:-1]
    reach[:-1] |= insert[1:]
    reach[:, 1:] |= insert[:, :-1]
    reach[:, :-1] |= insert[:, 1:]
    assert op.physics.cells_with_own_class == int(reach.sum())
    assert np.unique(op.cls[1:-1, 1:-1][~reach & (codes == 0)]).size <= 12  # the class-coded rest
    want = exact.exact_solution(case)
    for method in ALL_METHODS:
        r = solve(case, method=method, tolerance=1e-9)
        assert np.nanmax(np.abs(r.field - want)) <= 1e-9, method
