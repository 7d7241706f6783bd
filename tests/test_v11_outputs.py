"""Case format v1.1 everywhere: `relaxtui info`, the bundle, VTK cell data, the flux field."""

from __future__ import annotations

import textwrap

import numpy as np
import pytest
from PIL import Image

from cases import region_toml
from relaxtui.case import load_case
from relaxtui.cli import main


def _case(tmp_path, geometry=None):
    a = np.full((10, 12, 3), 255, np.uint8)
    a[:, 6:] = (0, 255, 0)
    a[0] = (0, 0, 255)
    a[-1] = (255, 0, 0)
    Image.fromarray(a).save(tmp_path / "m.png")
    k = np.full((10, 12), 3.0)
    k[:, 6:] = np.linspace(1.0, 2.0, 6)
    np.save(tmp_path / "k.npy", k)
    text = f"""\
    mask = "m.png"
    cell_size = 0.01
    {'geometry = "' + geometry + '"' if geometry else ''}
    {{regions}}
    [[contact]]
    between = ["laminate", "filler"]
    resistance = 0.002
    [[probe]]
    name = "centre"
    x = 0.06
    y = 0.05
    """
    regions = (region_toml("#ffffff", "interior", "laminate", conductivity=[8.0, 0.5])
               + region_toml("#00ff00", "interior", "filler", conductivity_map="k.npy")
               + region_toml("#0000ff", "fixed", "cold", value=0.0) + region_toml("#ff0000", "fixed", "hot", value=5.0))
    p = tmp_path / "c.toml"
    p.write_text(textwrap.dedent(text).replace("{regions}\n", regions))
    return p


def test_info_shows_contacts_orthotropy_maps_probes_and_geometry(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("COLUMNS", "200")
    assert main(["info", str(_case(tmp_path))]) == 0
    out = capsys.readouterr().out
    assert "kx=8 ky=0.5 (orthotropic)" in out
    # contact faces: the laminate | filler interface is one column of 8 interior rows
    assert "laminate | filler" in out and " 8" in out.split("laminate | filler")[1].splitlines()[0]
    assert "k from k.npy" in out and "1 .. 2" in out
    assert "centre" in out and "0.06 m" in out
    assert "planar" in out
    assert main(["info", str(_case(tmp_path, "axisymmetric"))]) == 0
    assert "axisymmetric" in capsys.readouterr().out


def test_bundle_and_vtk_carry_probes_and_coefficients(tmp_path, capsys):
    case = _case(tmp_path)
    code = main(["solve", str(case), "--bundle", str(tmp_path / "b.npz"), "--vtk", str(tmp_path / "f.vti"), "-q",
                 "--tolerance", "1e-8"])
    assert code == 0
    b = np.load(tmp_path / "b.npz", allow_pickle=False)
    assert list(b["probe_names"]) == ["centre"]
    assert b["probe_xy"].tolist() == [[0.06, 0.05]]
    assert b["probe_history"].shape[1] == 3 and b["probe_history"].shape[0] >= 1
    kx, ky = b["conductivity"][..., 0], b["conductivity"][..., 1]
    assert kx[5, 2] == 8.0 and ky[5, 2] == 0.5
    assert kx[5, 8] == ky[5, 8] == pytest.approx(np.linspace(1.0, 2.0, 6)[2])
    assert np.isnan(kx[0, 0])  # a fixed cell
    text = (tmp_path / "f.vti").read_bytes()
    assert b'Name="conductivity" NumberOfComponents="2"' in text and b'Name="source"' in text


def test_flux_uses_the_direction_conductivity(tmp_path):
    # Fourier's law with an orthotropic tensor diag(kx, ky): q = (-kx du/dx, -ky du/dy) (Carslaw & Jaeger §1.18, from memory)
    from relaxtui.output.flux import flux

    case = load_case(_case(tmp_path))
    rows, cols = case.shape
    jj, ii = np.meshgrid(np.arange(cols), np.arange(rows))
    field = 2.0 * (jj + 0.5) * 0.01 + 3.0 * (rows - ii - 0.5) * 0.01  # du/dx = 2, du/dy = 3
    qx, qy = flux(field, case)
    assert qx[5, 2] == pytest.approx(-8.0 * 2.0) and qy[5, 2] == pytest.approx(-0.5 * 3.0)


REPO = __import__("pathlib").Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("name", ["power-module", "well-drawdown"])
def test_v11_demos_load_use_their_features_and_are_redrawn_identically(tmp_path, name):
    import sys

    case = load_case(REPO / "grids" / f"{name}.toml")
    assert case.snapped == 0 and (case.region_counts() > 0).all()
    assert case.per_face_physics and len(case.probes) >= 3
    if name == "power-module":
        assert len(case.contacts) == 3 and any(r.conductivity_y is not None for r in case.regions)
    else:
        assert case.geometry == "axisymmetric"
    sys.path.insert(0, str(REPO / "grids"))
    try:
        import make_demos
    finally:
        sys.path.remove(str(REPO / "grids"))
    make_demos.main([name, "--out", str(tmp_path)])
    (tmp_path / f"{name}.toml").write_text((REPO / "grids" / f"{name}.toml").read_text(encoding="utf-8"), encoding="utf-8")
    np.testing.assert_array_equal(load_case(tmp_path / f"{name}.toml").codes, case.codes)


def test_well_demo_balances_and_its_heads_fall_towards_the_well():
    # the maximum principle (references.md §12, common practice): heads lie between the held 42 and 50 m,
    # and fall monotonically towards the well along the piezometer line
    from relaxtui.solver.driver import solve

    r = solve(load_case(REPO / "grids" / "well-drawdown.toml"))
    assert r.report["status"] == "converged" and r.report["imbalance"] < 1e-5
    p = r.report["probes"]
    assert 42.0 < p["P10"] < p["P50"] < p["P150"] < 50.0
    assert r.report["flows"]["screen"] < 0  # the well takes water out
