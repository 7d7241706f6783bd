"""Clauses of the case-format contract (case-format.md) and of the published check values
(references.md) that the other test files leave unchecked.

Each check names its outside source beside it: a closed form, a handbook value, the independent
scipy assembly of tests/exact.py, or "common practice". Cases are small (at most about two thousand
unknowns) and use only float64 kernels the rest of the suite compiles anyway.
"""

from __future__ import annotations

import csv
import json
import math

import numpy as np
import pytest
from cases import convection, feature_case, fixed, flux, interior, make_case, outside, region_toml
from exact import assemble, exact_flows, exact_residual, exact_solution
from PIL import Image

from relaxtui.case import load_case
from relaxtui.cli import main
from relaxtui.solver.assembled import Operator
from relaxtui.solver.driver import solve


# --- faces that carry nothing: fixed-fixed, flux and convection next to fixed cells --------------


def test_flux_and_convection_act_only_on_interior_faces_and_fixed_fixed_faces_carry_nothing():
    """Contract, "Region kinds" and "The discrete equations": flux and convection faces count only
    between an interior cell and the region; faces between two fixed cells are not part of the
    solve; a fixed cell that touches no interior cell still bounds `min`/`max`."""
    k, h, d, rows = 2.5, 0.2, 3.0, 3
    t_far, t_m, t_l = 50.0, 10.0, -4.0
    # c convection and f flux touch only fixed cells; H touches only M (fixed) and c
    art = ["cHM...Lf"] * rows
    legend = {".": interior("bar", k), "H": fixed("far", t_far), "M": fixed("m", t_m), "L": fixed("l", t_l),
              "c": convection("air", 7.0, 1000.0), "f": flux("heater", 1e3)}
    case = make_case(art, legend, cell_size=h, depth=d)
    result = solve(case, method="red-black-sor", omega="auto", tolerance=1e-10)
    report = result.report
    assert report["status"] == "converged"
    # 1-D Dirichlet problem between the centres of M and L, 4 h apart: a linear profile and
    # Fourier's law q'' = k dT / L, i.e. a flow d * rows * h * k (T_m - T_l) / (4 h) (common practice)
    want = t_m + (t_l - t_m) * np.arange(1, 4) / 4.0
    for r in range(rows):
        np.testing.assert_allclose(result.field[r, 3:6], want, rtol=0, atol=1e-10)
    q = d * rows * k * (t_m - t_l) / 4.0
    assert report["flows"]["m"] == pytest.approx(q, rel=1e-11)
    assert report["flows"]["l"] == pytest.approx(-q, rel=1e-11)
    for name in ("far", "air", "heater"):  # no face with an interior cell: exactly nothing
        assert report["flows"][name] == 0.0
    assert set(report["flows"]) == {"far", "m", "l", "air", "heater"}  # no entry for interior regions
    assert np.isnan(result.field[:, 0]).all() and np.isnan(result.field[:, 7]).all()  # convection, flux: NaN
    assert (result.field[:, 1] == t_far).all()  # a fixed cell holds its value even away from the unknowns
    assert report["max"] == t_far and report["min"] == t_l  # over interior and fixed cells (contract, report keys)
    assert report["unknowns"] == 3 * rows and report["grid"] == [rows, 8]


def test_imbalance_is_zero_when_nothing_flows():
    """Contract, "Flows and balance": the imbalance is 0 when the sum of |flows| and |source total|
    is 0 (not NaN). The field is 5 everywhere, so every flow is exactly 0."""
    art = ["AAAAA", "A...A", "A...B", "AAAAA"]
    case = make_case(art, {".": interior("p", 3.0), "A": fixed("a", 5.0), "B": fixed("b", 5.0)})
    op = Operator(case)
    u = op.new_field(np.full(case.shape, 5.0))
    flows, source_total, imbalance = op.flows(u)
    assert flows == {"a": 0.0, "b": 0.0} and source_total == 0.0
    assert imbalance == 0.0


# --- references.md §14: the balance of an unconverged field is its residual ---------------------


def test_imbalance_of_any_field_is_bounded_by_its_residual():
    """references.md §14 (common practice): summed over the interior cells, the interior-interior
    terms cancel, so sum of flows + source total = d * sum_P D_P r_P with D_P the cell's diagonal
    (sum of its conductances) and r_P its residual; hence |sum| <= d * max|r| * sum_P D_P. Checked on a
    field five sweeps from the start, with the scipy assembly of tests/exact.py as the reference."""
    case = feature_case(True)  # two materials, a source, flux, convection, cell 0.5, depth 2
    result = solve(case, method="gauss-seidel", tolerance=1e-12, max_sweeps=5)
    report = result.report
    assert report["status"] == "sweep-limit" and report["sweeps"] == 5
    field = result.field
    matrix, b, index = assemble(case)
    x = field[index >= 0][np.argsort(index[index >= 0])]
    d = case.depth
    total = sum(report["flows"].values()) + report["source_total"]
    assert total == pytest.approx(d * float(np.sum(b - matrix @ x)), rel=1e-9)
    r = exact_residual(case, field)
    assert report["residual"] == pytest.approx(float(np.nanmax(np.abs(r))), rel=1e-9)  # "largest cell residual"
    assert abs(total) <= d * report["residual"] * float(matrix.diagonal().sum())
    assert abs(total) > 1e-6  # five sweeps leave a real imbalance: the bound is not met trivially
    flows, source_total, imbalance = exact_flows(case, field)
    assert report["imbalance"] == pytest.approx(imbalance, rel=1e-9)
    for name, value in flows.items():
        assert report["flows"][name] == pytest.approx(value, rel=1e-9, abs=1e-12)


# --- references.md §8: torsion constants of rectangles ------------------------------------------


def torsion_series(a, b, terms=200):
    # J = (a b³/3) [1 − (192 b / (π⁵ a)) Σ_{n odd} tanh(nπa/(2b)) / n⁵] for ∇²u = −2 on an a × b
    # rectangle (a ≥ b), u = 0 on the edges (Timoshenko & Goodier, torsion of rectangular bars)
    s = sum(math.tanh(n * math.pi * a / (2 * b)) / n**5 for n in range(1, 2 * terms, 2))
    return a * b**3 / 3 * (1 - 192 * b / (math.pi**5 * a) * s)


@pytest.mark.parametrize("ratio, beta", [(1.0, 0.141), (1.5, 0.196), (2.0, 0.229), (3.0, 0.263), (5.0, 0.291),
                                         (10.0, 0.312)])
def test_torsion_table_is_the_series(ratio, beta):
    # Timoshenko & Goodier's table of β in J = β a b³, given to three decimals: the series agrees to
    # within half a unit of the last digit (0.1406 is printed as 0.141)
    assert torsion_series(ratio, 1.0) / ratio == pytest.approx(beta, abs=5e-4)


def test_torsion_table_tends_to_one_third():
    # β → 1/3 as a/b → ∞ (Timoshenko & Goodier); from the series itself the deficit is
    # (64/π⁵)(b/a) Σ_{n odd} 1/n⁵ ≈ 0.2091 · 1.0045 · b/a ≈ 0.210 b/a, so at a/b = 1e4 β is within 3e-5 of 1/3
    assert torsion_series(1e4, 1.0) / 1e4 == pytest.approx(1.0 / 3.0, abs=3e-5)


def bar_case(nb, na, source=2.0, hot=0.0):
    """An na x nb block of interior cells in a one-cell fixed frame (corners outside), cell size
    1/(nb + 1), so the rectangle measured centre to centre of the frame is (na + 1)/(nb + 1) x 1; the
    top side of the frame is held at ``hot``, the other three at 0."""
    art = ["x" + "H" * na + "x"] + ["C" + "." * na + "C" for _ in range(nb)] + ["x" + "C" * na + "x"]
    legend = {".": interior("bar", 1.0, source=source), "C": fixed("edge", 0.0), "H": fixed("top", hot), "x": outside()}
    return make_case(art, legend, cell_size=1.0 / (nb + 1))


def torsion_constant(nb):
    case = bar_case(nb, 2 * nb + 1)
    result = solve(case, method="red-black-sor", omega="auto", tolerance=1e-12)
    assert result.report["status"] == "converged"
    h = case.cell_size
    inside = case.kind_codes()[case.codes] == 0
    # source 2 with k = 1 is ∇²u = −2 (contract: k ∇²u + s = 0); J = 2 ∫ u dA (Prandtl's analogy)
    return 2.0 * float(np.sum(result.field[inside])) * h * h, result


def test_torsion_constant_of_a_two_to_one_bar_is_second_order():
    """references.md §8 at a/b = 2 (β = 0.229): the cell-centred scheme is second order, so halving
    the cell size cuts the error by 4 and Richardson's extrapolation (4 J_h/2 − J_h)/3 meets the series
    far closer than either (measured 3e-5 relative at these sizes)."""
    exact = torsion_series(2.0, 1.0)
    j1, _ = torsion_constant(11)
    j2, result = torsion_constant(23)
    e1, e2 = j1 - exact, j2 - exact
    assert e1 / e2 == pytest.approx(4.0, rel=0.05)
    assert (4.0 * j2 - j1) / 3.0 == pytest.approx(exact, rel=2e-4)
    # the source total: s h² per interior cell times the depth (1), all of it leaving through the frame
    # (its top side is a region of its own, also at 0)
    report = result.report
    assert report["source_total"] == pytest.approx(2.0 * 23 * 47 / 24**2, rel=1e-12)
    assert report["flows"]["edge"] + report["flows"]["top"] == pytest.approx(-report["source_total"], rel=1e-9)


def test_rectangle_with_one_hot_side_two_to_one():
    # references.md §2: u(x,y) = (4 T1/π) Σ_{n odd} sin(nπx/a) sinh(nπy/a) / (n sinh(nπb/a)) for a = 2 b
    # (separation of variables, Incropera & DeWitt §4.2); second order, (πh)²/12 ≈ 8e-4 relative at h = 1/32
    nb = 31
    case = bar_case(nb, 2 * nb + 1, source=0.0, hot=100.0)
    result = solve(case, method="red-black-sor", omega="auto", tolerance=1e-9)
    h = case.cell_size
    a, b = 2.0, 1.0
    for row, col in ((8, 16), (16, 32), (24, 48), (16, 10)):
        x, y = col * h, b - row * h  # frame centres at x = 0, y = 0 (bottom) and y = b (top)

        def ratio(n):  # sinh(nπy/a) / sinh(nπb/a) without overflow
            return math.exp(n * math.pi * (y - b) / a) * (1 - math.exp(-2 * n * math.pi * y / a)) / (
                1 - math.exp(-2 * n * math.pi * b / a))

        series = 400.0 / math.pi * sum(math.sin(n * math.pi * x / a) * ratio(n) / n for n in range(1, 600, 2))
        assert result.field[row, col] == pytest.approx(series, rel=2e-3)


# --- the command line: status values, exit codes and what is written ---------------------------


def strict_json(text):
    def refuse(token):
        raise ValueError(f"not JSON: {token}")
    return json.loads(text, parse_constant=refuse)  # NaN and Infinity are not JSON (RFC 8259)


@pytest.fixture
def small_case(tmp_path):
    img = np.full((6, 9, 3), 255, dtype=np.uint8)
    img[0, :] = (255, 0, 0)
    img[-1, :] = (0, 0, 255)
    Image.fromarray(img, "RGB").save(tmp_path / "p.png")
    text = 'mask = "p.png"\ncell_size = 0.5\n' + "".join([
        region_toml("#ffffff", "interior", "plate", conductivity=2.0),
        region_toml("#ff0000", "fixed", "hot", value=1.0),
        region_toml("#0000ff", "fixed", "cold", value=0.0),
    ])
    (tmp_path / "p.toml").write_text(text, encoding="utf-8")
    return tmp_path / "p.toml"


def run_solve(case, tmp_path, capsys, *extra):
    out, rep, hist = tmp_path / "f.npy", tmp_path / "r.json", tmp_path / "h.csv"
    code = main(["solve", str(case), "--out", str(out), "--report", str(rep), "--history", str(hist), "-q", *extra])
    _, err = capsys.readouterr()
    assert "Traceback" not in err
    written = out.exists() and rep.exists() and hist.exists()
    report = strict_json(rep.read_text(encoding="utf-8")) if rep.exists() else None
    rows = list(csv.reader(hist.open(newline=""))) if hist.exists() else None
    return code, report, rows, written


def test_a_diverging_run_says_diverged_writes_everything_and_exits_1(small_case, tmp_path, capsys):
    # weighted Jacobi's factor is max |1 − w (1 − λ)| (references.md §11, Saad ch. 4): with w = 1.95 and
    # Jacobi eigenvalues down to −ρ, it exceeds 1, so the run must diverge; contract: status diverged,
    # all three outputs written; exit 1 (README: ran but did not converge)
    code, report, rows, written = run_solve(small_case, tmp_path, capsys, "--method", "jacobi", "--omega", "1.95",
                                            "--max-sweeps", "5000")
    assert written and code == 1
    assert report["status"] == "diverged"
    assert report["estimated_error"] is None or report["estimated_error"] > report["tolerance"]
    assert rows[0] == ["sweep", "seconds", "residual", "estimated_error"] and int(rows[-1][0]) == report["sweeps"]
    assert report["sweeps"] < 5000


def test_a_tolerance_below_float64_is_stalled_with_an_honest_reason(small_case, tmp_path, capsys):
    # contract, "Residual and error": converged is a promise; a tolerance of 1e-20 on values of order 1
    # is below float64's resolution (ε ≈ 2.2e-16, common practice), so the run ends stalled (exit 1) and
    # its reason names float64; this system is well conditioned, so the reason must not call it near-singular
    code, report, rows, written = run_solve(small_case, tmp_path, capsys, "--tolerance", "1e-20")
    assert written and code == 1
    assert report["status"] == "stalled"
    assert "float64" in report["message"] and "near-singular" not in report["message"]
    field = np.load(tmp_path / "f.npy")
    exact = exact_solution(load_case(small_case))  # the scipy assembly of tests/exact.py
    assert np.nanmax(np.abs(field - exact)) <= report["estimated_error"]  # the bound it reports still holds


def test_status_and_exit_code_of_each_kind_of_end(small_case, tmp_path, capsys):
    # contract, report keys: status is one of converged, stalled, diverged, sweep-limit, time-limit,
    # cancelled; README: exit 0 converged, 1 ran but did not converge
    code, report, _, written = run_solve(small_case, tmp_path, capsys)
    assert (code, report["status"], written) == (0, "converged", True)
    code, report, _, written = run_solve(small_case, tmp_path, capsys, "--max-sweeps", "2")
    assert (code, report["status"], report["sweeps"], written) == (1, "sweep-limit", 2, True)
    assert report["estimated_error"] is None or report["estimated_error"] > report["tolerance"]


# --- references.md §9: the automatic omega on the model problem ---------------------------------


def test_auto_omega_of_the_model_problem_is_youngs_optimum():
    # references.md §9: an N x N block in a one-cell fixed frame is the 5-point Dirichlet Laplacian with
    # h = 1/(N+1), ρ_J = cos(πh) and ω_opt = 2/(1 + sin(πh)) (Young 1971); the report's "auto" omega
    # comes from a Lanczos estimate of ρ_J, measured 1.3e-9 from ω_opt at N = 31
    from cases import model_problem

    n = 31
    report = solve(model_problem(n, hot=1.0), method="red-black-sor", omega="auto", tolerance=1e-8).report
    assert report["status"] == "converged"
    assert report["omega"] == pytest.approx(2.0 / (1.0 + math.sin(math.pi / (n + 1))), abs=1e-6)


# --- v1.1 (docs/case-format.md, "Coefficient maps"): both maps of a region as .png -------------------


def test_two_png_maps_of_one_region_take_their_ranges_as_arrays(tmp_path):
    # docs/case-format.md: value = map_min + (map_max − map_min) · p / 65535 for grey level p; with both maps
    # .png, map_min and map_max are [for conductivity_map, for source_map] (checked with plain numpy here)
    from relaxtui.errors import CaseError

    rows, cols = 4, 5
    img = np.full((rows, cols, 3), 255, dtype=np.uint8)
    img[-1, :] = (0, 0, 255)
    Image.fromarray(img, "RGB").save(tmp_path / "m.png")
    rng = np.random.default_rng(3)
    k_grey = rng.integers(0, 65536, (rows, cols)).astype(np.uint16)
    s_grey = rng.integers(0, 65536, (rows, cols)).astype(np.uint16)
    Image.fromarray(k_grey).save(tmp_path / "k.png")
    Image.fromarray(s_grey).save(tmp_path / "s.png")
    body = ('mask = "m.png"\n' + region_toml("#ffffff", "interior", "slab") +
            'conductivity_map = "k.png"\nsource_map = "s.png"\nmap_min = [0.5, -2.0]\nmap_max = [4.0, 6.0]\n' +
            region_toml("#0000ff", "fixed", "sink", value=1.0))
    (tmp_path / "c.toml").write_text(body, encoding="utf-8")
    maps = {m.key: m.values for m in load_case(tmp_path / "c.toml").maps}
    np.testing.assert_allclose(maps["conductivity"], 0.5 + 3.5 * k_grey / 65535.0, rtol=0, atol=1e-12)
    np.testing.assert_allclose(maps["source"], -2.0 + 8.0 * s_grey / 65535.0, rtol=0, atol=1e-12)
    # one number for two .png maps is refused at its line
    (tmp_path / "c.toml").write_text(body.replace("map_min = [0.5, -2.0]", "map_min = 0.5"), encoding="utf-8")
    with pytest.raises(CaseError, match=r"c\.toml:\d+: .*'map_min'"):
        load_case(tmp_path / "c.toml")


def test_an_ill_posed_case_writes_nothing_and_names_the_group(tmp_path, capsys, monkeypatch):
    # contract: a group of interior cells touching no fixed or convection face is an error naming its size and
    # one of its cells; "only bad input writes nothing" (exit 2, one line, no traceback: README)
    img = np.full((4, 6, 3), 255, dtype=np.uint8)
    img[:, 0] = (0, 0, 255)  # a flux column: it does not anchor the field
    Image.fromarray(img, "RGB").save(tmp_path / "q.png")
    (tmp_path / "q.toml").write_text('mask = "q.png"\n' + region_toml("#ffffff", "interior", "plate")
                                     + region_toml("#0000ff", "flux", "heater", flux=2.0), encoding="utf-8")
    work = tmp_path / "run"
    work.mkdir()
    monkeypatch.chdir(work)
    code = main(["solve", str(tmp_path / "q.toml")])
    out, err = capsys.readouterr()
    assert code == 2 and out == "" and list(work.iterdir()) == []
    assert err.count("\n") == 1 and "Traceback" not in err
    assert "q.toml" in err and "20 interior cells" in err and "row 0, column 1" in err


def test_the_picture_border_acts_like_outside():
    # contract, "Region kinds": the image border behaves like `outside`; so a picture and the same picture
    # framed by outside cells have the same equations: same field, same flows (checked against the
    # scipy assembly of tests/exact.py too)
    art = ["..~~....",
           "........",
           "..H...b.",
           "....bbb.",
           "^^......"]
    legend = {".": interior("plate", 2.0, source=0.5), "b": interior("insert", 0.3), "H": fixed("pin", 3.0),
              "~": convection("air", 4.0, -1.0), "^": flux("heater", 0.7), "x": outside("frame")}
    bare = make_case(art, legend, cell_size=0.1, depth=2.0)
    framed = make_case(["x" * 10] + ["x" + row + "x" for row in art] + ["x" * 10], legend, cell_size=0.1, depth=2.0)
    a = solve(bare, method="red-black-sor", omega="auto", tolerance=1e-11)
    b = solve(framed, method="red-black-sor", omega="auto", tolerance=1e-11)
    assert a.report["status"] == b.report["status"] == "converged"
    np.testing.assert_allclose(a.field, b.field[1:-1, 1:-1], rtol=0, atol=1e-10)
    np.testing.assert_allclose(a.field, exact_solution(bare), rtol=0, atol=1e-10)
    for name in ("pin", "air", "heater"):
        assert a.report["flows"][name] == pytest.approx(b.report["flows"][name], rel=1e-8, abs=1e-12)
    assert b.report["flows"].keys() == a.report["flows"].keys()  # outside regions carry no flow entry


def test_report_geometry_depth_probes_and_precision_keys(small_case, tmp_path, capsys):
    # docs/case-format.md, v1.1: the report's `geometry` says which geometry was solved, its `depth` is null
    # for an axisymmetric case, `probes` is {} without probes, `precision` says what the run used
    code, report, _, _ = run_solve(small_case, tmp_path, capsys)
    assert code == 0
    assert (report["geometry"], report["depth"], report["probes"], report["precision"]) == ("planar", 1.0, {}, "double")
    text = small_case.read_text(encoding="utf-8")
    axi = tmp_path / "axi.toml"
    # a probe at x = 2 m, y = 1.5 m: between the centres of columns 3 and 4 and of rows 2 and 3 (6 rows, h = 0.5)
    axi.write_text('geometry = "axisymmetric"\n' + text + '[[probe]]\nname = "mid"\nx = 2.0\ny = 1.5\n', encoding="utf-8")
    code, report, _, _ = run_solve(axi, tmp_path, capsys)
    assert code == 0
    assert (report["geometry"], report["depth"]) == ("axisymmetric", None)
    field = np.load(tmp_path / "f.npy")
    # bilinear between the four centres around the point (docs/case-format.md, "Probes"): column x/h − 1/2 = 3.5,
    # row rows − y/h − 1/2 = 2.5, so the mean of rows 2-3 and columns 3-4 (plain numpy)
    assert report["probes"]["mid"] == pytest.approx(float(field[2:4, 3:5].mean()), rel=1e-12)
    # flows are totals around the axis and still balance (no source): hot in, cold out
    assert report["flows"]["hot"] == pytest.approx(-report["flows"]["cold"], rel=1e-6)
