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

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from cases import write_plate_case
from PIL import Image

from relaxtui.cli import main


def listing(folder: Path):
    return sorted(p.name for p in folder.iterdir())


# --- render of a field with nothing to draw ------------------------------------------------------------


@pytest.mark.parametrize("fill", ["nan", "inf", "nan-inside"])
def test_render_of_a_field_without_finite_values_is_one_line_and_writes_nothing(tmp_path, capsys, monkeypatch, fill):
    # bad input -> one line, exit 2, no file (common practice; DEVELOPERS.md's conventions)
    monkeypatch.chdir(tmp_path)
    write_plate_case(tmp_path)
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
    write_plate_case(tmp_path)
    field = np.full((8, 8), np.nan)
    field[4, 4] = 1.0
    np.save("f.npy", field)
    assert main(["render", "f.npy", "--case", "case.toml", "-o", "f.png"]) == 0
    assert Image.open("f.png").size[0] >= 8


# --- open without a terminal ---------------------------------------------------------------------------


def _relaxtui():
    exe = Path(sys.executable).with_name("relaxtui")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "relaxtui"]


@pytest.mark.parametrize("picture", ["corrupt", "good"])
def test_open_without_a_terminal_ends_with_one_line(tmp_path, picture):
    # `relaxtui open case.toml < /dev/null > out.txt` with a corrupt picture showed the error inside the
    # UI until q, which could never come: the process spun for ever. Bad input -> one line, exit 2, at
    # once (common practice); a case that loads is refused the same way, since no key can come.
    write_plate_case(tmp_path)
    if picture == "corrupt":
        data = (tmp_path / "plate.png").read_bytes()
        (tmp_path / "plate.png").write_bytes(data[: len(data) // 2])  # cut inside the image data
    with open(os.devnull, "rb") as null:
        try:
            proc = subprocess.run([*_relaxtui(), "open", "case.toml"], cwd=tmp_path, stdin=null, capture_output=True,
                                  text=True, timeout=60)
        except subprocess.TimeoutExpired:
            pytest.fail("relaxtui open without a terminal did not end")
    assert proc.returncode == 2, proc.stderr
    assert proc.stderr.count("\n") == 1 and "error:" in proc.stderr and "Traceback" not in proc.stderr, proc.stderr
    if picture == "corrupt":
        assert "plate.png" in proc.stderr and "broken PNG" in proc.stderr
    else:
        assert "not a terminal" in proc.stderr
    assert proc.stdout == ""


# --- multigrid at float64's floor with a 1e8 contrast: stalled, not diverged ------------------------------


@pytest.mark.parametrize("tolerance", [1e-10, 1e-14])
def test_multigrid_in_rounding_noise_at_a_1e8_contrast_is_stalled_not_diverged(tolerance):
    """16 x 16: fixed 0 and 100 on the left and right columns, a k = 1e8 block in the middle of k = 1.
    The condition number is about 6e9, so float64 resolves the field to about 1e-5 only; multigrid's
    updates then wander in rounding noise and rose 100-fold from their best, which the rule called
    "diverged ... grows without bound" while the field was within 2e-6 of spsolve's answer."""
    from cases import fixed, interior, make_case
    from exact import exact_solution

    from relaxtui.solver.driver import solve

    n = 16
    g = np.full((n, n), ".")
    g[n // 4 : 3 * n // 4, n // 4 : 3 * n // 4] = "k"
    g[:, 0], g[:, -1] = "L", "R"
    legend = {".": interior("low", 1.0), "k": interior("high", 1e8), "L": fixed("l", 0.0), "R": fixed("r", 100.0)}
    case = make_case(["".join(r) for r in g], legend)
    exact = exact_solution(case)  # scipy's spsolve on the independent assembly (tests/exact.py)
    mask = np.isfinite(exact)
    result = solve(case, method="multigrid", tolerance=tolerance, max_sweeps=2000)
    err = float(np.max(np.abs(result.field[mask] - exact[mask])))
    assert err < 1e-4 * 100.0  # the field is fine (spsolve)
    assert result.report["status"] == "stalled", result.report["message"]
    assert "cannot certify" in result.report["message"]
    assert result.report["estimated_error"] >= err  # the floor in the estimate covers the true error
