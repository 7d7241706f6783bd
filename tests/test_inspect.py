"""``relaxtui info`` (relaxtui.commands.info): what it prints about a case.

Face counts are checked against a plain double loop over every pair of
neighbouring cells (an independent count of the contract's 4-neighbour faces,
../shared/case-format.md "The discrete equations"), and the memory line
against the byte model documented in relaxtui/memory.py.
"""

from __future__ import annotations

import io
import re
from pathlib import Path

import numpy as np
from cases import region_toml
from PIL import Image
from rich.console import Console

from relaxtui.case import build_case
from relaxtui.case.model import Region
from relaxtui.cli import main
from relaxtui.commands.info import describe, face_matrix, faces_with_interior
from relaxtui.solver import memory

REPO = Path(__file__).resolve().parents[1]


def brute_faces(codes, n):
    m = np.zeros((n, n), np.int64)
    rows, cols = codes.shape
    for r in range(rows):
        for c in range(cols):
            for dr, dc in ((0, 1), (1, 0)):
                rr, cc = r + dr, c + dc
                if rr < rows and cc < cols and codes[r, c] != codes[rr, cc]:
                    m[codes[r, c], codes[rr, cc]] += 1
                    m[codes[rr, cc], codes[r, c]] += 1
    return m


def test_face_matrix_matches_a_plain_count():
    rng = np.random.default_rng(11)
    for shape, n in [((1, 1), 1), ((1, 9), 3), ((7, 1), 2), ((13, 17), 5), ((20, 20), 12)]:
        codes = rng.integers(0, n, size=shape).astype(np.uint8)
        np.testing.assert_array_equal(face_matrix(codes, n), brute_faces(codes, n))


REGIONS = [
    Region(name="plate", color="#ffffff", kind="interior", conductivity=167.0),
    Region(name="insert", color="#c8c8c8", kind="interior", conductivity=400.0, source=5.0),
    Region(name="boss", color="#ff0000", kind="fixed", value=60.0),
    Region(name="heater", color="#0000ff", kind="flux", flux=1.5e4),
    Region(name="air", color="#00ff00", kind="convection", coefficient=12.0, ambient=25.0),
    Region(name="gap", color="transparent", kind="outside"),
    Region(name="unused", color="#123456", kind="fixed", value=0.0),
]
P, S, F, Q, C, O = range(6)
CODES = np.array(
    [
        [F, P, P, P, P, O],
        [F, P, S, S, P, C],
        [F, P, S, Q, P, C],
        [F, P, P, P, P, O],
    ],
    np.uint8,
)


def test_faces_with_interior_by_hand():
    case = build_case(CODES, REGIONS, cell_size=0.002)
    faces, border = faces_with_interior(case)
    # counted by hand from the picture above: the insert cells (1,2), (1,3)
    # and (2,2) each meet the plate on 2 sides (6 faces); the heater (2,3)
    # meets the plate on 2 sides and the insert on 2; the boss column 4; the
    # air and the gap 2 each; the unused region is not drawn.
    assert faces.tolist() == [6, 6, 4, 4, 2, 2, 0]
    # interior cells on the image border: row 0 cols 1-4, row 3 cols 1-4
    assert border == 8


def render(case, width=200):
    buf = io.StringIO()
    describe(case, Console(file=buf, width=width, color_system=None))
    return buf.getvalue()


def test_describe_contents():
    case = build_case(CODES, REGIONS, cell_size=0.002, depth=0.01, snapped=3, snap=True, title="Bracket", quantity="temperature", unit="°C")
    text = render(case)
    assert text.splitlines()[0] == "Bracket"
    assert "4 rows × 6 columns" in text
    assert re.search(r"\ncells\s+24\s*\n", text)
    assert re.search(r"unknowns\s+15 interior cells", text)
    assert "0.002 m (2 mm)" in text
    assert "0.012 m wide × 0.008 m high (12 mm × 8 mm)" in text
    assert "0.01 m (10 mm)" in text
    assert re.search(r"snapped\s+3 pixels", text)
    need = memory.format_bytes(memory.estimate_solve_bytes(4, 6, "red-black-sor", 7))
    assert f"a solve needs about {need};" in text and "available" in text

    def row(name):
        return next(line for line in text.splitlines() if f" {name} " in line)

    # name, kind, colour, cells, faces with interior cells, parameters
    assert re.search(r"plate\s+│\s+interior\s+│.*#ffffff\s+│\s+12\s+│\s+6\s+│\s+k=167", row("plate"))
    assert re.search(r"insert\s+│\s+interior\s+│.*#c8c8c8\s+│\s+3\s+│\s+6\s+│\s+k=400 s=5", row("insert"))
    assert re.search(r"boss\s+│\s+fixed\s+│.*#ff0000\s+│\s+4\s+│\s+4\s+│\s+u=60 °C", row("boss"))
    assert re.search(r"heater\s+│\s+flux\s+│.*#0000ff\s+│\s+1\s+│\s+4\s+│\s+q=15000", row("heater"))
    assert re.search(r"air\s+│\s+convection\s+│.*#00ff00\s+│\s+2\s+│\s+2\s+│\s+h=12 ambient=25 °C", row("air"))
    assert re.search(r"gap\s+│\s+outside\s+│\s+transparent\s+│\s+2\s+│\s+2\s+│", row("gap"))
    assert re.search(r"unused\s+│\s+fixed\s+│.*#123456\s+│\s+0\s+│\s+0\s+│", row("unused"))
    assert re.search(r"\(image border\)\s+│\s+outside\s+│.*│\s+8\s+│", row("(image border)"))


def test_single_interior_region_leaves_its_faces_blank():
    regions = [Region(name="body", color="#ffffff", kind="interior", conductivity=1.0), Region(name="wall", color="#000000", kind="fixed", value=0.0)]
    case = build_case(np.array([[1, 0, 0, 1]], np.uint8), regions)
    line = next(line for line in render(case).splitlines() if " body " in line)
    cells = [c.strip() for c in line.split("│")]
    assert cells[4] == "2" and cells[5] == ""


def test_info_command_on_a_case_file(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("COLUMNS", "160")
    rgb = np.array([[[255, 0, 0], [255, 255, 255], [255, 255, 255], [0, 0, 0]]] * 3, np.uint8)
    Image.fromarray(rgb).save(tmp_path / "bar.png")
    (tmp_path / "bar.toml").write_text(
        'title = "A bar"\nmask = "bar.png"\ncell_size = 0.5\n'
        + region_toml("#ffffff", "interior") + region_toml("#ff0000", "fixed", value=1) + region_toml("#000000", "outside"),
        encoding="utf-8",
    )
    assert main(["info", str(tmp_path / "bar.toml")]) == 0
    out, err = capsys.readouterr()
    assert err == ""
    assert out.startswith("A bar\n")
    assert "3 rows × 4 columns" in out and re.search(r"unknowns\s+6 interior cells", out)
    assert "interior-1" in out and "fixed-1" in out and "outside-1" in out
    assert "2 m wide × 1.5 m high" in out


def test_info_on_the_demos(capsys, monkeypatch):
    monkeypatch.setenv("COLUMNS", "160")
    for name, grid in [("heat-spreader", "152 rows × 480 columns"), ("electrodes", "300 rows × 400 columns"), ("composite", "240 rows × 330 columns")]:
        assert main(["info", str(REPO / "grids" / f"{name}.toml")]) == 0
        out = capsys.readouterr().out
        assert grid in out, name
