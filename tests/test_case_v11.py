"""Loading the case format v1.1 keys (docs/case-format.md, "v1.1 additions"): values and errors.

Every error is one line naming the file, the key and the line (the contract's rule for bad input).
"""

from __future__ import annotations

import textwrap

import numpy as np
import pytest
from PIL import Image

from relaxtui.case import load_case
from relaxtui.errors import CaseError

HEAD = """\
mask = "m.png"
cell_size = 0.01
"""
REGIONS = """
[[region]]
name = "board"
color = "#ffffff"
kind = "interior"
conductivity = [20.0, 0.5]

[[region]]
name = "chip"
color = "#ff0000"
kind = "interior"
conductivity = 150.0
source = 1e6

[[region]]
name = "sink"
color = "#0000ff"
kind = "fixed"
value = 40.0
"""


def _picture(path, rows=6, cols=8):
    a = np.full((rows, cols, 3), 255, dtype=np.uint8)
    a[1:3, 2:5] = (255, 0, 0)
    a[-1, :] = (0, 0, 255)
    Image.fromarray(a, "RGB").save(path / "m.png")


def _write(tmp_path, text, rows=6, cols=8):
    _picture(tmp_path, rows, cols)
    p = tmp_path / "c.toml"
    p.write_text(textwrap.dedent(text))
    return p


def test_all_v11_keys_load(tmp_path):
    k = np.linspace(1, 2, 48).reshape(6, 8)
    np.save(tmp_path / "k.npy", k)
    grey = (np.arange(48).reshape(6, 8) * 1000).astype(np.uint16)
    Image.fromarray(grey).save(tmp_path / "s.png")
    text = HEAD + 'geometry = "planar"\n' + REGIONS.replace('conductivity = 150.0\nsource = 1e6',
                                                             'conductivity_map = "k.npy"\nsource_map = "s.png"\nmap_min = -5.0\nmap_max = 60.0') + """
[[contact]]
between = ["board", "chip"]
resistance = 2e-4

[[contact]]
between = ["board", "sink"]
resistance = 1e-3

[[probe]]
name = "T1"
x = 0.035
y = 0.045
"""
    case = load_case(_write(tmp_path, text))
    board = case.regions[0]
    assert (board.conductivity, board.conductivity_y) == (20.0, 0.5)
    assert [(c.a, c.b, c.resistance) for c in case.contacts] == [("board", "chip", 2e-4), ("board", "sink", 1e-3)]
    assert case.contacts[0].line == text.splitlines().index('between = ["board", "chip"]') + 1
    assert [(p.name, p.x, p.y) for p in case.probes] == [("T1", 0.035, 0.045)]
    maps = {m.key: m for m in case.maps}
    chip = case.codes == 1
    assert np.array_equal(maps["conductivity"].values, k)
    assert maps["conductivity"].low == k[chip].min() and maps["conductivity"].high == k[chip].max()
    # 16-bit grey: value = map_min + (map_max - map_min) * p / 65535 (the v1.1 contract)
    assert np.allclose(maps["source"].values, -5.0 + 65.0 * grey / 65535.0, rtol=0, atol=1e-12)
    assert case.per_face_physics


def test_a_v1_case_has_no_v11_parts(tmp_path):
    case = load_case(_write(tmp_path, HEAD + REGIONS.replace("[20.0, 0.5]", "20.0")))
    assert case.contacts == () and case.probes == () and case.maps == () and case.geometry == "planar"
    assert not case.per_face_physics


@pytest.mark.parametrize(
    "extra, replace, message",
    [
        ('geometry = "spherical"\n', None, r"c.toml:3: key 'geometry' must be"),
        ("[[contact]]\nbetween = [\"board\"]\nresistance = 1.0\n", None, r"c.toml:\d+: contact 1: key 'between' must be two region names"),
        ("[[contact]]\nbetween = [\"board\", \"nothing\"]\nresistance = 1.0\n", None, r"c.toml:\d+: contact: key 'between': no region is named 'nothing'"),
        ("[[contact]]\nbetween = [\"board\", \"chip\"]\nresistance = 0.0\n", None, r"c.toml:\d+: contact 1: key 'resistance' must be > 0"),
        ("[[contact]]\nbetween = [\"board\", \"chip\"]\nresistanse = 1.0\n", None, r"c.toml:\d+: contact 1: unknown key 'resistanse'"),
        ("[[contact]]\nbetween = [\"board\", \"chip\"]\nresistance = 1.0\n[[contact]]\nbetween = [\"chip\", \"board\"]\nresistance = 2.0\n",
         None, r"already have a contact"),
        ("[[probe]]\nname = \"p\"\nx = 0.5\ny = 0.01\n", None, r"c.toml:\d+: probe 'p': point .* outside the picture"),
        ("[[probe]]\nname = \"p\"\nx = \"a\"\ny = 0.01\n", None, r"c.toml:\d+: probe 1: key 'x' must be a number"),
        ("[[probe]]\nname = \"p,q\"\nx = 0.01\ny = 0.01\n", None, r"without commas"),
        ("depth = 0.1\ngeometry = \"axisymmetric\"\n", None, r"c.toml:3: key 'depth' does not apply"),
        ("", ("[20.0, 0.5]", "[20.0]"), r"c.toml:\d+: region 1 \(board\): key 'conductivity' must be one number or two"),
        ("", ("[20.0, 0.5]", "[20.0, -1.0]"), r"c.toml:\d+: region 1 \(board\): ky of key 'conductivity' must be > 0"),
        ("", ("value = 40.0", "value = 40.0\nconductivity = [1.0, 2.0]"), r"c.toml:\d+: region 3 \(sink\): key 'conductivity' must be a number"),
        ("", ("conductivity = 150.0", "conductivity = 150.0\nconductivity_map = \"k.npy\""), r"region 2 \(chip\): keys 'conductivity' and 'conductivity_map' both given"),
        ("", ("conductivity = 150.0", "conductivity_map = \"none.npy\""), r"c.toml:\d+: region 'chip': conductivity_map 'none.npy': map not found"),
        ("", ("conductivity = 150.0", "conductivity_map = \"k.txt\""), r"must name a .npy array or a 16-bit grey .png"),
        ("", ("conductivity = 150.0", "conductivity_map = \"k.png\""), r"missing key 'map_min'"),
        ("", ("conductivity = 150.0", "map_min = 1.0"), r"key 'map_min' applies only to a .png"),
        ("", ("value = 40.0", "value = 40.0\nsource_map = \"s.npy\""), r"region 3 \(sink\): key 'source_map' does not apply to kind 'fixed'"),
    ],
)
def test_bad_v11_values_are_one_line_errors(tmp_path, extra, replace, message):
    body = REGIONS if replace is None else REGIONS.replace(*replace)
    with pytest.raises(CaseError, match=message) as err:
        load_case(_write(tmp_path, HEAD + extra + body))
    assert "\n" not in str(err.value)


def test_bad_maps_name_file_and_cell(tmp_path):
    k = np.ones((6, 8))
    k[1, 3] = -2.0  # a chip cell
    np.save(tmp_path / "k.npy", k)
    np.save(tmp_path / "small.npy", np.ones((3, 3)))
    Image.fromarray(np.zeros((6, 8), np.uint8), "L").save(tmp_path / "g8.png")
    cases = [
        ('conductivity_map = "k.npy"', r"c.toml:\d+: region 'chip': conductivity_map 'k.npy'.*row 1, column 3.*> 0"),
        ('conductivity_map = "small.npy"', r"the map has shape \(3, 3\), the picture is 6 rows x 8 columns"),
        ('conductivity_map = "g8.png"\nmap_min = 1.0\nmap_max = 2.0', r"must be a 16-bit grey PNG"),
    ]
    for text, message in cases:
        with pytest.raises(CaseError, match=message):
            load_case(_write(tmp_path, HEAD + REGIONS.replace("conductivity = 150.0", text)))


def test_probe_outside_the_domain_is_refused(tmp_path):
    text = HEAD + REGIONS.replace('value = 40.0', 'value = 40.0\n\n[[region]]\ncolor = "#000000"\nkind = "outside"')
    _picture(tmp_path)
    a = np.array(Image.open(tmp_path / "m.png"))
    a[0, 0] = 0
    Image.fromarray(a, "RGB").save(tmp_path / "m.png")
    p = tmp_path / "c.toml"
    p.write_text(text + '\n[[probe]]\nname = "corner"\nx = 0.005\ny = 0.055\n')
    with pytest.raises(CaseError, match=r"c.toml:\d+: probe 'corner': .* outside the domain \(cell row 0, column 0 is outside\)"):
        load_case(p)


def test_npy_map_header_is_checked_before_reading(tmp_path):
    np.save(tmp_path / "c16.npy", np.ones((6, 8), dtype=np.complex64))
    (tmp_path / "junk.npy").write_bytes(b"not an array")
    for name, message in (("c16.npy", r"must hold real numbers, not complex64"), ("junk.npy", r"not a readable .npy array")):
        with pytest.raises(CaseError, match=message):
            load_case(_write(tmp_path, HEAD + REGIONS.replace("conductivity = 150.0", f'conductivity_map = "{name}"')))
