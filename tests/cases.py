"""Small cases built from ASCII pictures, for tests.

A picture is a list of equal-length strings; a legend maps each character to a
:class:`relaxtui.case.model.Region`. Row 0 of the picture is the top row, as in an
image. The helpers :func:`interior`, :func:`fixed`, :func:`outside`,
:func:`flux` and :func:`convection` build regions with the contract's keys
(``the case-format contract (case-format.md)``); colours are filled in by :func:`make_case`
(one distinct colour per region) since the operator never looks at them.

Example::

    case = make_case(
        ["#####",
         "#...#",
         "#...#",
         "HHHHH"],
        {"#": fixed("cold", 0.0), ".": interior("plate"), "H": fixed("hot", 1.0)},
    )
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np

from relaxtui.case.model import Case, Region


def interior(name: str = "plate", conductivity: float | None = 1.0, source: float = 0.0) -> Region:
    return Region(name=name, color="", kind="interior", conductivity=conductivity, source=source)


def fixed(name: str, value: float, conductivity: float | None = None) -> Region:
    return Region(name=name, color="", kind="fixed", value=value, conductivity=conductivity)


def outside(name: str = "void") -> Region:
    return Region(name=name, color="", kind="outside")


def flux(name: str, flux: float) -> Region:
    return Region(name=name, color="", kind="flux", flux=flux)


def convection(name: str, coefficient: float, ambient: float) -> Region:
    return Region(name=name, color="", kind="convection", coefficient=coefficient, ambient=ambient)


def make_case(art, legend: dict[str, Region], cell_size: float = 1.0, depth: float = 1.0, name: str = "ascii") -> Case:
    """Build a :class:`Case` from an ASCII picture.

    Parameters
    ----------
    art : list of str
        Equal-length rows; each character must be a key of ``legend``.
    legend : dict
        Character -> Region. The regions tuple of the case follows the
        legend's order (so absent regions are still declared, as in a TOML
        file that declares a colour the picture does not use).
    cell_size, depth : float
        As in the case file (metres).
    """
    rows = list(art)
    if not rows or not rows[0]:
        raise ValueError("empty picture")
    width = len(rows[0])
    for i, row in enumerate(rows):
        if len(row) != width:
            raise ValueError(f"picture row {i} has {len(row)} characters, row 0 has {width}")
    keys = list(legend)
    if len(keys) > 256:
        raise ValueError("at most 256 regions fit uint8 codes")
    index = {ch: n for n, ch in enumerate(keys)}
    codes = np.empty((len(rows), width), dtype=np.uint8)
    for i, row in enumerate(rows):
        for j, ch in enumerate(row):
            if ch not in index:
                raise ValueError(f"character {ch!r} at row {i}, column {j} is not in the legend")
            codes[i, j] = index[ch]
    regions = tuple(
        replace(legend[ch], color=legend[ch].color or f"#{(37 * n + 11) % 256:02x}{(91 * n + 5) % 256:02x}{n:02x}")
        for n, ch in enumerate(keys)
    )
    return Case(
        path=None,
        mask_path=Path(f"{name}.png"),
        regions=regions,
        codes=codes,
        cell_size=float(cell_size),
        depth=float(depth),
    )


def case_from_codes(codes: np.ndarray, regions, cell_size: float = 1.0, depth: float = 1.0, name: str = "codes") -> Case:
    """A case from a ready code array (uint8, indices into ``regions``)."""
    regions = tuple(
        replace(r, color=r.color or f"#{(37 * n + 11) % 256:02x}{(91 * n + 5) % 256:02x}{n:02x}") for n, r in enumerate(regions)
    )
    return Case(
        path=None,
        mask_path=Path(f"{name}.png"),
        regions=regions,
        codes=np.ascontiguousarray(codes, dtype=np.uint8),
        cell_size=float(cell_size),
        depth=float(depth),
    )


def model_problem(n: int, hot: float = 1.0, side: str = "top", conductivity: float = 1.0) -> Case:
    """The model problem of references.md §9: an n x n block of interior cells in a one-cell fixed frame.

    One side of the frame (``side``: "top", "bottom", "left", "right") is held
    at ``hot``, the other three at 0; ``hot=0.0`` gives the homogeneous
    problem (every side at 0). The four frame corners touch no interior cell
    (only diagonally), so they are ``outside``: the picture is symmetric
    under 90-degree rotation as references.md §1 requires. The grid is
    (n + 2) x (n + 2); with h = 1/(n + 1) the equations are exactly the
    5-point Dirichlet Laplacian.
    """
    if n < 1:
        raise ValueError("n must be at least 1")
    size = n + 2
    grid = [["." for _ in range(size)] for _ in range(size)]
    for k in range(size):
        grid[0][k] = grid[size - 1][k] = "C"
        grid[k][0] = grid[k][size - 1] = "C"
    where = {"top": [(0, k) for k in range(size)], "bottom": [(size - 1, k) for k in range(size)],
             "left": [(k, 0) for k in range(size)], "right": [(k, size - 1) for k in range(size)]}
    if side not in where:
        raise ValueError(f"side must be one of {sorted(where)}")
    for i, j in where[side]:
        grid[i][j] = "H"
    for i, j in ((0, 0), (0, size - 1), (size - 1, 0), (size - 1, size - 1)):
        grid[i][j] = "x"
    return make_case(
        ["".join(row) for row in grid],
        {".": interior("plate", conductivity), "H": fixed("hot", hot), "C": fixed("cold", 0.0), "x": outside("corner")},
        name=f"model-{n}",
    )


# 16 rows x 44 columns. H hot edge, # cold edge, o isolated fixed cells, x outside
# (holes, an inside corner, a one-cell channel in row 8), ~ a convection strip, ^ a flux strip.
FEATURE_ART = [
    "xHHHHHHHHHHHHHHHHHHHHHHHHHHHHHHHHHHHHHHHHHHx",
    "#..........................................#",
    "#..........................................#",
    "#.........................o................#",
    "#......................................o...#",
    "#..........xxxxxxxxxxxxxxxxxxxxxxxxx.......#",
    "#..........xxxxxxxxxxxxxxxxxxxxxxxxx.......#",
    "#.....................................x....#",
    "xxxxxxxxxxxxxxxxxxxxxxxxx.xxxxxxxxxxxxxxxxxx",
    "#..........................................~",
    "#.......bbbbbbbbbbbbbbbbbbbbbbbbb..........~",
    "#.......bbbbbbbbbbbbbbbbbbbbbbbbb..........~",
    "#.......bbbbbbbbbbbbbbbbbbbbbbbbb..........~",
    "#..........................................x",
    "#..........................................x",
    "^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^^x",
]


def feature_legend(two_materials: bool):
    return {
        ".": interior("plate", 1.0 if not two_materials else 3.0),
        "b": interior("insert", 1.0 if not two_materials else 0.25, source=0.0 if not two_materials else 2.0),
        "H": fixed("hot", 1.0),
        "#": fixed("cold", 0.0, conductivity=None if not two_materials else 5.0),
        "o": fixed("pin", 0.5),
        "x": outside("void"),
        "~": convection("air", 4.0, 0.2),
        "^": flux("heater", 0.05),
        "F": flux("unused", 1.0),  # declared, absent from the picture
    }


def feature_case(two_materials: bool) -> Case:
    """A 16 x 44 picture with most of what a kernel can meet (see FEATURE_ART).

    Uniform: every interior cell has k = 1, no source. Two materials: a plate
    (k = 3) with an insert (k = 0.25, source 2), the cold edge with its own
    conductivity (5), cell size 0.5 and depth 2.
    """
    if two_materials:
        return make_case(FEATURE_ART, feature_legend(True), cell_size=0.5, depth=2.0, name="features-two")
    return make_case(FEATURE_ART, feature_legend(False), cell_size=0.5, name="features-uniform")


def hot_cold_toml(mask: str, *, head: str = "", interior: str = "", void: bool = True) -> str:
    """A case file: white interior ("plate", extra keys in ``interior``), red fixed at 100 ("hot"),
    blue fixed at 0 ("cold") and, with ``void``, black outside; ``head`` adds top-level keys."""
    parts = [f'mask = "{mask}"\n{head}',
             f'[[region]]\nname = "plate"\ncolor = "#ffffff"\nkind = "interior"\n{interior}',
             '[[region]]\nname = "hot"\ncolor = "#ff0000"\nkind = "fixed"\nvalue = 100.0\n',
             '[[region]]\nname = "cold"\ncolor = "#0000ff"\nkind = "fixed"\nvalue = 0.0\n']
    if void:
        parts.append('[[region]]\nname = "void"\ncolor = "#000000"\nkind = "outside"\n')
    return "".join(p if p.endswith("\n") else p + "\n" for p in parts)

def write_plate_case(folder: Path) -> Path:
    """An 8 x 8 plate on disk (plate.png, case.toml): top row outside, cold left column, hot right column."""
    from PIL import Image

    img = np.full((8, 8, 3), 255, dtype=np.uint8)
    img[0, :] = 0
    img[1:, 0] = (0, 0, 255)
    img[1:, -1] = (255, 0, 0)
    Image.fromarray(img, "RGB").save(folder / "plate.png")
    path = folder / "case.toml"
    path.write_text(hot_cold_toml("plate.png"), encoding="utf-8")
    return path


def toml_value(value) -> str:
    """A TOML literal for a test value: strings quoted, booleans in lower case, lists bracketed."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'"{value}"'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    return str(value)


def region_toml(color: str, kind: str, name: str | None = None, **keys) -> str:
    """One ``[[region]]`` table of a case file (the contract's keys, case-format.md): name (if any),
    color, kind, then ``keys`` in the order given; ends with a newline."""
    lines = ["[[region]]"] + ([f'name = "{name}"'] if name is not None else []) + [f'color = "{color}"', f'kind = "{kind}"']
    lines += [f"{key} = {toml_value(value)}" for key, value in keys.items()]
    return "\n".join(lines) + "\n"


def number_unknowns(case) -> tuple[np.ndarray, int]:
    """(index, count): index[row, col] numbers the interior cells row by row from 0, -1 elsewhere.

    Only the numbering of the unknowns, shared by the independent assemblies of tests/exact.py and
    tests/exact_fraction.py; each builds its own coefficients.
    """
    codes = case.codes
    index = -np.ones(codes.shape, dtype=np.int64)
    count = 0
    for i in range(codes.shape[0]):
        for j in range(codes.shape[1]):
            if case.regions[int(codes[i, j])].kind == "interior":
                index[i, j] = count
                count += 1
    return index, count
