"""Property test of the case loader: random small pictures and region tables
either load into a consistent Case or raise a one-line CaseError, never
anything else (RULES.md "Behaviour": bad input gets a clear one-line
message, never a traceback).

When a case loads, the contract (../shared/case-format.md) is checked on it:
every pixel's region has the pixel's colour (alpha 0 = "transparent") unless
snap moved it, default names are "<kind>-<n>", and there is an interior cell.
"""

from __future__ import annotations

import json
import math
import tempfile
import unicodedata
from pathlib import Path

import numpy as np
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from PIL import Image

from relaxtui.case import load_case, picture
from relaxtui.case.model import KINDS, Case
from relaxtui.errors import CaseError

# Colours a picture may use: (r, g, b, a)
PALETTE = [(255, 255, 255, 255), (255, 0, 0, 255), (0, 0, 0, 255), (0, 0, 255, 255), (10, 200, 10, 255), (0, 0, 0, 0), (254, 1, 1, 255)]
NAMES = {(255, 255, 255, 255): "#ffffff", (255, 0, 0, 255): "#FF0000", (0, 0, 0, 255): "#000000", (0, 0, 255, 255): "#0000ff", (10, 200, 10, 255): "#0ac80a", (0, 0, 0, 0): "transparent"}

numbers = st.one_of(
    st.integers(min_value=-5, max_value=5),
    st.floats(allow_nan=True, allow_infinity=True, width=64),
    st.sampled_from([0.5, 1.0, 2.0, 1e-3, 167.0]),
)
good_positive = st.one_of(st.integers(1, 500), st.floats(1e-6, 1e6), st.sampled_from([0.5, 1.0, 167.0]))
good_number = st.one_of(st.integers(-100, 100), st.floats(-1e6, 1e6))
bad_value = st.one_of(numbers, st.booleans(), st.text(max_size=6), st.lists(st.integers(0, 3), max_size=2))
colour_text = st.one_of(st.sampled_from(sorted(set(NAMES.values())) + ["#fFfFfF", "TRANSPARENT"]), st.text(max_size=8))
kind_text = st.one_of(st.sampled_from(KINDS), st.text(max_size=8))
PARAMS = {"interior": ("conductivity", "source"), "fixed": ("value", "conductivity"), "outside": (), "flux": ("flux",), "convection": ("coefficient", "ambient")}
REQUIRED = {"fixed": ("value",), "flux": ("flux",), "convection": ("coefficient", "ambient")}
POSITIVE = ("conductivity", "coefficient")


def rarely(draw, n=12) -> bool:
    """True about once in n draws (sampled_from shrinks towards the first, False)."""
    return draw(st.sampled_from([False] * (n - 1) + [True]))


@st.composite
def region_tables(draw):
    """A region table that is usually right, sometimes wrong in one or more ways."""
    kind = draw(st.sampled_from(KINDS))
    table = {"color": draw(st.sampled_from(sorted(set(NAMES.values())) + ["#fFfFfF", "TRANSPARENT"])), "kind": kind}
    for key in PARAMS[kind]:
        if key in REQUIRED.get(kind, ()) or draw(st.booleans()):
            table[key] = draw(good_positive if key in POSITIVE else good_number)
    if draw(st.booleans()):
        table["name"] = draw(st.sampled_from(["a", "b", "interior-1", "fixed-1", "outside-2", "x y"]))
    # corruptions
    if rarely(draw):
        table["color"] = draw(colour_text)
    if rarely(draw):
        table["kind"] = draw(kind_text)
    if rarely(draw):
        table.pop(draw(st.sampled_from(sorted(table))), None)
    if rarely(draw):
        table[draw(st.sampled_from(["conductivity", "source", "value", "flux", "coefficient", "ambient", "colour", "k"]))] = draw(st.one_of(good_number, bad_value))
    if rarely(draw):
        table["name"] = draw(st.one_of(st.text(max_size=5), st.integers()))
    return table


def toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)  # close to a TOML basic string; odd cases are TOML errors
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    raise TypeError(v)


def toml_key(k: str) -> str:
    return k if k.replace("_", "").replace("-", "").isalnum() and k.isascii() else json.dumps(k)


@st.composite
def cases(draw):
    regions = draw(st.lists(region_tables(), max_size=4))
    if not rarely(draw, 3):  # usually an interior and a fixed region first, so that many cases load
        regions = [{"color": "#ffffff", "kind": "interior"}, {"color": "#ff0000", "kind": "fixed", "value": 1}] + regions
    rows = draw(st.integers(1, 6))
    cols = draw(st.integers(1, 6))
    # pixels mostly take declared colours (so that cases get as far as the domain
    # checks and loading), sometimes any colour of the palette
    declared = [i for i, c in enumerate(PALETTE) if any(isinstance(t.get("color"), str) and t["color"].lower() == NAMES.get(c, "").lower() for t in regions)]
    choices = declared if declared and not rarely(draw, 4) else list(range(len(PALETTE)))
    pixels = draw(st.lists(st.sampled_from(choices), min_size=rows * cols, max_size=rows * cols))
    top = {}
    if draw(st.booleans()):
        top["cell_size"] = draw(good_positive)
    if draw(st.booleans()):
        top["depth"] = draw(good_positive)
    if draw(st.booleans()):
        top["snap"] = draw(st.booleans())
    if rarely(draw):
        top[draw(st.sampled_from(["cell_size", "depth", "snap", "title", "unit", "mask", "solver", "extra"]))] = draw(bad_value)
    solver = {}
    if draw(st.booleans()):
        solver["method"] = draw(st.sampled_from(["sor", "jacobi", "red-black-sor", "gauss-seidel"]))
    if draw(st.booleans()):
        solver["omega"] = draw(st.one_of(st.just("auto"), st.floats(0.01, 1.99)))
    if draw(st.booleans()):
        solver["max_sweeps"] = draw(st.integers(1, 10**6))
    if rarely(draw):
        solver[draw(st.sampled_from(["method", "omega", "tolerance", "max_sweeps", "sweeps"]))] = draw(bad_value)
    garbage = draw(st.text(max_size=12)) if rarely(draw) else ""
    return rows, cols, pixels, top, solver, regions, garbage


def write(folder: Path, spec) -> Path:
    rows, cols, pixels, top, solver, regions, garbage = spec
    rgba = np.array([PALETTE[i] for i in pixels], np.uint8).reshape(rows, cols, 4)
    Image.fromarray(rgba, "RGBA").save(folder / "m.png")
    lines = ['mask = "m.png"']
    lines += [f"{toml_key(k)} = {toml_value(v)}" for k, v in top.items()]
    if solver:
        lines.append("[solver]")
        lines += [f"{toml_key(k)} = {toml_value(v)}" for k, v in solver.items()]
    for table in regions:
        lines.append("[[region]]")
        lines += [f"{toml_key(k)} = {toml_value(v)}" for k, v in table.items()]
    if garbage:
        lines.append(garbage)
    path = folder / "c.toml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def check_loaded(case: Case, spec) -> None:
    rows, cols, pixels, *_ = spec
    assert case.shape == (rows, cols)
    assert case.codes.dtype == np.uint8 and int(case.codes.max()) < len(case.regions)
    assert any(r.kind == "interior" for r in case.regions)
    wanted = [picture.parse_color(r.color) for r in case.regions]
    got = np.array([wanted[c] for c in case.codes.ravel()])
    actual = np.array([picture.parse_color(NAMES.get(PALETTE[i], "#fe0101")) for i in pixels])
    mismatched = int((got != actual).sum())
    assert mismatched == case.snapped
    if not case.snap:
        assert case.snapped == 0
    tables = spec[5]
    per_kind = {}
    for r, table in zip(case.regions, tables, strict=True):
        per_kind[r.kind] = per_kind.get(r.kind, 0) + 1
        if "name" not in table:  # the contract: "<kind>-<n>", n counting every region of the kind
            assert r.name == f"{r.kind}-{per_kind[r.kind]}"
        assert r.name.strip()
    assert len({r.name for r in case.regions}) == len(case.regions)


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(cases())
def test_random_cases_load_or_raise_case_error(spec):
    with tempfile.TemporaryDirectory() as d:
        path = write(Path(d), spec)
        try:
            case = load_case(path)
        except CaseError as exc:
            msg = str(exc)
            # one line, no control characters (spaces of category Zs such as U+202F are fine)
            assert all(ch.isprintable() or unicodedata.category(ch) == "Zs" for ch in msg), msg
            assert msg.startswith(str(path)), msg
            event("CaseError")
            return
        event("loaded")
        check_loaded(case, spec)


@settings(max_examples=60, deadline=None)
@given(st.text(max_size=200))
def test_any_text_is_a_case_error(text):
    """Arbitrary text as a case file: a CaseError (TOML syntax, missing mask, ...), never a crash."""
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "c.toml"
        path.write_text(text, encoding="utf-8")
        try:
            load_case(path)
        except CaseError as exc:
            assert "\n" not in str(exc)
        else:  # pragma: no cover - no picture exists, so nothing can load
            raise AssertionError("a case without a picture loaded")
