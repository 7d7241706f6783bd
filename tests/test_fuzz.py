"""Fuzzing the command line with hypothesis: pictures, region tables, options and extreme values.

Each example writes a tiny case (PNG + TOML) and runs ``relaxtui solve`` and ``relaxtui info`` in
this process. Whatever the input:

* only the project's own errors reach the user (the CLI turns them into exit 2; anything else is
  an exception that fails the test), never a traceback;
* no warning is emitted (numpy RuntimeWarnings would reach stderr);
* a written report is valid JSON (no NaN or infinity);
* a run reported ``converged`` is within its tolerance of the exact discrete solution, computed in
  exact rational arithmetic (tests/exact_fraction.py) on these tiny grids.

Bounded for CI: derandomized (the same examples every run, so a failure is reproducible; hypothesis
prints the failing example), a fixed number of examples, no deadline.
"""

from __future__ import annotations

import json
import math
import tempfile
import warnings
from pathlib import Path

import numpy as np
from exact_fraction import exact_fraction_solution
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from PIL import Image

from relaxtui.cli import main

COLOURS = ["#ffffff", "#ff0000", "#0000ff", "#00ff00", "#000000"]
KINDS = ["interior", "fixed", "flux", "convection", "outside"]
EXTREME = [0.0, 1.0, -1.0, 2.5, -7.0, 1e-320, 5e-324, 1e-300, 1e-200, 1e-8, 1e8, 1e154, 1e160, 1e200, 1e300, 1e308,
           math.inf, -math.inf, math.nan]
KEYS = {"interior": ["conductivity", "source"], "fixed": ["value", "conductivity"], "flux": ["flux"],
        "convection": ["coefficient", "ambient"], "outside": []}

extreme = st.one_of(st.sampled_from(EXTREME), st.just(10 ** 400))  # 10**400: an integer no float holds
sane = st.floats(min_value=-100.0, max_value=100.0, allow_nan=False)
positive = st.builds(lambda e: 10.0 ** e, st.floats(min_value=-8.0, max_value=8.0))
numbers = st.one_of(extreme, sane)
oddities = st.sampled_from(["x", True, [1, 2]])


def mostly(usual, *others, weight: int = 16):
    """``usual`` about ``weight`` times as often as each of ``others`` (one_of would merge repeats)."""
    choices = ["usual"] * weight + list(range(len(others)))
    return st.sampled_from(choices).flatmap(lambda c: usual if c == "usual" else others[c])


def value_of(key):
    """Mostly what a user would write, sometimes an extreme, rarely not a number at all."""
    usual = positive if key in ("conductivity", "coefficient") else sane
    return mostly(usual, extreme, extreme, oddities)


def toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, int):
        return str(v)
    if math.isnan(v):
        return "nan"
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    return repr(float(v))


@st.composite
def cases(draw):
    n_colours = draw(st.integers(1, 4))
    rows, cols = draw(st.integers(1, 5)), draw(st.integers(1, 6))
    pixels = draw(st.lists(st.integers(0, n_colours - 1), min_size=rows * cols, max_size=rows * cols))
    if n_colours > 1 and draw(st.booleans()):
        for r in range(rows):  # a held column on the left: most such pictures are well posed
            pixels[r * cols] = 1
    regions = []
    for i in range(n_colours):
        usual = "interior" if i == 0 else ("fixed", "convection")[i % 2] if i < 3 else None
        kind = usual if usual and draw(st.integers(0, 9)) < 8 else draw(st.sampled_from(KINDS))
        keys = {k: draw(value_of(k)) for k in KEYS[kind]
                if draw(st.booleans()) or k in ("value", "flux", "coefficient", "ambient")}
        name = draw(st.sampled_from([f"r{i}", f"r{i}\x1b[2J", f"r{i} \u00e9"]))
        regions.append((name, COLOURS[i], kind, keys))
    top = {key: draw(mostly(st.just(None), positive, positive, extreme, weight=10)) for key in ("cell_size", "depth")}
    options = []
    if draw(st.booleans()):
        options += ["--method", draw(st.sampled_from(["jacobi", "gauss-seidel", "sor", "red-black-sor", "multigrid"]))]
    if draw(st.booleans()):
        options += ["--omega", draw(st.sampled_from(["auto", "1.5", "1", "1", "0", "1e-16", "0.5", "1.9"]))]
    tolerance = draw(st.sampled_from([None, None, None, "1e-3", "1e-6", "1e-6", "1e-9", "1e-9", "1e-12", "0", "1e-300"]))
    if tolerance is not None:
        options += ["--tolerance", tolerance]
    options += ["--max-sweeps", "3000"]
    nesting = draw(st.sampled_from([0] * 24 + [200, 5000]))
    return rows, cols, pixels, regions, top, options, nesting


def write(folder: Path, rows, cols, pixels, regions, top, nesting) -> Path:
    rgb = np.array([[int(c[1:3], 16), int(c[3:5], 16), int(c[5:7], 16)] for c in COLOURS], dtype=np.uint8)
    img = rgb[np.array(pixels).reshape(rows, cols)]
    Image.fromarray(img, "RGB").save(folder / "m.png")
    lines = ['title = "fuzz\\u001b]0;t\\u0007"', 'mask = "m.png"']
    for key, v in top.items():
        if v is not None:
            lines.append(f"{key} = {toml_value(v)}")
    if nesting:
        lines.append("quantity = " + "[" * nesting + "]" * nesting)
    for name, colour, kind, keys in regions:
        lines += ["[[region]]", f"name = {json.dumps(name)}", f'color = "{colour}"', f'kind = "{kind}"']
        lines += [f"{k} = {toml_value(v)}" for k, v in keys.items()]
    path = folder / "c.toml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def run(argv) -> int:
    """The CLI's exit code; argparse's own refusals (exit 2 with a usage line) count as such."""
    try:
        return main(argv)
    except SystemExit as exc:
        return int(exc.code or 0)


@settings(max_examples=200, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large, HealthCheck.function_scoped_fixture])
@given(cases())
def test_fuzzed_cases_only_fail_cleanly_and_never_lie(capsys, example):
    rows, cols, pixels, regions, top, options, nesting = example
    capsys.readouterr()  # (the fixture is shared by the examples: read it empty before each)
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        case_path = write(folder, rows, cols, pixels, regions, top, nesting)
        out, rep = folder / "f.npy", folder / "r.json"
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            code_info = run(["info", str(case_path)])
            info = capsys.readouterr()
            code = run(["solve", str(case_path), "--out", str(out), "--report", str(rep), "-q", *options])
            captured = capsys.readouterr()
        assert not [w for w in caught if not issubclass(w.category, DeprecationWarning)], [str(w.message) for w in caught]
        for c in (info, captured):
            assert "Traceback" not in c.err and "Warning" not in c.err, c.err
            assert "\x1b" not in c.out + c.err  # control characters are escaped
            assert c.err.count("\n") <= 1 or c.err.startswith("usage:"), c.err  # one line (argparse: usage + line)
        assert code_info in (0, 2)
        assert code in (0, 1, 2), captured.err
        event(f"solve exit {code}")
        if code == 2:
            assert not out.exists() and not rep.exists()  # nothing written on bad input
            assert "error:" in captured.err
            event("refused: " + captured.err.split("error:")[-1].split("(")[0].split(":")[-1][:40])
            return
        assert code_info == 0  # info accepts what solve accepts
        report = json.loads(rep.read_text(), parse_constant=lambda c: (_ for _ in ()).throw(ValueError(c)))
        event(f"status {report['status']}")
        if report["status"] == "converged":
            from relaxtui.case import load_case

            exact = exact_fraction_solution(load_case(case_path))
            field = np.load(out)
            mask = np.isfinite(exact)
            err = float(np.max(np.abs(field[mask] - exact[mask]))) if mask.any() else 0.0
            assert err <= report["tolerance"], (err, report["message"])
