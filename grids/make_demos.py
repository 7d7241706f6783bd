"""Redraw the demo pictures in grids/ (deterministic: only numpy and Pillow, no randomness).

    python grids/make_demos.py            # redraw all six PNGs next to this script
    python grids/make_demos.py --check    # redraw, then load every demo case

Each picture is a palette PNG; the colours here are the ones the TOML files
declare. The scenarios are invented for the demo; property values are typical
handbook magnitudes (see each TOML file).
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

import numpy as np
from PIL import Image

HERE = Path(__file__).resolve().parent


def _hex(c: str) -> tuple[int, int, int]:
    return int(c[1:3], 16), int(c[3:5], 16), int(c[5:7], 16)


def save_palette_png(path: Path, index: np.ndarray, colours: list[str]) -> None:
    """Write ``index`` (uint8 rows x cols) as a palette PNG with ``colours``."""
    h, w = index.shape
    im = Image.frombytes("P", (w, h), np.ascontiguousarray(index, dtype=np.uint8).tobytes())
    pal = []
    for c in colours:
        pal.extend(_hex(c))
    im.putpalette(pal)
    bits = 1 if len(colours) <= 2 else 2 if len(colours) <= 4 else 4 if len(colours) <= 16 else 8
    tmp = path.with_name(f".{path.name}.part")
    im.save(tmp, format="PNG", optimize=True, bits=bits)
    os.replace(tmp, path)


def _ellipse(index, value, cy, cx, ry, rx, angle=0.0):
    """Fill an ellipse (centre row cy, col cx, semi-axes ry, rx, rotated by angle radians)."""
    h, w = index.shape
    r = int(max(ry, rx)) + 2
    y0, y1 = max(0, int(cy) - r), min(h, int(cy) + r + 1)
    x0, x1 = max(0, int(cx) - r), min(w, int(cx) + r + 1)
    y = np.arange(y0, y1)[:, None] - cy
    x = np.arange(x0, x1)[None, :] - cx
    ca, sa = np.cos(angle), np.sin(angle)
    u = x * ca + y * sa
    v = -x * sa + y * ca
    inside = (u / rx) ** 2 + (v / ry) ** 2 <= 1.0
    index[y0:y1, x0:x1][inside] = value


def _band(index, value, centre, half_width, rows=None):
    """Fill a vertical band: in each row y, columns within half_width of centre[y]."""
    h, w = index.shape
    rows = np.arange(h) if rows is None else rows
    x = np.arange(w)[None, :]
    mask = np.abs(x - centre[rows][:, None]) <= half_width
    sub = index[rows]
    sub[mask] = value
    index[rows] = sub


# ---------------------------------------------------------------------------
# (a) heat spreader: side view of a finned aluminium sink with a copper slug under a chip

HEAT_SPREADER = ["#ffffff", "#c8ccd0", "#d9822b", "#e03030", "#a8d8ff", "#404040"]


def heat_spreader() -> np.ndarray:
    lid, alu, copper, chip, air, mount = range(6)
    rows, cols = 152, 480  # 0.25 mm cells: 120 mm x 38 mm
    a = np.full((rows, cols), lid, np.uint8)
    a[8:32, :] = alu  # base plate, 6 mm thick
    a[8:24, 180:300] = copper  # copper slug, 30 mm x 4 mm, set into the top of the base
    a[4:8, 210:270] = chip  # the chip's footprint, 15 mm wide, on the slug
    a[4:8, 8:32] = mount  # two mounting bosses bolted to the chassis
    a[4:8, 448:472] = mount
    a[32:, :] = air
    for k in range(12):  # 12 fins, 2 mm thick, 28 mm long, pitch 10 mm
        a[32:144, 40 * k + 16 : 40 * k + 24] = alu
    return a


# ---------------------------------------------------------------------------
# (b) electrodes: a deflection stage in a grounded box, with a PTFE spacer

ELECTRODES = ["#000000", "#7f7f7f", "#ffffff", "#ff3b30", "#0a84ff", "#ffcc00", "#34c759"]


def electrodes() -> np.ndarray:
    outside, box, vacuum, plus, minus, focus, ptfe = range(7)
    rows, cols = 300, 400  # 0.1 mm cells: 40 mm x 30 mm
    a = np.full((rows, cols), outside, np.uint8)
    a[10:290, 10:390] = box
    a[14:286, 14:386] = vacuum
    a[106:195, 296:330] = ptfe  # spacer between the plates' right ends
    a[100:106, 150:330] = plus  # deflection plate at +150 V
    a[195:201, 150:330] = minus  # deflection plate at -150 V
    _ellipse(a, focus, 150, 80, 25, 25)  # round focusing electrode at +400 V
    a[146:155, 16:56] = focus  # its feed rod, stopping two cells short of the grounded wall
    return a


# ---------------------------------------------------------------------------
# (c) composite: a potted solenoid coil in a steel housing, clamped in a warm frame

COMPOSITE = ["#dff3ff", "#5b6770", "#f2e6a0", "#b5651d", "#303030"]


def composite() -> np.ndarray:
    air, steel, epoxy, winding, frame = range(5)
    rows, cols = 240, 330  # 0.2 mm cells: 66 mm x 48 mm
    a = np.full((rows, cols), air, np.uint8)
    a[9:231, 9:321] = steel  # housing, about 4 mm walls
    a[28:212, 28:302] = epoxy  # potting
    a[28:212, 150:180] = steel  # central core, joined to the top and bottom walls
    a[37:203, 45:140] = winding  # the two sides of the winding
    a[37:203, 190:285] = winding
    a[231:, 9:321] = frame  # the machine frame the housing sits on
    a[:9, 120:210] = frame  # and the clamp bracket on top, part of the same frame
    return a


# ---------------------------------------------------------------------------
# (d) large aquifer: 4096 x 4096 cells of 5 m, rivers, a lake, a wellfield, a leaky canal

AQUIFER = [
    "#e8d9a8",  # sand
    "#c9a66b",  # gravel channel
    "#8c7b6b",  # clay lenses
    "#6b6b6b",  # granite outcrops (not aquifer)
    "#1f5fbf",  # river, upper reach
    "#2f78d8",  # river, middle reach
    "#4a90e8",  # river, lower reach
    "#0b3d91",  # lake
    "#d62828",  # wells
    "#7fd1c7",  # canal with a silted bed
]

# (centre row, centre col, semi-axis rows, semi-axis cols, angle in radians)
CLAY_LENSES = [
    (600, 2200, 120, 320, 0.3),
    (1500, 400, 90, 260, -0.2),
    (1750, 2300, 150, 380, 0.6),
    (2600, 1000, 110, 300, 0.1),
    (3100, 2200, 130, 420, -0.4),
    (3500, 3500, 100, 280, 0.9),
    (900, 3600, 140, 200, -0.7),
    (2300, 3700, 80, 220, 0.2),
]
GRANITE = [
    (400, 1000, 170, 260, 0.5),
    (2000, 1500, 260, 200, -0.3),
    (3300, 700, 220, 330, 0.2),
    (2900, 3300, 180, 240, 1.1),
]
WELLS = [(2200, 1700), (2350, 1950), (2500, 1700), (2650, 1950)]


def large_aquifer() -> np.ndarray:
    sand, gravel, clay, granite, r_up, r_mid, r_low, lake, well, canal = range(10)
    n = 4096
    a = np.full((n, n), sand, np.uint8)
    y = np.arange(n, dtype=np.float64)
    channel = 1200 + 350 * np.sin(2 * np.pi * y / 2600) + 120 * np.sin(2 * np.pi * y / 700 + 1.0)
    _band(a, gravel, channel, 60)
    for cy, cx, ry, rx, ang in CLAY_LENSES:
        _ellipse(a, clay, cy, cx, ry, rx, ang)
    for cy, cx, ry, rx, ang in GRANITE:
        _ellipse(a, granite, cy, cx, ry, rx, ang)
    _ellipse(a, lake, 900, 700, 150, 220, 0.2)
    river = 2900 + 250 * np.sin(2 * np.pi * y / 3000 + 0.5) + 80 * np.sin(2 * np.pi * y / 800)
    third = n // 3
    _band(a, r_up, river, 12, np.arange(0, third))
    _band(a, r_mid, river, 12, np.arange(third, 2 * third))
    _band(a, r_low, river, 12, np.arange(2 * third, n))
    # canal: a gently curving ditch across the south, 9 cells wide
    x = np.arange(300, 2600)
    crow = (3650 + 60 * np.sin(2 * np.pi * x / 1800)).astype(int)
    for dy in range(-4, 5):
        a[crow + dy, x] = canal
    for wy, wx in WELLS:
        a[wy - 1 : wy + 2, wx - 1 : wx + 2] = well
    return a


# ---------------------------------------------------------------------------
# (e) power module (case format v1.1: contact resistance, orthotropy, probes): a cross-section of a
# power switch on a laminate board with copper planes, screwed to a cold plate through a gap pad

POWER_MODULE = ["#e6f2ff", "#2b2b2b", "#9aa0a6", "#d4882b", "#3f7f3f", "#1e4fa0"]


def power_module() -> np.ndarray:
    air, mold, die, tab, board, plate = range(6)
    rows, cols = 67, 400  # 0.1 mm cells: 40 mm x 6.7 mm
    a = np.full((rows, cols), air, np.uint8)
    a[4:46, 100:300] = mold  # the moulded package, 20 mm wide
    a[34:46, 140:260] = tab  # copper tab, 12 mm x 1.2 mm, flush with the package's underside
    a[31:34, 175:225] = die  # silicon die, 5 mm x 0.3 mm, soldered on the tab
    a[46:62, :] = board  # laminate board, 1.6 mm
    a[62:, :] = plate  # aluminium cold plate under the gap pad
    return a


# ---------------------------------------------------------------------------
# (f) well drawdown (case format v1.1: axisymmetric geometry, orthotropy, probes): a pumped well
# screened in a confined sand aquifer under a clay aquitard, radius 400 m

WELL = ["#4a90e8", "#8c6d4f", "#e8d9a8", "#d62828", "#303030", "#1f5fbf"]


def well_drawdown() -> np.ndarray:
    upper, clay, sand, screen, casing, far = range(6)
    rows, cols = 40, 400  # 1 m cells: 400 m radius, 40 m deep
    a = np.full((rows, cols), sand, np.uint8)
    a[:5, :] = upper  # the upper aquifer, its head held by recharge
    a[5:15, :] = clay  # the aquitard, 10 m
    a[5:15, 0] = casing  # the well's casing through the aquitard (no flow)
    a[20:35, 0] = screen  # the screen, 15 m of the 25 m aquifer
    a[15:, -1] = far  # the far field at 400 m
    return a


DEMOS = {
    "heat-spreader": (heat_spreader, HEAT_SPREADER),
    "electrodes": (electrodes, ELECTRODES),
    "composite": (composite, COMPOSITE),
    "large-aquifer": (large_aquifer, AQUIFER),
    "power-module": (power_module, POWER_MODULE),
    "well-drawdown": (well_drawdown, WELL),
}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description="Redraw the demo pictures of grids/.")
    p.add_argument("names", nargs="*", help=f"demos to draw (default all: {', '.join(DEMOS)})")
    p.add_argument("--out", default=str(HERE), help="folder to write to (default: this script's)")
    p.add_argument("--check", action="store_true", help="load each demo case afterwards")
    args = p.parse_args(argv)
    out = Path(args.out)
    for name in args.names or list(DEMOS):
        draw, colours = DEMOS[name]
        index = draw()
        path = out / f"{name}.png"
        save_palette_png(path, index, colours)
        print(f"{path}: {index.shape[1]} x {index.shape[0]}, {path.stat().st_size} bytes")
    if args.check:
        from relaxtui.case import load_case

        for name in args.names or list(DEMOS):
            case = load_case(out / f"{name}.toml")
            print(f"{name}: {case.shape[0]} x {case.shape[1]}, {int(case.region_counts()[case.kind_codes() == 0].sum())} unknowns, loads")
    return 0


if __name__ == "__main__":
    sys.exit(main())
