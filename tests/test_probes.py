"""Probes (case format v1.1): bilinear values, the report's `probes`, the `--probes` CSV."""

from __future__ import annotations

import csv
import textwrap
from dataclasses import replace

import numpy as np
import pytest
from PIL import Image

from cases import fixed, interior, outside, region_toml
from relaxtui.case.loader import build_case
from relaxtui.case.physics import Probe
from relaxtui.cli import main
from relaxtui.output.probes import ProbeSet, probe_points


def _case(codes, regions, probes, h=0.5):
    regions = [replace(r, color=f"#0000{i:02x}") for i, r in enumerate(regions)]
    return build_case(np.asarray(codes, np.uint8), regions, cell_size=h, probes=probes)


def test_bilinear_probe_reproduces_a_linear_field():
    # bilinear interpolation is exact on fields linear in x and y (common practice)
    rows, cols, h = 6, 9, 0.5
    codes = np.zeros((rows, cols), np.uint8)
    codes[0, 0] = 1  # one fixed cell anchors the case (the probe reads fixed cells too)
    probes = [Probe("a", 1.3, 2.1), Probe("b", 0.25, 0.25), Probe("c", 4.4, 2.99), Probe("d", 2.25, 1.75)]
    case = _case(codes, [interior("p"), fixed("f", 0.0)], probes, h)
    jj, ii = np.meshgrid(np.arange(cols), np.arange(rows))
    x, y = (jj + 0.5) * h, (rows - ii - 0.5) * h
    field = 3.0 + 2.0 * x - 5.0 * y
    got = ProbeSet(case).as_dict(field)
    for p in probes:
        inside_centres = 0.5 * h <= p.x <= (cols - 0.5) * h and 0.5 * h <= p.y <= (rows - 0.5) * h
        if inside_centres:
            assert got[p.name] == pytest.approx(3.0 + 2.0 * p.x - 5.0 * p.y, abs=1e-12)
    # a point within half a cell of the picture's edge takes the nearest centres' values (clamped)
    assert got["b"] == pytest.approx(field[-1, 0])
    assert probe_points(case)[3] == ("d", pytest.approx(2.0), pytest.approx(4.0))  # (row, col) of a cell centre


def test_probe_next_to_a_hole_uses_only_domain_cells():
    codes = np.zeros((4, 4), np.uint8)
    codes[:, 2:] = 2  # outside
    codes[0, 0] = 1
    field = np.where(codes < 2, 7.0, np.nan)
    case = _case(codes, [interior("p"), fixed("f", 0.0), outside()], [Probe("edge", 0.9, 1.0)])
    assert ProbeSet(case).as_dict(field)["edge"] == 7.0


def _plate(tmp_path, probes=True):
    a = np.full((12, 16, 3), 255, np.uint8)
    a[0] = (0, 0, 255)
    a[-1] = (255, 0, 0)
    Image.fromarray(a).save(tmp_path / "m.png")
    text = ('mask = "m.png"\ncell_size = 0.01\n' + region_toml("#ffffff", "interior", "plate")
            + region_toml("#0000ff", "fixed", "cold", value=0.0) + region_toml("#ff0000", "fixed", "hot", value=11.0))
    if probes:
        text += '[[probe]]\nname = "middle"\nx = 0.08\ny = 0.06\n[[probe]]\nname = "near hot"\nx = 0.08\ny = 0.015\n'
    p = tmp_path / "c.toml"
    p.write_text(textwrap.dedent(text))
    return p


def test_solve_reports_probes_and_writes_the_probe_csv(tmp_path, capsys):
    case = _plate(tmp_path)
    code = main(["solve", str(case), "--report", str(tmp_path / "r.json"), "--probes", str(tmp_path / "p.csv"),
                 "--tolerance", "1e-9", "-q"])
    assert code == 0
    import json

    report = json.loads((tmp_path / "r.json").read_text())
    # 1-D field between centres 11 rows apart: u = 11 (y - y_cold) / (y_hot - y_cold), linear (common practice)
    y_hot, y_cold = 0.005, 0.115
    for name, y in (("middle", 0.06), ("near hot", 0.015)):
        assert report["probes"][name] == pytest.approx(11.0 * (y_cold - y) / (y_cold - y_hot), abs=1e-8)
    rows = list(csv.reader((tmp_path / "p.csv").open()))
    assert rows[0] == ["sweep", "seconds", "middle", "near hot"]
    assert len(rows) >= 2
    sweeps = [int(r[0]) for r in rows[1:]]
    assert sweeps == sorted(sweeps) and sweeps[-1] == report["sweeps"]
    assert float(rows[-1][2]) == pytest.approx(report["probes"]["middle"], abs=1e-12)


def test_probes_option_without_probes_is_refused_before_work(tmp_path, capsys):
    case = _plate(tmp_path, probes=False)
    code = main(["solve", str(case), "--report", str(tmp_path / "r.json"), "--probes", str(tmp_path / "p.csv"), "-q"])
    assert code == 2
    assert "declares no [[probe]]" in capsys.readouterr().err
    assert not (tmp_path / "r.json").exists() and not (tmp_path / "p.csv").exists()
