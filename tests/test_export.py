"""Exports: gradient and flux, the PNG picture, VTK ImageData, the bundle and the field loader."""

import base64
import json
import xml.etree.ElementTree as ET
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from cases import region_toml
from PIL import Image

from relaxtui import export
from relaxtui.output import fields, pictures
from relaxtui.case.model import Case, Region
from relaxtui.errors import OutputError, UsageError
from relaxtui.output import colormap

INTERIOR = Region("plate", "#ffffff", "interior", conductivity=2.0)
OUTSIDE = Region("air", "#000000", "outside")
HOT = Region("hot", "#ff0000", "fixed", value=100.0)
COLD = Region("cold", "#0000ff", "fixed", value=0.0)


def make_case(codes, regions=(INTERIOR, OUTSIDE, HOT, COLD), h=1.0, quantity="temperature", unit="K"):
    codes = np.ascontiguousarray(codes, dtype=np.uint8)
    return Case(
        path=Path("made.toml"),
        mask_path=Path("made.png"),
        regions=tuple(regions),
        codes=codes,
        cell_size=h,
        quantity=quantity,
        unit=unit,
    )


def centres(case):
    """Cell-centre coordinates in metres, x right, y up (the contract's convention)."""
    rows, cols = case.shape
    h = case.cell_size
    row, col = np.mgrid[0:rows, 0:cols]
    return (col + 0.5) * h, (rows - row - 0.5) * h


def ragged_codes():
    """A domain with holes, one-cell channels, an isolated cell and fixed cells (0 interior, 1 outside, 2 fixed)."""
    art = [
        "1111111111111",
        "1000000020001",
        "1010111000001",
        "1000101112201",
        "1222101010101",
        "1000000010111",
        "1111111111101",
    ]
    return np.array([[int(ch) for ch in line] for line in art])


# --- gradient and flux ------------------------------------------------------------------------


def test_gradient_of_linear_field_is_exact():
    # Central and one-sided differences are exact on linear functions (common
    # practice, Taylor series); the y axis points up, so u = c*y rises towards row 0.
    case = make_case(ragged_codes(), h=0.25)
    x, y = centres(case)
    u = 3.0 - 1.5 * x + 4.0 * y
    u[case.codes == 1] = np.nan
    gx, gy = export.gradient(u, case)
    dom = case.codes != 1
    assert np.all(np.isnan(gx[~dom])) and np.all(np.isnan(gy[~dom]))
    # a cell with a domain neighbour along x has gx = -1.5; one with none has 0
    has_x = np.zeros_like(dom)
    has_x[:, 1:] |= dom[:, :-1]
    has_x[:, :-1] |= dom[:, 1:]
    has_y = np.zeros_like(dom)
    has_y[1:] |= dom[:-1]
    has_y[:-1] |= dom[1:]
    assert np.allclose(gx[dom & has_x], -1.5, rtol=0, atol=1e-12)
    assert np.all(gx[dom & ~has_x] == 0.0)
    assert np.allclose(gy[dom & has_y], 4.0, rtol=0, atol=1e-12)
    assert np.all(gy[dom & ~has_y] == 0.0)
    assert (dom & ~has_x).any() and (dom & ~has_y).any()  # the layout really has such cells


def test_gradient_central_versus_one_sided():
    # On u = x², the central difference is exact (2x) and a one-sided one is
    # off by ±h (Taylor series, common practice): this tells which rule ran.
    codes = np.zeros((1, 6), dtype=np.uint8)
    codes[0, 4] = 1  # a hole: cells 3 and 5 see it
    case = make_case(codes, h=0.5)
    x, _ = centres(case)
    u = x**2
    gx, gy = export.gradient(u, case)
    h = 0.5
    expected = [
        2 * x[0, 0] + h,  # left border: forward difference
        2 * x[0, 1],
        2 * x[0, 2],
        2 * x[0, 3] - h,  # right neighbour is a hole: backward difference
        np.nan,
        0.0,  # cell 5 has no domain neighbour along x
    ]
    assert np.allclose(gx[0], expected, equal_nan=True, rtol=0, atol=1e-12)
    assert np.allclose(gy[0], [0, 0, 0, 0, np.nan, 0], equal_nan=True)


def slab_case(k_left, k_right, split, cols=12, rows=3, h=0.01):
    """A 1-D slab along x: fixed columns at both ends, two materials meeting at column ``split``."""
    left = Region("left", "#ffffff", "interior", conductivity=k_left)
    right = Region("right", "#eeeeee", "interior", conductivity=k_right)
    codes = np.zeros((rows + 2, cols), dtype=np.uint8)
    codes[:, split:] = 1
    codes[:, 0] = 2
    codes[:, -1] = 3
    codes[0, :] = 4
    codes[-1, :] = 4  # insulated top and bottom (outside rows)
    regions = (left, right, HOT, COLD, OUTSIDE)
    return make_case(codes, regions=regions, h=h)


def slab_field(case, k_left, k_right, split, t_hot=100.0, t_cold=0.0):
    """The exact solution of the slab, piecewise linear (series thermal resistance)."""
    rows, cols = case.shape
    h = case.cell_size
    x0, x1 = 0.5 * h, (cols - 0.5) * h  # fixed values sit at their cell centres
    xi = split * h  # the material interface
    r_total = (xi - x0) / k_left + (x1 - xi) / k_right
    q = (t_hot - t_cold) / r_total
    x, _ = centres(case)
    u = np.where(x <= xi, t_hot - q * (x - x0) / k_left, t_hot - q * (xi - x0) / k_left - q * (x - xi) / k_right)
    u[case.codes == 4] = np.nan
    return u, q


def test_flux_of_uniform_slab_is_fouriers_law():
    # Fourier's law for a plane wall with fixed faces: q = k ΔT / L
    # (Incropera & DeWitt, Fundamentals of Heat and Mass Transfer, ch. 3),
    # L measured between the fixed cells' centres (the contract).
    k = 2.0
    case = slab_case(k, k, split=6)
    u, q = slab_field(case, k, k, split=6)
    rows, cols = case.shape
    assert q == pytest.approx(k * 100.0 / ((cols - 1) * case.cell_size))
    qx, qy = export.flux(u, case)
    inner = case.codes <= 1
    assert np.allclose(qx[inner], q, rtol=1e-12)
    assert np.allclose(qy[inner], 0.0, atol=1e-9)
    assert np.all(np.isnan(qx[case.codes == 4]))
    peak = export.peak_flux(u, case)
    assert peak["value"] == pytest.approx(q, rel=1e-12)
    r, c = peak["row"], peak["col"]
    assert case.codes[r, c] != 4
    assert peak["x"] == pytest.approx((c + 0.5) * case.cell_size)
    assert peak["y"] == pytest.approx((rows - r - 0.5) * case.cell_size)
    json.dumps(peak, allow_nan=False)  # fit for the report


def test_flux_of_two_layer_slab_is_series_resistance():
    # Plane walls in series: q = ΔT / (L1/k1 + L2/k2) (thermal resistance
    # network, Incropera & DeWitt ch. 3). Away from the interface the central
    # differences see one material and give q exactly; the contract's harmonic
    # face conductance makes this the exact discrete solution too.
    k1, k2, split = 1.0, 4.0, 5
    case = slab_case(k1, k2, split=split, cols=14)
    u, q = slab_field(case, k1, k2, split)
    qx, qy = export.flux(u, case)
    away = np.zeros(case.shape, dtype=bool)
    away[1:-1, 1 : split - 1] = True
    away[1:-1, split + 1 : -1] = True
    assert np.allclose(qx[away], q, rtol=1e-12)
    assert np.allclose(qy[1:-1], 0.0, atol=1e-9)
    # the lower-conductivity layer carries the steeper gradient, k1 |du/dx| = k2 |du/dx|
    gx, _ = export.gradient(u, case)
    assert gx[2, 2] == pytest.approx(k2 / k1 * gx[2, split + 2], rel=1e-12)


def test_fixed_cell_conductivity_rule():
    # Our documented choice: a fixed region's own conductivity if declared,
    # else the mean of the neighbouring interior cells', else NaN.
    soft = Region("soft", "#ffffff", "interior", conductivity=1.0)
    hard = Region("hard", "#eeeeee", "interior", conductivity=3.0)
    bare = Region("bare", "#ff0000", "fixed", value=1.0)
    clad = Region("clad", "#00ff00", "fixed", value=1.0, conductivity=7.0)
    codes = np.array(
        [
            [0, 2, 1, 4],
            [4, 2, 4, 4],
            [4, 2, 3, 4],
        ]
    )
    case = make_case(codes, regions=(soft, hard, bare, clad, OUTSIDE))
    k = export.cell_conductivity(case)
    assert k[0, 0] == 1.0 and k[0, 2] == 3.0
    assert k[0, 1] == 2.0  # between k = 1 and k = 3
    assert np.isnan(k[1, 1])  # a fixed cell with no interior neighbour
    assert np.isnan(k[2, 1])
    assert k[2, 2] == 7.0
    assert np.isnan(k[0, 3])


def test_peak_flux_location():
    # u = x² on one row: |du/dx| = 2x grows to the right (calculus), so the
    # peak is the right-most domain cell, whose one-sided difference is 2x - h.
    codes = np.ones((5, 8), dtype=np.uint8)
    codes[3, 1:7] = 0
    case = make_case(codes, h=0.1)
    x, _ = centres(case)
    u = np.where(codes == 0, x**2, np.nan)
    peak = export.peak_flux(u, case)
    assert (peak["row"], peak["col"]) == (3, 6)
    assert peak["x"] == pytest.approx(0.65) and peak["y"] == pytest.approx(0.15)
    assert peak["value"] == pytest.approx(2.0 * (2 * 0.65 - 0.1))
    assert peak["qx"] == pytest.approx(-peak["value"]) and peak["qy"] == 0.0
    empty = make_case(np.ones((2, 2)))
    assert export.peak_flux(np.full((2, 2), np.nan), empty)["row"] is None


# --- the picture ---------------------------------------------------------------------------------


def ramp_case(rows=4, cols=256, h=1.0):
    return make_case(np.zeros((rows, cols)), h=h)


def read_png(path):
    with Image.open(path) as im:
        assert im.mode == "RGBA"
        return np.asarray(im).copy()


def test_picture_of_linear_ramp(tmp_path):
    # With u = col and the default range, t = col / 255 and cell col is drawn in
    # palette entry col exactly (the scale's definition: entry i is t = i/255).
    case = ramp_case(rows=4, cols=256)
    u = np.tile(np.arange(256.0), (4, 1))
    out = export.write_picture(tmp_path / "ramp.png", u, case, scale=2)
    px = read_png(out)
    _, layout = export.render_picture(u, case, scale=2)
    assert px.shape == (layout.height, layout.width, 4)
    for col in (0, 1, 77, 128, 200, 255):
        block = px[0:8, 2 * col : 2 * col + 2]
        assert np.all(block[..., :3] == colormap.PALETTE[col]), col
        assert np.all(block[..., 3] == 255)
    # the colour bar: vmax's colour at the top, vmin's at the bottom
    x0, y0, x1, y1 = layout.bar_box
    mid = (x0 + x1) // 2
    assert np.array_equal(px[y0, mid, :3], colormap.PALETTE[255])
    assert np.array_equal(px[y1 - 1, mid, :3], colormap.PALETTE[0])
    bar_l = colormap.srgb_to_oklab(px[y0:y1, mid, :3])[:, 0]
    assert np.all(np.diff(bar_l) <= 1e-12)  # lightness falls from top to bottom
    assert layout.ticks[0] >= 0.0 and layout.ticks[-1] <= 255.0 and len(layout.ticks) >= 2


def test_picture_ramp_positions_not_on_entries(tmp_path):
    # u = col on 52 columns: t = col/51 and the entry is rint(255 t) = 5 col.
    case = ramp_case(rows=2, cols=52)
    u = np.tile(np.arange(52.0), (2, 1))
    px = read_png(export.write_picture(tmp_path / "r.png", u, case, vmin=0.0, vmax=51.0))
    for col in (0, 9, 30, 51):
        assert np.array_equal(px[1, col, :3], colormap.PALETTE[5 * col])
    # an explicit range clips: values above vmax take the top colour
    px = read_png(export.write_picture(tmp_path / "c.png", u, case, vmin=0.0, vmax=10.0))
    assert np.array_equal(px[0, 40, :3], colormap.PALETTE[255])


def test_outside_cells_are_transparent_and_fixed_outlined():
    codes = np.zeros((6, 10), dtype=np.uint8)
    codes[:, 0] = 2  # hot column on the left
    codes[0, :] = 1  # outside along the top
    codes[3, 5] = 1  # a hole
    case = make_case(codes)
    u = np.where(codes == 1, np.nan, 50.0)
    u[codes == 2] = 100.0
    image, layout = export.render_picture(u, case, scale=3, vmin=0.0, vmax=100.0)
    px = np.asarray(image)
    alpha = px[: 6 * 3, : 10 * 3, 3]
    dom = np.repeat(np.repeat(codes != 1, 3, 0), 3, 1)
    assert np.all(alpha[~dom] == 0) and np.all(alpha[dom] == 255)
    assert np.all(px[: 6 * 3, : 10 * 3][~dom][:, :3] == 0)
    # beside the field, left of the panel: transparent too
    assert np.all(px[:, layout.field_box[2], 3] == 0)
    # the hot column (palette top, a light colour) has a dark outline on its
    # right side (meets the plate) and its top side (meets the outside), not
    # along the image border
    hot = colormap.PALETTE[255]
    cell = px[2 * 3 : 3 * 3, 0:3, :3]  # the hot cell in row 2
    assert np.all(cell[:, 2] < 60)  # right edge: dark line
    assert np.all(cell[:, :2] == hot)  # rest: the cell's colour
    top = px[1 * 3 : 2 * 3, 0:3, :3]  # the hot cell in row 1 meets the outside above
    assert np.all(top[0] < 60) and np.all(top[1, :2] == hot)
    # the plate cells keep their colour right up to the hot column
    assert np.all(px[2 * 3 : 3 * 3, 3:6, :3] == colormap.colors(0.5))
    # a domain cell without a value is drawn opaque in the no-data grey
    u[4, 4] = np.nan
    px = np.asarray(export.render_picture(u, case, vmin=0.0, vmax=100.0)[0])
    assert np.array_equal(px[4, 4], [*colormap.NO_DATA, 255])


def changed_pixels(u, case, **kw):
    plain, layout = export.render_picture(u, case, **{k: v for k, v in kw.items() if k != "isolines"})
    lined, layout2 = export.render_picture(u, case, **kw)
    diff = np.any(np.asarray(plain) != np.asarray(lined), axis=2)
    return diff, layout2


def test_isolines_fall_where_the_ramp_crosses():
    # For u linear in x, u = level exactly where x = level (+ half a cell, as
    # u = col is the value at the cell centre): the line sits in the pixel at
    # (level + 0.5) * scale (linear interpolation is exact on a linear field).
    case = ramp_case(rows=5, cols=40)
    u = np.tile(np.arange(40.0), (5, 1))
    levels = [10.25, 20.5, 30.75]
    diff, layout = changed_pixels(u, case, scale=4, isolines=levels)
    field = diff[: 5 * 4, : 40 * 4]
    cols = sorted(set(np.nonzero(field)[1]))
    assert cols == [int((v + 0.5) * 4) for v in levels]  # 43, 84, 125
    assert np.all(field[:, cols])  # every row of the picture
    assert not diff[:, 40 * 4 :].any()  # the colour bar is untouched
    assert layout.levels == tuple(levels)


def test_isolines_along_rows_and_across_strips(monkeypatch):
    # u rising upwards (u = y): the lines are horizontal, at the pixel row of
    # y = level; forcing tiny strips must not change a single pixel.
    case = ramp_case(rows=30, cols=7)
    _, y = centres(case)
    u = y - 0.5  # u = 0 at the bottom row's centre, 29 at the top row's
    diff, layout = changed_pixels(u, case, scale=3, isolines=4)
    assert layout.levels == pytest.approx([29 * k / 5 for k in range(1, 5)])  # N evenly spaced inside the range
    rows_hit = sorted(set(np.nonzero(diff[: 30 * 3, : 7 * 3])[0]))
    # level L lies at y = L + 0.5 cells from the bottom: picture row (30 - L - 0.5) * 3
    assert rows_hit == sorted(int(np.floor((30 - v - 0.5) * 3)) for v in layout.levels)
    levels = [3.75, 12.5, 20.1]  # off-centre crossings, at a scale that resolves them
    diff, _ = changed_pixels(u, case, scale=8, isolines=levels)
    rows_hit = sorted(set(np.nonzero(diff[: 30 * 8, : 7 * 8])[0]))
    assert rows_hit == sorted(int(np.floor((30 - v - 0.5) * 8)) for v in levels)
    whole, _ = export.render_picture(u, case, scale=3, isolines=4)
    monkeypatch.setattr(pictures, "_STRIP_PIXELS", 1)  # one cell row per strip
    strips, _ = export.render_picture(u, case, scale=3, isolines=4)
    assert np.array_equal(np.asarray(whole), np.asarray(strips))


def test_constant_field_and_bad_options():
    case = ramp_case(rows=3, cols=3)
    image, layout = export.render_picture(np.full((3, 3), 7.0), case, isolines=5)
    assert layout.vmin == layout.vmax == 7.0 and layout.levels == () and layout.ticks == (7.0,)
    assert np.array_equal(np.asarray(image)[1, 1, :3], colormap.colors(0.5))
    with pytest.raises(UsageError):
        export.render_picture(np.zeros((3, 3)), case, scale=0)
    with pytest.raises(UsageError):
        export.render_picture(np.zeros((3, 3)), case, vmin=2.0, vmax=1.0)
    with pytest.raises(UsageError):
        export.render_picture(np.zeros((2, 3)), case)


# --- VTK ------------------------------------------------------------------------------------------


def decode_array(element):
    # VTK XML inline binary, uncompressed, header_type UInt64: base64 of an
    # 8-byte little-endian byte count followed by the data (VTK User's Guide,
    # "VTK File Formats"; from memory).
    raw = base64.b64decode("".join(element.text.split()))
    count = int(np.frombuffer(raw[:8], "<u8")[0])
    assert count == len(raw) - 8
    dtype = {"Float64": "<f8", "Int32": "<i4"}[element.get("type")]
    return np.frombuffer(raw[8:], dtype)


def test_vtk_round_trip(tmp_path):
    codes = ragged_codes()
    case = make_case(codes, h=0.002, quantity="potential")
    rows, cols = case.shape
    x, y = centres(case)
    u = 5.0 + 1000.0 * y  # depends on y only: shows which way rows are written
    u[codes == 1] = np.nan
    path = export.write_vtk(tmp_path / "f.vti", u, case)
    root = ET.parse(path).getroot()
    assert root.tag == "VTKFile" and root.get("type") == "ImageData"
    assert root.get("byte_order") == "LittleEndian" and root.get("header_type") == "UInt64"
    grid = root.find("ImageData")
    assert grid.get("WholeExtent").split() == ["0", str(cols), "0", str(rows), "0", "0"]
    assert [float(v) for v in grid.get("Spacing").split()] == [0.002] * 3
    assert [float(v) for v in grid.get("Origin").split()] == [0.0, 0.0, 0.0]
    cells = grid.find("Piece/CellData")
    arrays = {a.get("Name"): a for a in cells.findall("DataArray")}
    assert set(arrays) == {"potential", "region", "flux"}
    assert cells.get("Scalars") == "potential" and cells.get("Vectors") == "flux"
    # VTK ImageData orders cells x fastest, then y (up), from the origin: cell
    # (i, j) has its centre at ((i + 0.5) h, (j + 0.5) h) (VTK file formats).
    values = decode_array(arrays["potential"]).reshape(rows, cols)
    j = np.arange(rows)[:, None]
    dom = (codes != 1)[::-1]
    assert np.allclose(values[dom], np.broadcast_to(5.0 + 1000.0 * (j + 0.5) * 0.002, (rows, cols))[dom])
    assert np.all(np.isnan(values[~dom]))
    assert np.array_equal(decode_array(arrays["region"]).reshape(rows, cols), codes[::-1])
    assert arrays["flux"].get("NumberOfComponents") == "3"
    q = decode_array(arrays["flux"]).reshape(rows, cols, 3)
    qx, qy = export.flux(u, case)
    assert np.array_equal(q[..., 0], qx[::-1], equal_nan=True)
    assert np.array_equal(q[..., 1], qy[::-1], equal_nan=True)
    assert np.all(q[..., 2] == 0.0)


def test_vtk_long_array_streams_in_pieces(tmp_path, monkeypatch):
    # The base64 pieces must join into one valid stream (every piece but the
    # last a multiple of 3 bytes): a tiny piece size exercises the seams.
    monkeypatch.setattr(fields, "_B64_CHUNK", 6)
    case = ramp_case(rows=3, cols=5)
    u = np.arange(15.0).reshape(3, 5)
    root = ET.parse(export.write_vtk(tmp_path / "s.vti", u, case)).getroot()
    arrays = {a.get("Name"): a for a in root.iter("DataArray")}
    assert np.array_equal(decode_array(arrays["temperature"]).reshape(3, 5), u[::-1])


# --- bundle and loader ---------------------------------------------------------------------------------


def fake_history(n=4):
    return SimpleNamespace(
        sweep=np.arange(1.0, n + 1),
        seconds=np.linspace(0.1, 0.4, n),
        residual=np.array([1.0, 0.5, 0.25, 0.125])[:n],
        estimated_error=np.array([np.inf, 2.0, 1.0, 0.5])[:n],
        omega=np.full(n, 1.9),
    )


def test_bundle_round_trip(tmp_path):
    case = make_case(ragged_codes())
    u = np.where(case.codes == 1, np.nan, 1.5)
    report = {"case": "made", "status": "converged", "sweeps": 4, "unit": "°C"}
    path = export.write_bundle(tmp_path / "run.npz", field=u, case=case, history=fake_history(), report=report)
    with np.load(path, allow_pickle=False) as z:
        assert np.array_equal(z["field"], u, equal_nan=True) and z["field"].dtype == np.float64
        assert np.array_equal(z["codes"], case.codes) and z["codes"].dtype == np.uint8
        assert list(z["regions"]) == [r.name for r in case.regions]
        assert list(z["history_columns"]) == ["sweep", "seconds", "residual", "estimated_error", "omega"]
        h = z["history"]
        assert h.shape == (4, 5) and h.dtype == np.float64
        assert np.array_equal(h[:, 2], [1.0, 0.5, 0.25, 0.125]) and h[0, 3] == np.inf
        assert json.loads(z["report"].item()) == report
    loaded = export.load_field(path, case.shape)
    assert np.array_equal(loaded, u, equal_nan=True)


def test_load_field_accepts_npy_and_float32(tmp_path):
    u = np.arange(6.0).reshape(2, 3)
    np.save(tmp_path / "a.npy", u)
    np.save(tmp_path / "b.npy", u.astype(np.float32))
    np.save(tmp_path / "c.npy", u.astype(">f8"))
    for name in ("a.npy", "b.npy", "c.npy"):
        got = export.load_field(tmp_path / name, (2, 3))
        assert got.dtype == np.float64 and got.flags.c_contiguous and np.array_equal(got, u)


@pytest.mark.parametrize(
    "make, words",
    [
        (None, "does not exist"),
        (lambda p: p.write_text("sweep,seconds\n1,2\n"), "not a numpy file"),
        (lambda p: np.save(p, np.array([{"a": 1}, None], dtype=object), allow_pickle=True), "pickled"),
        (lambda p: np.save(p, np.zeros((3, 2))), "shape (3, 2)"),
        (lambda p: np.save(p, np.zeros((2, 3), dtype=np.int64)), "dtype int64"),
        (lambda p: np.save(p, np.zeros((2, 3), dtype=np.complex128)), "dtype complex128"),
        (lambda p: np.savez(p, codes=np.zeros((2, 3))), "no 'field'"),
        (lambda p: p.write_bytes(b"\x93NUMPY\x01\x00garbage"), "cannot be read"),
        (lambda p: p.mkdir(), "folder"),
    ],
)
def test_load_field_refusals(tmp_path, make, words):
    path = tmp_path / "bad.npy"
    if make is not None:
        make(path)
        if not path.exists() and Path(str(path) + ".npz").exists():  # np.savez appends .npz
            Path(str(path) + ".npz").rename(path)
    with pytest.raises(UsageError) as info:
        export.load_field(path, (2, 3))
    message = str(info.value)
    assert words in message and "bad.npy" in message and "\n" not in message


# --- refused targets -----------------------------------------------------------------------------------


@pytest.mark.parametrize("kind", ["picture", "vtk", "bundle"])
def test_missing_folder_is_refused_before_work(tmp_path, kind):
    case = ramp_case(rows=2, cols=2)
    target = tmp_path / "no-such-folder" / "out.bin"
    bad_field = np.zeros((5, 5))  # wrong shape: the folder check must come first
    with pytest.raises(OutputError, match="does not exist"):
        if kind == "picture":
            export.write_picture(target, bad_field, case)
        elif kind == "vtk":
            export.write_vtk(target, bad_field, case)
        else:
            export.write_bundle(target, field=bad_field, case=case, history=fake_history(), report={})
    assert list(tmp_path.iterdir()) == []


def test_failed_export_leaves_no_file(tmp_path):
    case = ramp_case(rows=2, cols=2)
    with pytest.raises(ValueError):  # a report that is not JSON: nothing is written
        export.write_bundle(tmp_path / "x.npz", field=np.zeros((2, 2)), case=case, history=None, report={"x": np.nan})
    assert list(tmp_path.iterdir()) == []


# --- the render command ------------------------------------------------------------------------------------


def write_case_files(folder: Path):
    mask = np.zeros((6, 9, 3), dtype=np.uint8)
    mask[...] = (255, 255, 255)
    mask[:, 0] = (255, 0, 0)
    mask[:, -1] = (0, 0, 255)
    Image.fromarray(mask).save(folder / "wall.png")
    (folder / "wall.toml").write_text(
        'quantity = "temperature"\nunit = "°C"\nmask = "wall.png"\ncell_size = 0.01\n'
        + region_toml("#ffffff", "interior") + region_toml("#ff0000", "fixed", value=80.0)
        + region_toml("#0000ff", "fixed", value=20.0),
        encoding="utf-8",
    )
    return folder / "wall.toml"


def test_render_command(tmp_path, capsys):
    from relaxtui.cli import main

    toml = write_case_files(tmp_path)
    u = np.tile(80.0 - 60.0 * np.arange(9) / 8, (6, 1))  # the wall's exact linear profile
    np.save(tmp_path / "field.npy", u)
    out = tmp_path / "field.png"
    code = main(["render", str(tmp_path / "field.npy"), "--case", str(toml), "-o", str(out), "--scale", "2", "--isolines", "3"])
    assert code == 0
    assert capsys.readouterr().out.strip() == str(out)
    px = read_png(out)
    assert np.array_equal(px[0, 2 * 4, :3], colormap.colors(0.5))  # column 4 holds the middle value 50
    # a field of the wrong shape: exit 2, one line, nothing written
    np.save(tmp_path / "small.npy", np.zeros((2, 2)))
    out2 = tmp_path / "small.png"
    code = main(["render", str(tmp_path / "small.npy"), "--case", str(toml), "-o", str(out2)])
    err = capsys.readouterr().err
    assert code == 2 and "shape (2, 2)" in err and err.count("\n") == 1
    assert not out2.exists()
    code = main(["render", str(tmp_path / "field.npy"), "--case", str(toml), "-o", str(tmp_path / "nope" / "f.png")])
    assert code == 2 and "does not exist" in capsys.readouterr().err
