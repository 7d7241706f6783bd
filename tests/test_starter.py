"""``relaxtui init`` (relaxtui.commands.init): a starter case for a picture never seen.

Checked against the contract (../shared/case-format.md): the written file is
TOML the loader reads once the kinds are chosen, and before that the loader
refuses it with "region N: missing key 'kind'" at the region's line.
"""

from __future__ import annotations

import os
import re
import tomllib

import numpy as np
import pytest
from PIL import Image

from relaxtui.case import load_case
from relaxtui.cli import main
from relaxtui.errors import CaseError

# A plate (most pixels), a hot strip, a cold spot, and a transparent surround.
PLATE, HOT, COLD = (200, 210, 220, 255), (250, 40, 40, 255), (20, 40, 250, 255)
CLEAR = (0, 0, 0, 0)


def draw(path):
    a = np.zeros((12, 16, 4), np.uint8)
    a[:] = CLEAR
    a[1:11, 1:15] = PLATE
    a[1:11, 1] = HOT
    a[5:7, 10:12] = COLD
    Image.fromarray(a, "RGBA").save(path)
    return a


def fill_kinds(text: str, choices: dict[str, str]) -> str:
    """Replace each commented kind line with the choice for that region's colour."""
    out, colour = [], None
    for line in text.splitlines():
        m = re.match(r'color = "(.*)"', line)
        if m:
            colour = m.group(1)
        if line.startswith("# kind = ?"):
            line = choices[colour]
        out.append(line)
    return "\n".join(out) + "\n"


def test_init_writes_a_starter_that_loads_after_the_kinds_are_chosen(tmp_path, capsys):
    draw(tmp_path / "plate.png")
    assert main(["init", str(tmp_path / "plate.png")]) == 0
    target = tmp_path / "plate.toml"
    assert target.exists()
    out = capsys.readouterr().out
    assert "wrote" in out and "3 regions" not in out and "4 regions; choose a kind for 2 of them" in out
    text = target.read_text(encoding="utf-8")
    doc = tomllib.loads(text)  # valid TOML as written
    assert doc["mask"] == "plate.png"
    assert [r["color"] for r in doc["region"]] == ["#c8d2dc", "transparent", "#fa2828", "#1428fa"]  # largest first
    assert doc["region"][0]["kind"] == "interior" and doc["region"][1]["kind"] == "outside"
    assert "kind" not in doc["region"][2] and "kind" not in doc["region"][3]
    # pixel counts in comments, largest first
    counts = [int(n) for n in re.findall(r"^# (\d+) pixels", text, flags=re.M)]
    assert counts == [14 * 10 - 10 - 4, 12 * 16 - 14 * 10, 10, 4]
    for word in ("cell_size", "depth", "unit", "snap"):
        assert re.search(rf"^#.*\b{word}\b", text, flags=re.M), word  # explained in a comment
    # before the kinds are chosen the loader names the first undecided region and its line
    header_lines = [i for i, line in enumerate(text.splitlines(), 1) if line == "[[region]]"]
    with pytest.raises(CaseError, match=rf"^{re.escape(str(target))}:{header_lines[2]}: region 3: missing key 'kind'"):
        load_case(target)
    assert main(["info", str(target)]) == 2
    capsys.readouterr()
    target.write_text(fill_kinds(text, {"#fa2828": 'kind = "fixed"\nvalue = 80.0', "#1428fa": 'kind = "convection"\ncoefficient = 10\nambient = 20'}), encoding="utf-8")
    case = load_case(target)
    assert [r.kind for r in case.regions] == ["interior", "outside", "fixed", "convection"]
    assert case.region_counts().tolist() == counts
    assert case.solver.method == "red-black-sor" and case.solver.omega == "auto"


def test_init_refuses_to_overwrite_without_force(tmp_path, capsys):
    draw(tmp_path / "p.png")
    (tmp_path / "p.toml").write_text("keep me\n")
    assert main(["init", str(tmp_path / "p.png")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "already exists; use --force" in err and "Traceback" not in err
    assert (tmp_path / "p.toml").read_text() == "keep me\n"
    assert main(["init", str(tmp_path / "p.png"), "--force"]) == 0
    assert (tmp_path / "p.toml").read_text().startswith("# relaxtui case file")


def test_init_output_elsewhere_points_back_at_the_picture(tmp_path, capsys):
    (tmp_path / "pics").mkdir()
    (tmp_path / "cases").mkdir()
    draw(tmp_path / "pics" / "p.png")
    assert main(["init", str(tmp_path / "pics" / "p.png"), "-o", str(tmp_path / "cases" / "study.toml")]) == 0
    doc = tomllib.loads((tmp_path / "cases" / "study.toml").read_text(encoding="utf-8"))
    assert doc["mask"] == "../pics/p.png"


def test_init_bad_inputs_write_nothing(tmp_path, capsys):
    (tmp_path / "x.png").write_text("not a picture")
    assert main(["init", str(tmp_path / "x.png")]) == 2
    assert main(["init", str(tmp_path / "missing.png")]) == 2
    draw(tmp_path / "ok.png")
    assert main(["init", str(tmp_path / "ok.png"), "-o", str(tmp_path / "no-such-folder" / "c.toml")]) == 2
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 3 and all(e.startswith("relaxtui init: error: ") for e in err)
    assert sorted(os.listdir(tmp_path)) == ["ok.png", "x.png"]


def test_init_on_an_anti_aliased_drawing_turns_snap_on(tmp_path, capsys):
    # A disc drawn with a soft edge: many blends of two colours.
    y, x = np.mgrid[0:64, 0:64]
    r = np.hypot(y - 31.5, x - 31.5)
    t = 1.0 - np.clip((r - 18.0) / 6.0, 0.0, 1.0)  # 1 inside, 0 outside, a 6-pixel blend between
    rgb = np.stack([255 * t, 128 * t, 255 * (1 - t)], -1).round().astype(np.uint8)
    rgb[30:34, 0:2] = (0, 0, 0)  # a fixed spot on the left edge
    Image.fromarray(rgb).save(tmp_path / "disc.png")
    assert main(["init", str(tmp_path / "disc.png")]) == 0
    text = (tmp_path / "disc.toml").read_text(encoding="utf-8")
    doc = tomllib.loads(text)
    assert doc["snap"] is True
    colours = [r["color"] for r in doc["region"]]
    assert colours[:2] == ["#0000ff", "#ff8000"]
    filled = fill_kinds(text, {c: 'kind = "fixed"\nvalue = 1' for c in colours})
    (tmp_path / "disc.toml").write_text(filled, encoding="utf-8")
    case = load_case(tmp_path / "disc.toml")
    assert case.snapped > 0
    assert case.snapped == 64 * 64 - int(sum(int(n) for n in re.findall(r"^# (\d+) pixels", text, flags=re.M)))
