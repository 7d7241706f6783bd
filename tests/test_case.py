"""The case loader (relaxtui.case): the contract, ../shared/case-format.md.

Every bad input the contract names ("Unknown keys, a missing required key, a
wrong type, a duplicate colour or name, a value out of range") must give a
one-line CaseError naming the file, the key and the line, and exit status 2
from the command line with nothing written (RULES.md "Behaviour").
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from relaxtui.case import build_case, load_case, picture
from relaxtui.case import domain as domain_module
from relaxtui.case import loader as case_module
from relaxtui.case.loader import KeyLines
from relaxtui.case.model import Region, SolverDefaults
from relaxtui.cli import main
from relaxtui.errors import CaseError
from relaxtui.solver import memory

REPO = Path(__file__).resolve().parents[1]

W, R, K, B = (255, 255, 255), (255, 0, 0), (0, 0, 0), (0, 0, 255)
# R fixed column on the left, W interior, B one flux cell, K outside column on the right
PICTURE = np.array([[R, W, W, W, W, K]] * 4, np.uint8)
PICTURE[2, 2] = B
REGIONS = """
[[region]]
color = "#ffffff"
kind = "interior"

[[region]]
color = "#ff0000"
kind = "fixed"
value = 1

[[region]]
color = "#000000"
kind = "outside"

[[region]]
color = "#0000ff"
kind = "flux"
flux = 2
"""


def write_case(folder: Path, body: str, rgb=PICTURE, name: str = "case", mask: bool = True) -> Path:
    Image.fromarray(np.asarray(rgb, np.uint8)).save(folder / f"{name}.png")
    text = (f'mask = "{name}.png"\n' if mask else "") + textwrap.dedent(body).lstrip("\n")
    path = folder / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    return path


def marked_line(path: Path) -> int | None:
    """1-based line holding the marker comment '# <-', if any."""
    for no, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
        if "# <-" in line:
            return no
    return None


# ---------------------------------------------------------------------------
# Good cases


def test_good_case_loads_with_defaults(tmp_path):
    path = write_case(tmp_path, REGIONS)
    case = load_case(path)
    assert case.shape == (4, 6)
    assert case.codes.dtype == np.uint8 and case.codes.flags.c_contiguous
    expected = np.array([[1, 0, 0, 0, 0, 2]] * 4)
    expected[2, 2] = 3
    np.testing.assert_array_equal(case.codes, expected)
    # defaults (the contract): cell_size and depth 1.0, conductivity 1.0, source 0.0,
    # snap false, names "<kind>-<n>"
    assert case.cell_size == 1.0 and case.depth == 1.0 and case.snap is False and case.snapped == 0
    assert [r.name for r in case.regions] == ["interior-1", "fixed-1", "outside-1", "flux-1"]
    interior, fixed, outside, flux = case.regions
    assert interior.conductivity == 1.0 and interior.source == 0.0
    assert fixed.value == 1.0 and isinstance(fixed.value, float) and fixed.conductivity is None
    assert flux.flux == 2.0
    assert case.title is None and case.quantity == "field" and case.unit == ""
    assert case.solver == SolverDefaults()
    assert [r.line for r in case.regions] == [2, 6, 11, 15]
    assert case.mask_path == tmp_path / "case.png"
    assert case.path == path


def test_every_key_is_read(tmp_path):
    body = """
    title = "A plate"
    quantity = "temperature"
    unit = "°C"
    cell_size = 2            # an integer where a number is expected
    depth = 0.003
    snap = false

    [solver]
    method = "sor"
    omega = 1                # an integer in (0, 2)
    tolerance = 1e-4
    max_sweeps = 500

    [[region]]
    name = "plate"
    color = "#FFFFFF"        # upper case: compared case-insensitively
    kind = "interior"
    conductivity = 167
    source = -3.5

    [[region]]
    name = "boss"
    color = "#ff0000"
    kind = "fixed"
    value = 60
    conductivity = 40.0

    [[region]]
    color = "#000000"
    kind = "convection"
    coefficient = 12
    ambient = 25

    [[region]]
    color = "#0000ff"
    kind = "flux"
    flux = -1.5e4
    """
    case = load_case(write_case(tmp_path, body))
    assert case.title == "A plate" and case.quantity == "temperature" and case.unit == "°C"
    assert case.cell_size == 2.0 and case.depth == 0.003
    assert case.solver == SolverDefaults(method="sor", omega=1.0, tolerance=1e-4, max_sweeps=500)
    plate, boss, conv, flux = case.regions
    assert (plate.name, plate.color, plate.conductivity, plate.source) == ("plate", "#ffffff", 167.0, -3.5)
    assert (boss.value, boss.conductivity) == (60.0, 40.0)
    assert (conv.name, conv.coefficient, conv.ambient) == ("convection-1", 12.0, 25.0)
    assert (flux.name, flux.flux) == ("flux-1", -1.5e4)
    assert case.solver.omega == 1.0 and isinstance(case.solver.omega, float)


def test_default_names_count_every_region_of_the_kind(tmp_path):
    # The contract: "n counting every region of that kind in declaration order" -
    # a named region still takes a number.
    body = REGIONS + """
    [[region]]
    name = "cold"
    color = "#00ff00"
    kind = "fixed"
    value = 0

    [[region]]
    color = "#00ffff"
    kind = "fixed"
    value = 3
    """
    case = load_case(write_case(tmp_path, body))
    assert [r.name for r in case.regions][-2:] == ["cold", "fixed-3"]


def test_omega_auto_and_transparent_any_case(tmp_path):
    rgba = np.concatenate([PICTURE, np.full(PICTURE.shape[:2] + (1,), 255, np.uint8)], axis=2)
    rgba[:, 5, 3] = 0  # the right column is transparent
    body = '[solver]\nomega = "auto"\n' + REGIONS.replace('color = "#000000"', 'color = "Transparent"')
    case = load_case(write_case(tmp_path, body, rgb=rgba))
    assert case.solver.omega == "auto"
    assert case.regions[2].color == "transparent"
    assert (case.codes[:, 5] == 2).all()


def test_mask_is_relative_to_the_case_file(tmp_path, monkeypatch):
    (tmp_path / "pics").mkdir()
    Image.fromarray(PICTURE).save(tmp_path / "pics" / "m.png")
    (tmp_path / "c.toml").write_text('mask = "pics/m.png"\n' + REGIONS)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    case = load_case(tmp_path / "c.toml")
    assert case.mask_path == tmp_path / "pics" / "m.png"
    monkeypatch.chdir(tmp_path)
    assert load_case("c.toml").shape == (4, 6)


def test_regions_absent_from_the_picture_are_fine(tmp_path):
    body = REGIONS + """
    [[region]]
    color = "#123456"
    kind = "convection"
    coefficient = 5
    ambient = 0
    """
    case = load_case(write_case(tmp_path, body))
    assert case.region_counts()[-1] == 0


def test_snap_counts_and_sets_codes(tmp_path):
    rgb = PICTURE.copy()
    rgb[0, 3] = (250, 250, 250)  # an anti-aliased white
    rgb[3, 0] = (240, 10, 10)  # an anti-aliased red
    case = load_case(write_case(tmp_path, "snap = true\n" + REGIONS, rgb=rgb))
    assert case.snap is True and case.snapped == 2
    assert case.codes[0, 3] == 0 and case.codes[3, 0] == 1


def test_255_regions_load_and_256_do_not(tmp_path):
    def body(n):
        parts = ['[[region]]\ncolor = "#ffffff"\nkind = "interior"\n', '[[region]]\ncolor = "#ff0000"\nkind = "fixed"\nvalue = 1\n',
                 '[[region]]\ncolor = "#000000"\nkind = "outside"\n', '[[region]]\ncolor = "#0000ff"\nkind = "flux"\nflux = 2\n']
        for i in range(n - 4):
            parts.append(f'[[region]]\ncolor = "#01{i // 256:02x}{i % 256:02x}"\nkind = "outside"\n')
        return "\n".join(parts)

    case = load_case(write_case(tmp_path, body(255)))
    assert len(case.regions) == 255
    path = write_case(tmp_path, body(256))
    with pytest.raises(CaseError, match="256 regions declared; at most 255 are supported"):
        load_case(path)


def test_key_lines_survive_multiline_strings_and_quoted_keys():
    text = textwrap.dedent(
        '''\
        title = """a title
        [[region]]
        kind = "not a key"
        """
        "mask" = "m.png"
        [ solver ]   # spaced header
        method = "sor"

        [[ region ]]
        'color' = "#ffffff"
          kind = "interior"
        '''
    )
    lines = KeyLines(text)
    assert lines.top_line("title") == 1
    assert lines.top_line("mask") == 5
    assert lines.table_line("solver") == 6 and lines.table_line("solver", "method") == 7
    assert len(lines.regions) == 1
    assert lines.region_line(0) == 9
    assert lines.region_line(0, "color") == 10 and lines.region_line(0, "kind") == 11


# ---------------------------------------------------------------------------
# Bad cases: (id, TOML body after the mask line, fragment of the message).
# The line the message must name carries the marker comment "# <-";
# without a marker the message names no line.

BAD = [
    ("unknown-top-key", 'colour_depth = 8  # <-\n' + REGIONS, "unknown key 'colour_depth'"),
    ("unknown-top-key-suggest", 'cellsize = 1  # <-\n' + REGIONS, "(did you mean 'cell_size'?)"),
    ("unknown-region-key", REGIONS.replace('kind = "interior"', 'kind = "interior"\ncondutivity = 2  # <-'), "region 1: unknown key 'condutivity' (did you mean 'conductivity'?)"),
    ("key-wrong-kind", REGIONS.replace('kind = "outside"', 'kind = "outside"\nvalue = 3  # <-'), "region 3: key 'value' does not apply to kind 'outside'"),
    ("interior-takes-no-value", REGIONS.replace('kind = "interior"', 'kind = "interior"\nvalue = 3  # <-'), "key 'value' does not apply to kind 'interior'"),
    ("fixed-takes-no-source", REGIONS.replace("value = 1", "value = 1\nsource = 3  # <-"), "key 'source' does not apply to kind 'fixed'"),
    ("missing-kind", REGIONS.replace('[[region]]\ncolor = "#000000"\nkind = "outside"', '[[region]]  # <-\ncolor = "#000000"'), "region 3: missing key 'kind'"),
    ("missing-color", REGIONS.replace('[[region]]\ncolor = "#000000"', '[[region]]  # <-'), "region 3: missing key 'color'"),
    ("missing-value", REGIONS.replace('[[region]]\ncolor = "#ff0000"', '[[region]]  # <-\ncolor = "#ff0000"').replace("value = 1\n", ""), "region 2: missing key 'value'"),
    ("missing-flux", REGIONS.replace('[[region]]\ncolor = "#0000ff"', '[[region]]  # <-\ncolor = "#0000ff"').replace("flux = 2\n", ""), "region 4: missing key 'flux'"),
    ("missing-coefficient", REGIONS + '[[region]]  # <-\ncolor = "#00ff00"\nkind = "convection"\nambient = 1\n', "region 5: missing key 'coefficient'"),
    ("missing-ambient", REGIONS + '[[region]]  # <-\ncolor = "#00ff00"\nkind = "convection"\ncoefficient = 1\n', "region 5: missing key 'ambient'"),
    ("bad-kind", REGIONS.replace('kind = "outside"', 'kind = "outsde"  # <-'), "key 'kind' must be one of interior, fixed, outside, flux, convection; got 'outsde' (did you mean 'outside'?)"),
    ("kind-not-string", REGIONS.replace('kind = "outside"', "kind = 3  # <-"), "key 'kind' must be a string, not an integer"),
    ("bad-color-word", REGIONS.replace('color = "#000000"', 'color = "black"  # <-'), "key 'color' must be \"#rrggbb\""),
    ("bad-color-short", REGIONS.replace('color = "#000000"', 'color = "#000"  # <-'), "key 'color' must be \"#rrggbb\""),
    ("bad-color-hex", REGIONS.replace('color = "#000000"', 'color = "#00000g"  # <-'), "key 'color' must be \"#rrggbb\""),
    ("color-not-string", REGIONS.replace('color = "#000000"', "color = 0x000000  # <-"), "key 'color' must be a string, not an integer"),
    ("conductivity-string", REGIONS.replace('kind = "interior"', 'kind = "interior"\nconductivity = "2"  # <-'), "key 'conductivity' must be a number, not a string"),
    ("conductivity-bool", REGIONS.replace('kind = "interior"', 'kind = "interior"\nconductivity = true  # <-'), "key 'conductivity' must be a number, not a boolean"),
    ("value-array", REGIONS.replace("value = 1", "value = [1]  # <-"), "key 'value' must be a number, not an array"),
    ("value-table", REGIONS.replace("value = 1", "value = { v = 1 }  # <-"), "key 'value' must be a number, not a table"),
    ("value-date", REGIONS.replace("value = 1", "value = 2024-01-01  # <-"), "key 'value' must be a number, not a date/time"),
    ("value-nan", REGIONS.replace("value = 1", "value = nan  # <-"), "key 'value' must be a finite number"),
    ("flux-inf", REGIONS.replace("flux = 2", "flux = inf  # <-"), "key 'flux' must be a finite number"),
    ("conductivity-zero", REGIONS.replace('kind = "interior"', 'kind = "interior"\nconductivity = 0  # <-'), "key 'conductivity' must be > 0, got 0"),
    ("conductivity-negative", REGIONS.replace('kind = "interior"', 'kind = "interior"\nconductivity = -1.5  # <-'), "key 'conductivity' must be > 0, got -1.5"),
    ("fixed-conductivity-zero", REGIONS.replace("value = 1", "value = 1\nconductivity = 0.0  # <-"), "key 'conductivity' must be > 0"),
    ("coefficient-zero", REGIONS + '[[region]]\ncolor = "#00ff00"\nkind = "convection"\ncoefficient = 0  # <-\nambient = 1\n', "key 'coefficient' must be > 0, got 0"),
    ("name-not-string", REGIONS.replace('kind = "outside"', 'kind = "outside"\nname = 5  # <-'), "key 'name' must be a string, not an integer"),
    ("name-empty", REGIONS.replace('kind = "outside"', 'kind = "outside"\nname = "  "  # <-'), "key 'name' must not be empty"),
    ("duplicate-colour", REGIONS + '[[region]]\ncolor = "#FF0000"  # <-\nkind = "outside"\n', "region 5: key 'color': #ff0000 is already the colour of region 2 (line 7)"),
    ("duplicate-transparent", REGIONS + '[[region]]\ncolor = "transparent"\nkind = "outside"\n[[region]]\ncolor = "TRANSPARENT"  # <-\nkind = "outside"\n', "is already the colour of region 5"),
    ("duplicate-name", REGIONS.replace('kind = "interior"', 'kind = "interior"\nname = "a"').replace('kind = "outside"', 'kind = "outside"\nname = "a"  # <-'), "region 3: key 'name': 'a' is already the name of region 1 (line 5)"),
    ("default-name-clash-later", REGIONS.replace('kind = "interior"', 'kind = "interior"\nname = "outside-1"').replace('[[region]]\ncolor = "#000000"', '[[region]]  # <-\ncolor = "#000000"'), "region 3: its default name 'outside-1' clashes with the key 'name' of region 1"),
    ("default-name-clash-earlier", REGIONS + '[[region]]\ncolor = "#00ff00"\nkind = "outside"\nname = "outside-1"  # <-\n', "region 5: key 'name': 'outside-1' clashes with the default name of region 3"),
    ("cell-size-zero", "cell_size = 0  # <-\n" + REGIONS, "key 'cell_size' must be > 0, got 0"),
    ("cell-size-negative", "cell_size = -0.5  # <-\n" + REGIONS, "key 'cell_size' must be > 0"),
    ("cell-size-string", 'cell_size = "1mm"  # <-\n' + REGIONS, "key 'cell_size' must be a number, not a string"),
    ("depth-zero", "depth = 0.0  # <-\n" + REGIONS, "key 'depth' must be > 0"),
    ("depth-bool", "depth = true  # <-\n" + REGIONS, "key 'depth' must be a number, not a boolean"),
    ("snap-int", "snap = 1  # <-\n" + REGIONS, "key 'snap' must be true or false, not an integer"),
    ("title-number", "title = 3  # <-\n" + REGIONS, "key 'title' must be a string"),
    ("unit-bool", "unit = false  # <-\n" + REGIONS, "key 'unit' must be a string"),
    ("quantity-array", 'quantity = ["t"]  # <-\n' + REGIONS, "key 'quantity' must be a string"),
    ("solver-not-table", "solver = 3  # <-\n" + REGIONS, "key 'solver' must be a table"),
    ("solver-unknown", '[solver]\nmetod = "sor"  # <-\n' + REGIONS, "[solver]: unknown key 'metod' (did you mean 'method'?)"),
    ("method-unknown", '[solver]\nmethod = "newton"  # <-\n' + REGIONS, "[solver]: key 'method' must be one of jacobi, gauss-seidel, sor, red-black-sor"),
    ("method-number", "[solver]\nmethod = 1  # <-\n" + REGIONS, "[solver]: key 'method' must be a string"),
    ("omega-two", "[solver]\nomega = 2.0  # <-\n" + REGIONS, "[solver]: key 'omega' must lie in (0, 2)"),
    ("omega-zero", "[solver]\nomega = 0  # <-\n" + REGIONS, "[solver]: key 'omega' must lie in (0, 2)"),
    ("omega-word", '[solver]\nomega = "fast"  # <-\n' + REGIONS, "[solver]: key 'omega' must be a number in (0, 2) or \"auto\""),
    ("omega-bool", "[solver]\nomega = true  # <-\n" + REGIONS, "[solver]: key 'omega' must be a number, not a boolean"),
    ("tolerance-zero", "[solver]\ntolerance = 0  # <-\n" + REGIONS, "[solver]: key 'tolerance' must be > 0"),
    ("tolerance-negative", "[solver]\ntolerance = -1e-3  # <-\n" + REGIONS, "[solver]: key 'tolerance' must be > 0"),
    ("max-sweeps-zero", "[solver]\nmax_sweeps = 0  # <-\n" + REGIONS, "[solver]: key 'max_sweeps' must be at least 1"),
    ("max-sweeps-float", "[solver]\nmax_sweeps = 1e5  # <-\n" + REGIONS, "[solver]: key 'max_sweeps' must be a whole number, not a float"),
    ("max-sweeps-bool", "[solver]\nmax_sweeps = true  # <-\n" + REGIONS, "[solver]: key 'max_sweeps' must be a whole number, not a boolean"),
    ("region-not-array", '[region]  # <-\ncolor = "#ffffff"\nkind = "interior"\n', "key 'region' must be an array of tables"),
    ("region-empty", "region = []  # <-\n", "no regions"),
    ("no-regions", 'title = "x"\n', "no [[region]] tables"),
    ("toml-syntax", "cell_size = = 1  # <-\n" + REGIONS, "not valid TOML"),
    ("toml-duplicate-key", "depth = 1\ndepth = 2  # <-\n" + REGIONS, "not valid TOML"),
    ("toml-unclosed-string", 'title = "abc  # <-\n' + REGIONS, "not valid TOML"),
]


@pytest.mark.parametrize("name, body, fragment", BAD, ids=[b[0] for b in BAD])
def test_bad_case_message_and_exit_code(tmp_path, capsys, name, body, fragment):
    path = write_case(tmp_path, body)
    line = marked_line(path)
    with pytest.raises(CaseError) as err:
        load_case(path)
    msg = str(err.value)
    assert "\n" not in msg
    prefix = f"{path}:{line}: " if line else f"{path}: "
    assert msg.startswith(prefix), msg
    assert fragment in msg, msg
    before = sorted(os.listdir(tmp_path))
    assert main(["info", str(path)]) == 2
    out, errtext = capsys.readouterr()
    assert out == ""
    assert errtext.count("\n") == 1 and errtext.startswith("relaxtui info: error: "), errtext
    assert "Traceback" not in errtext
    assert fragment in errtext
    assert sorted(os.listdir(tmp_path)) == before


def test_missing_mask_key(tmp_path):
    path = write_case(tmp_path, REGIONS, mask=False)
    with pytest.raises(CaseError, match=r"missing key 'mask'") as err:
        load_case(path)
    assert str(err.value).startswith(f"{path}: ")


def test_mask_wrong_type(tmp_path):
    path = write_case(tmp_path, REGIONS, mask=False)
    path.write_text("mask = 3\n" + REGIONS)
    with pytest.raises(CaseError, match=rf"^{path}:1: key 'mask' must be a string"):
        load_case(path)


PICTURE_PROBLEMS = [
    ("missing", lambda p: p.unlink(), "picture not found"),
    ("not-png", lambda p: p.write_text("hello"), "not a PNG picture"),
    ("jpeg", lambda p: Image.new("RGB", (4, 4)).save(p, format="JPEG"), "not a PNG picture"),
    ("folder", lambda p: (p.unlink(), p.mkdir()), "is a folder"),
    ("truncated", lambda p: p.write_bytes(p.read_bytes()[:40]), "broken PNG picture"),
]


@pytest.mark.parametrize("name, spoil, fragment", PICTURE_PROBLEMS, ids=[p[0] for p in PICTURE_PROBLEMS])
def test_picture_problems(tmp_path, capsys, name, spoil, fragment):
    path = write_case(tmp_path, REGIONS)
    spoil(tmp_path / "case.png")
    with pytest.raises(CaseError) as err:
        load_case(path)
    msg = str(err.value)
    # names the case file, the 'mask' key's line and the picture
    assert msg.startswith(f"{path}:1: mask 'case.png'"), msg
    assert fragment in msg and "\n" not in msg
    assert main(["info", str(path)]) == 2
    _, errtext = capsys.readouterr()
    assert errtext.count("\n") == 1 and "Traceback" not in errtext


def test_unmatched_colour_through_the_loader(tmp_path, capsys):
    rgb = PICTURE.copy()
    rgb[3, 4] = (1, 2, 3)
    path = write_case(tmp_path, REGIONS, rgb=rgb)
    with pytest.raises(CaseError) as err:
        load_case(path)
    msg = str(err.value)
    assert msg.startswith(f"{path}:1: mask 'case.png': 1 colour matches no region")
    assert "#010203 in 1 pixels (first at row 3, column 4)" in msg
    assert main(["info", str(path)]) == 2


def test_case_file_not_found_and_not_utf8(tmp_path, capsys):
    with pytest.raises(CaseError, match="case file not found"):
        load_case(tmp_path / "none.toml")
    assert main(["info", str(tmp_path / "none.toml")]) == 2
    capsys.readouterr()
    p = tmp_path / "latin.toml"
    p.write_bytes(b'mask = "x.png"\ntitle = "caf\xe9"\n')
    with pytest.raises(CaseError, match=rf"^{p}:2: not valid TOML: the file is not UTF-8 text"):
        load_case(p)


def test_toml_syntax_error_names_line_and_column(tmp_path):
    path = write_case(tmp_path, "depth = 1\ncell_size = = 1\n" + REGIONS)
    with pytest.raises(CaseError) as err:
        load_case(path)
    assert str(err.value).startswith(f"{path}:3: not valid TOML: ")
    assert "(column " in str(err.value)


def test_byte_order_mark_is_accepted(tmp_path):
    path = write_case(tmp_path, REGIONS)
    path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes())
    assert load_case(path).shape == (4, 6)


def test_a_real_subprocess_reports_one_line_and_exit_2(tmp_path):
    path = write_case(tmp_path, REGIONS.replace('kind = "outside"', 'kind = "outside"\nflux = 3'))
    env = dict(os.environ)
    proc = subprocess.run(
        [sys.executable, "-m", "relaxtui", "info", str(path)],
        capture_output=True, text=True, cwd=tmp_path, env=env, timeout=120,
    )
    assert proc.returncode == 2
    assert proc.stdout == ""
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr
    assert f"{path}:14: region 3: key 'flux' does not apply to kind 'outside'" in proc.stderr


# ---------------------------------------------------------------------------
# The domain: interior cells, and every group of them anchored


def _domain_case(tmp_path, rows):
    """Build a case from a small ASCII picture: I interior, J second interior,
    F fixed, C convection, Q flux, O outside."""
    colours = {"I": (255, 255, 255), "J": (200, 200, 200), "F": (255, 0, 0), "C": (0, 255, 0), "Q": (0, 0, 255), "O": (0, 0, 0)}
    rgb = np.array([[colours[ch] for ch in row] for row in rows], np.uint8)
    body = """
    [[region]]
    color = "#ffffff"
    kind = "interior"
    [[region]]
    color = "#c8c8c8"
    kind = "interior"
    conductivity = 3
    [[region]]
    color = "#ff0000"
    kind = "fixed"
    value = 1
    [[region]]
    color = "#00ff00"
    kind = "convection"
    coefficient = 2
    ambient = 0
    [[region]]
    color = "#0000ff"
    kind = "flux"
    flux = 1
    [[region]]
    color = "#000000"
    kind = "outside"
    """
    return write_case(tmp_path, body, rgb=rgb)


def test_no_interior_cells(tmp_path):
    path = _domain_case(tmp_path, ["FFO", "OOC"])
    with pytest.raises(CaseError, match=rf"^{path}: no interior cells"):
        load_case(path)


def test_floating_group_is_named_with_size_and_cell(tmp_path, capsys, labelling):
    path = _domain_case(
        tmp_path,
        [
            "FIIOOOO",
            "FIIOIIO",
            "OOOOIJO",
            "OOOOOOO",
        ],
    )
    with pytest.raises(CaseError) as err:
        load_case(path)
    msg = str(err.value)
    # the island {(1,4), (1,5), (2,4), (2,5)} of two interior regions is one group
    assert "a group of 4 interior cells (one of them at row 1, column 4) touches no fixed or convection cell" in msg
    assert main(["info", str(path)]) == 2


def test_more_floating_groups_are_counted(tmp_path, labelling):
    path = _domain_case(tmp_path, ["FIOIOIO", "OOOOOOO", "IOOOOOI"])
    with pytest.raises(CaseError, match=r"a group of 1 interior cells \(one of them at row 0, column 3\).*; 3 more such groups"):
        load_case(path)


def test_flux_does_not_anchor_but_convection_does(tmp_path, labelling):
    path = _domain_case(tmp_path, ["QIIO", "OIIO"])
    with pytest.raises(CaseError, match="a group of 4 interior cells"):
        load_case(path)
    assert load_case(_domain_case(tmp_path, ["QIIC", "OIIO"])).shape == (2, 4)


def test_diagonal_contact_does_not_anchor(tmp_path, labelling):
    # 4-connectivity (the contract): the interior cell at (1,1) only meets the fixed cell at a corner
    path = _domain_case(tmp_path, ["FOO", "OIO", "OOO"])
    with pytest.raises(CaseError, match="a group of 1 interior cells"):
        load_case(path)


def test_image_border_does_not_anchor(tmp_path, labelling):
    path = _domain_case(tmp_path, ["IIO", "IIO"])
    with pytest.raises(CaseError, match="touches no fixed or convection cell"):
        load_case(path)


def test_fixed_cells_inside_the_domain_are_fine(tmp_path, labelling):
    case = load_case(_domain_case(tmp_path, ["IIIII", "IIFII", "IIIII"]))
    assert int(case.region_counts()[0]) == 14


@pytest.fixture(params=["run-graph", "kernel"])
def labelling(request, monkeypatch):
    """Run a domain test through both labelling paths of the solvability check."""
    if request.param == "kernel":
        monkeypatch.setattr(domain_module, "RUN_GRAPH_LIMIT", 0)
    return request.param


def _group_image(interior):
    starts, ends, group = domain_module.label_groups(interior)
    h, w = interior.shape
    out = np.zeros(h * (w + 2), np.int64)
    for s, e, g in zip(starts, ends, group):
        out[s:e] = g + 1
    return out.reshape(h, w + 2)[:, 1:-1]


def test_run_graph_labelling_agrees_with_scipy():
    # Independent reference: scipy.ndimage.label (default 2-D structure = the
    # 4-neighbour cross); both number groups in raster order of their first cell.
    from scipy import ndimage

    rng = np.random.default_rng(3)
    for shape, p in [((1, 1), 1.0), ((1, 17), 0.6), ((23, 1), 0.6), ((31, 29), 0.45), ((40, 64), 0.6), ((64, 40), 0.7), ((50, 50), 0.9)]:
        mask = rng.random(shape) < p
        if not mask.any():
            continue
        np.testing.assert_array_equal(_group_image(mask), ndimage.label(mask)[0], err_msg=str(shape))
    comb = np.zeros((7, 9), bool)  # teeth joined only at the bottom: merged late in raster order
    comb[:, ::2] = True
    comb[-1, :] = True
    np.testing.assert_array_equal(_group_image(comb), ndimage.label(comb)[0])


def test_label4_agrees_with_scipy():
    # Independent reference: scipy.ndimage.label, whose default structuring
    # element in 2-D is the 4-neighbour cross; both number groups in raster order.
    from relaxtui.kernels.labels import label4
    from scipy import ndimage

    rng = np.random.default_rng(5)
    for shape, p in [((1, 1), 0.5), ((1, 17), 0.6), ((23, 1), 0.6), ((31, 29), 0.45), ((40, 64), 0.6), ((64, 40), 0.7)]:
        mask = rng.random(shape) < p
        labels, count = label4(mask)
        ref, ref_count = ndimage.label(mask)
        assert count == ref_count
        np.testing.assert_array_equal(labels, ref)
    spiral = np.zeros((9, 9), bool)  # one long winding group: union-find must merge it all
    spiral[0, :] = spiral[:, 8] = spiral[8, :] = spiral[2:, 0] = spiral[2, :7] = spiral[2:7, 6] = spiral[6, 2:7] = True
    labels, count = label4(spiral)
    assert count == ndimage.label(spiral)[1] == 1


# ---------------------------------------------------------------------------
# build_case


def _regions():
    return [
        Region(name="body", color="#ffffff", kind="interior", conductivity=2.0),
        Region(name="wall", color="#ff0000", kind="fixed", value=0.0),
        Region(name="void", color="#000000", kind="outside"),
    ]


def test_build_case_from_an_int_array():
    codes = np.array([[1, 0, 0, 2], [1, 0, 0, 2]], dtype=np.int64)
    case = build_case(codes, _regions(), cell_size=0.5)
    assert case.codes.dtype == np.uint8 and case.cell_size == 0.5
    assert case.mask_path == Path("<array>") and case.path is None
    np.testing.assert_array_equal(case.codes, codes)


@pytest.mark.parametrize(
    "codes, regions, kwargs, fragment",
    [
        (np.array([[1, 0, 3]]), None, {}, "codes must lie in 0..2"),
        (np.array([[1, 0, -1]]), None, {}, "codes must lie in 0..2"),
        (np.array([[1.0, 0.0]]), None, {}, "codes must be integers"),
        (np.array([1, 0]), None, {}, "non-empty 2-D array"),
        (np.array([[2, 2]]), None, {}, "no interior cells"),
        (np.array([[0, 2, 1]]), None, {}, "a group of 1 interior cells"),
        (np.array([[1, 0]]), None, {"cell_size": 0.0}, "cell_size must be a finite number > 0"),
        (np.array([[1, 0]]), None, {"depth": float("nan")}, "depth must be a finite number > 0"),
        (np.array([[1, 0]]), [Region(name="a", color="#ffffff", kind="interior", conductivity=-1.0), Region(name="b", color="#ff0000", kind="fixed", value=0.0)], {}, "'conductivity' must be > 0"),
        (np.array([[1, 0]]), [Region(name="a", color="#ffffff", kind="interior", conductivity=1.0), Region(name="a", color="#ff0000", kind="fixed", value=0.0)], {}, "name 'a' is already the name of region 1"),
        (np.array([[1, 0]]), [Region(name="a", color="#ffffff", kind="interior", conductivity=1.0), Region(name="b", color="#FFFFFF", kind="fixed", value=0.0)], {}, "is already the colour of region 1"),
        (np.array([[1, 0]]), [Region(name="a", color="#ffffff", kind="interior", conductivity=1.0), Region(name="b", color="#ff0000", kind="fixed")], {}, "kind 'fixed' needs 'value'"),
        (np.array([[1, 0]]), [Region(name="a", color="#ffffff", kind="solid", conductivity=1.0), Region(name="b", color="#ff0000", kind="fixed", value=1.0)], {}, "kind must be one of"),
    ],
)
def test_build_case_refuses(codes, regions, kwargs, fragment):
    with pytest.raises(CaseError, match=None) as err:
        build_case(codes, regions if regions is not None else _regions(), path="made.toml", **kwargs)
    assert fragment in str(err.value)
    assert str(err.value).startswith("made.toml")


# ---------------------------------------------------------------------------
# Memory


def test_memory_model_constants():
    # The documented byte model (relaxtui/solver/memory.py): resident padded field 8 B, class codes 1 B
    # (2 B above 256 classes), region codes 1 B, 7 B the allocators keep after the decode; on top the
    # largest phase: the decode (45 B per cell for a picture decoded whole, 17 in strips), the sweeps
    # (sweep buffers, Jacobi 8 B padded, and for methods that use the Jacobi radius its estimate:
    # fine Lanczos vectors 24 B padded on small pictures, the two-level estimate 9 B padded above
    # radius.COARSE_UNKNOWNS cells), the output copy 8 B, or multigrid's levels and CG vectors 38 B (float32 interpolation weights); 200 MiB fixed.
    # (tests/test_memory.py checks it against measured peaks.)
    from relaxtui.solver.radius import COARSE_UNKNOWNS

    fixed = 200 * 1024 * 1024
    rows, cols = 10, 20
    padded, cells = 12 * 22, 200
    resident = 9 * padded + 8 * cells
    assert memory.estimate_solve_bytes(rows, cols, "red-black-sor", 3) == fixed + max(45 * cells, resident + 24 * padded)
    assert memory.estimate_solve_bytes(rows, cols, "jacobi", 3) == fixed + resident + 32 * padded
    assert memory.estimate_solve_bytes(rows, cols, "sor", 300) == fixed + resident + padded + 24 * padded
    assert memory.estimate_solve_bytes(rows, cols, "multigrid", 3) == fixed + resident + 38 * cells
    rows, cols = 3000, 2000  # an estimate only: nothing is allocated
    padded, cells = 3002 * 2002, 6_000_000
    assert cells > COARSE_UNKNOWNS
    resident = 9 * padded + 8 * cells
    assert memory.estimate_solve_bytes(rows, cols, "red-black-sor", 3) == fixed + resident + 9 * padded
    assert memory.estimate_solve_bytes(rows, cols, "jacobi", 3) == fixed + resident + 17 * padded
    assert memory.estimate_solve_bytes(rows, cols, "jacobi", 3, fine_radius=True) == fixed + resident + 32 * padded
    assert memory.estimate_solve_bytes(rows, cols, "multigrid", 3) == fixed + resident + 38 * cells


def test_available_bytes_is_sane(monkeypatch):
    have = memory.available_bytes()
    assert have is not None and have > 0
    total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    assert have <= total
    monkeypatch.setattr(memory, "_meminfo_available", lambda: None)
    assert memory.available_bytes() > 0  # the os.sysconf fallback


def test_loader_refuses_before_decoding_when_memory_is_short(tmp_path, monkeypatch, capsys):
    path = write_case(tmp_path, REGIONS)
    monkeypatch.setattr(memory, "available_bytes", lambda: 1000)

    def no_decode(*args, **kwargs):
        raise AssertionError("the picture was decoded before the memory check")

    monkeypatch.setattr(picture, "decode", no_decode)
    with pytest.raises(CaseError) as err:
        load_case(path)
    msg = str(err.value)
    assert "the picture is 6 x 4 pixels (24 cells); a solve needs about" in msg
    assert "but only 1000 B of memory is available" in msg
    assert main(["info", str(path)]) == 2


# ---------------------------------------------------------------------------
# Imports and demos


def test_import_case_does_not_load_numba_or_textual():
    code = "import sys, relaxtui.case, relaxtui.case.picture, relaxtui.solver.memory; print('numba' in sys.modules, 'textual' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=120).stdout
    assert out.split() == ["False", "False"]


NO_JIT = os.environ.get("NUMBA_DISABLE_JIT", "0") not in ("", "0")
DEMOS = ["heat-spreader", "electrodes", "composite",
         pytest.param("large-aquifer", marks=pytest.mark.skipif(NO_JIT, reason="labelling 16.7 M cells in plain Python takes minutes"))]


@pytest.mark.parametrize("name", DEMOS)
def test_demo_cases_load_and_are_redrawn_identically(tmp_path, name):
    case = load_case(REPO / "grids" / f"{name}.toml")
    assert case.snapped == 0
    assert (case.region_counts() > 0).all()  # every declared region is drawn
    expected = "multigrid" if name == "large-aquifer" else "red-black-sor"  # the large demo is a production solve
    assert case.solver.method == expected and case.solver.omega == "auto"
    sys.path.insert(0, str(REPO / "grids"))
    try:
        import make_demos
    finally:
        sys.path.remove(str(REPO / "grids"))
    assert (REPO / "grids" / f"{name}.png").stat().st_size < 1_000_000
    make_demos.main([name, "--out", str(tmp_path)])
    (tmp_path / f"{name}.toml").write_text((REPO / "grids" / f"{name}.toml").read_text(encoding="utf-8"), encoding="utf-8")
    redrawn = load_case(tmp_path / f"{name}.toml")
    np.testing.assert_array_equal(redrawn.codes, case.codes)


def test_large_demo_is_large():
    h = picture.read_header(REPO / "grids" / "large-aquifer.png")
    assert h.width >= 4096 and h.height >= 4096
    assert h.color_type == 3  # a palette PNG


def test_case_module_names():
    assert case_module.MAX_REGIONS == 255


def test_solvability_check_against_scipy_on_random_domains(labelling):
    """Random domains through build_case: the floating group reported (or none)
    is the one an independent scipy.ndimage labelling finds first in raster order."""
    from scipy import ndimage

    regions = _regions() + [Region(name="air", color="#00ff00", kind="convection", coefficient=1.0, ambient=0.0),
                            Region(name="in", color="#0000ff", kind="flux", flux=1.0)]
    rng = np.random.default_rng(8)
    cross = ndimage.generate_binary_structure(2, 1)
    for trial in range(60):
        shape = tuple(rng.integers(1, 14, size=2))
        codes = rng.choice(5, size=shape, p=[0.6, 0.03, 0.25, 0.02, 0.1]).astype(np.uint8)
        interior = codes == 0
        if not interior.any():
            continue
        anchor = (codes == 1) | (codes == 3)
        labels, n = ndimage.label(interior)
        touching = ndimage.binary_dilation(anchor, structure=cross) & interior
        floating = sorted(set(range(1, n + 1)) - set(np.unique(labels[touching]).tolist()))
        if not floating:
            build_case(codes, regions)
            continue
        g = floating[0]
        r, c = np.argwhere(labels == g)[0]
        with pytest.raises(CaseError) as err:
            build_case(codes, regions)
        msg = str(err.value)
        assert f"a group of {int((labels == g).sum())} interior cells (one of them at row {r}, column {c})" in msg, (trial, msg)
        if len(floating) > 1:
            assert f"{len(floating) - 1} more such groups" in msg
