"""Edges found by practitioners, third round: regressions for what they hit.

* ``relaxtui render`` of a field with no finite value in the domain (all NaN, as a diverged or a
  broken run leaves it) wrote a picture of nothing and exited 0;
* ``relaxtui open`` on a case whose picture is corrupt, with no terminal (stdin and stdout not a
  TTY), did not exit;
* multigrid near float64's floor with a 1e8 conductivity contrast said ``diverged`` although its field
  was fine.

Each check names what it is checked against: the contract (docs/case-format.md), common practice
(a one-line error and a non-zero exit for bad input), or an independent answer (scipy's spsolve).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from cases import hot_cold_toml
from PIL import Image

from relaxtui.cli import main


def write_case(folder: Path) -> Path:
    """An 8 x 8 plate: top row outside, cold left column, hot right column."""
    img = np.full((8, 8, 3), 255, dtype=np.uint8)
    img[0, :] = 0
    img[1:, 0] = (0, 0, 255)
    img[1:, -1] = (255, 0, 0)
    Image.fromarray(img, "RGB").save(folder / "plate.png")
    path = folder / "case.toml"
    path.write_text(hot_cold_toml("plate.png"), encoding="utf-8")
    return path


def listing(folder: Path):
    return sorted(p.name for p in folder.iterdir())


# --- render of a field with nothing to draw ------------------------------------------------------------


@pytest.mark.parametrize("fill", ["nan", "inf", "nan-inside"])
def test_render_of_a_field_without_finite_values_is_one_line_and_writes_nothing(tmp_path, capsys, monkeypatch, fill):
    # bad input -> one line, exit 2, no file (common practice; DEVELOPERS.md's conventions)
    monkeypatch.chdir(tmp_path)
    write_case(tmp_path)
    field = np.full((8, 8), np.nan)
    if fill == "inf":
        field[1:] = np.inf  # every domain cell infinite
    elif fill == "nan-inside":
        field[0] = 5.0  # finite values only outside the domain (the top row), none inside it
    np.save("f.npy", field)
    before = listing(tmp_path)
    code = main(["render", "f.npy", "--case", "case.toml", "-o", "f.png"])
    out, err = capsys.readouterr()
    assert code == 2
    assert err.count("\n") == 1 and "finite" in err and "Traceback" not in err, err
    assert listing(tmp_path) == before  # no picture, no temporary


def test_render_of_a_field_with_one_finite_value_still_draws(tmp_path, capsys, monkeypatch):
    # the refusal is for no finite value at all: one finite cell is a picture (mid-scale colour there)
    monkeypatch.chdir(tmp_path)
    write_case(tmp_path)
    field = np.full((8, 8), np.nan)
    field[4, 4] = 1.0
    np.save("f.npy", field)
    assert main(["render", "f.npy", "--case", "case.toml", "-o", "f.png"]) == 0
    assert Image.open("f.png").size[0] >= 8
