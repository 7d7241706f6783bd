"""Exports of a solved field: derived gradient and flux, a colour picture, VTK, a bundle.

Coordinates follow the contract (``case-format.md``): ``field[row, col]`` in
image order, row 0 at the top; a cell's centre is at
``x = (col + 0.5) * h``, ``y = (rows - row - 0.5) * h`` metres, x to the
right and y *up*. Gradients and fluxes are in that x-y frame.

Every file goes through :mod:`relaxtui.output` (atomic, folder checked first).

Public functions
----------------
gradient, flux, peak_flux
    Cell-centred derivatives of a field (numpy, vectorised).
render_picture, write_picture
    A colour PNG with a colour bar, fixed-region outlines and optional isolines.
write_vtk
    VTK ImageData XML (``.vti``) with the field, region codes and flux as cell data.
write_bundle, load_field
    One ``.npz`` with field, codes, history and report; the loader for ``--initial``.
run_render
    The ``relaxtui render`` command.
"""

from __future__ import annotations

import base64
import json
import math
import os
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from relaxtui import colormap
from relaxtui.errors import UsageError
from relaxtui.model import FIXED, INTERIOR, Case
from relaxtui.output import atomic_write, check_target

# --- derivatives -------------------------------------------------------------------------


def domain_mask(case: Case) -> np.ndarray:
    """Boolean (rows, cols): the cells that hold values (interior and fixed)."""
    kinds = case.kind_codes()[case.codes]
    return (kinds == INTERIOR) | (kinds == FIXED)


def _check_field(field, case: Case) -> np.ndarray:
    field = np.asarray(field)
    if field.shape != case.shape:
        raise UsageError(f"field has shape {field.shape}, the case's grid is {case.shape}")
    if field.dtype.kind != "f":
        raise UsageError(f"field must be a floating-point array, not {field.dtype}")
    return field.astype(np.float64, copy=False)


def gradient(field, case: Case) -> tuple[np.ndarray, np.ndarray]:
    """The gradient (∂u/∂x, ∂u/∂y) of a cell-centred field, in field units per metre.

    x points right (increasing column), y points *up* (decreasing row). In
    each direction: a central difference ``(u_next - u_prev) / 2h`` where both
    neighbours are domain cells (interior or fixed), a one-sided difference
    ``± (u_nbr - u) / h`` where only one is, and 0 where neither is. Cells
    outside the domain get NaN. These differences are exact on linear fields
    (common practice). Across a change of conductivity the field has a kink,
    so a central difference there averages the two sides.

    Returns two new float64 arrays of shape (rows, cols).
    """
    u = _check_field(field, case)
    dom = domain_mask(case)
    h = float(case.cell_size)
    gx = _derivative(u, dom, axis=1, h=h)  # towards increasing column = +x
    gy = _derivative(u, dom, axis=0, h=h)
    np.negative(gy, out=gy)  # increasing row is -y
    return gx, gy


def _derivative(u: np.ndarray, dom: np.ndarray, axis: int, h: float) -> np.ndarray:
    """d u / d(index along ``axis``) / h with the central / one-sided / zero rule above."""
    out = np.zeros(u.shape, dtype=np.float64)
    if u.shape[axis] < 2:
        out[~dom] = np.nan
        return out
    lo = [slice(None)] * 2
    hi = [slice(None)] * 2
    lo[axis], hi[axis] = slice(None, -1), slice(1, None)
    lo, hi = tuple(lo), tuple(hi)
    # forward difference of each pair of neighbours in the domain, stored at the pair
    pair = dom[lo] & dom[hi]
    diff = np.where(pair, u[hi] - u[lo], 0.0)
    has_next = np.zeros(u.shape, dtype=bool)  # the neighbour at index + 1 is in the domain
    has_prev = np.zeros(u.shape, dtype=bool)
    has_next[lo] = pair
    has_prev[hi] = pair
    out[lo] += diff  # forward difference of the cell
    out[hi] += diff  # backward difference of the next cell
    both = has_next & has_prev
    out[both] *= 0.5
    out /= h
    out[~dom] = np.nan
    return out


def cell_conductivity(case: Case) -> np.ndarray:
    """Conductivity per cell (float64, rows x cols) as used by :func:`flux`.

    Interior cells: their region's conductivity (1.0 where the region gives
    none, the contract's default). Fixed cells: their region's own
    conductivity if it declares one; without one, the mean conductivity of the
    cell's 4-neighbour interior cells (the contract lets a face to a fixed cell
    without conductivity use the interior cell's alone), and NaN when the cell
    has no interior neighbour (no material is known there). Other cells: NaN.
    """
    per_region = np.full(len(case.regions) + 1, np.nan)
    inherit = np.zeros(len(case.regions) + 1, dtype=bool)
    for i, region in enumerate(case.regions):
        if region.kind == "interior":
            per_region[i] = 1.0 if region.conductivity is None else float(region.conductivity)
        elif region.kind == "fixed":
            if region.conductivity is None:
                inherit[i] = True
            else:
                per_region[i] = float(region.conductivity)
    k = per_region[case.codes]
    rr, cc = np.nonzero(inherit[case.codes])
    if rr.size:
        rows, cols = case.shape
        kinds = case.kind_codes()[case.codes]
        total = np.zeros(rr.size)
        count = np.zeros(rr.size)
        for dr, dc in ((-1, 0), (1, 0), (0, -1), (0, 1)):
            r2, c2 = rr + dr, cc + dc
            inside = (r2 >= 0) & (r2 < rows) & (c2 >= 0) & (c2 < cols)
            r2, c2 = np.clip(r2, 0, rows - 1), np.clip(c2, 0, cols - 1)
            interior = inside & (kinds[r2, c2] == INTERIOR)
            total += np.where(interior, k[r2, c2], 0.0)
            count += interior
        with np.errstate(invalid="ignore", divide="ignore"):
            k[rr, cc] = np.where(count > 0, total / count, np.nan)
    return k


def flux(field, case: Case) -> tuple[np.ndarray, np.ndarray]:
    """The flux density q = −k ∇u per cell (Fourier's law), x right and y up.

    Units: conductivity × field unit per metre (W/m² for a thermal case in
    W/(m·K) and K). k is :func:`cell_conductivity`; NaN outside the domain and
    in fixed cells whose conductivity is unknown.
    """
    gx, gy = gradient(field, case)
    k = cell_conductivity(case)
    np.multiply(gx, k, out=gx)
    np.multiply(gy, k, out=gy)
    np.negative(gx, out=gx)
    np.negative(gy, out=gy)
    return gx, gy


def peak_flux(field, case: Case) -> dict:
    """The cell with the largest flux magnitude |q| = k |∇u|, for the report.

    Returns ``{"value", "qx", "qy", "row", "col", "x", "y"}``: the magnitude
    and components (conductivity × field unit per metre), the cell in image
    order, and its centre in metres (x right, y up from the bottom-left
    corner). The first such cell in row-major order wins a tie. With no cell of
    known flux, value is 0.0 and the position keys are None.
    """
    qx, qy = flux(field, case)
    mag = np.hypot(qx, qy)
    finite = np.isfinite(mag)
    if not finite.any():
        return {"value": 0.0, "qx": 0.0, "qy": 0.0, "row": None, "col": None, "x": None, "y": None}
    mag[~finite] = -1.0
    flat = int(np.argmax(mag))
    row, col = divmod(flat, case.shape[1])
    h = float(case.cell_size)
    return {
        "value": float(mag[row, col]),
        "qx": float(qx[row, col]),
        "qy": float(qy[row, col]),
        "row": row,
        "col": col,
        "x": (col + 0.5) * h,
        "y": (case.shape[0] - row - 0.5) * h,
    }


# --- the picture --------------------------------------------------------------------------

# A picture larger than this (pixels, field and colour bar) is refused: its
# RGBA image alone would take 1 GiB of memory.
MAX_PICTURE_PIXELS = 1 << 28
# Work on the field part in strips of about this many pixels.
_STRIP_PIXELS = 1 << 22

_PANEL_BACKGROUND = (255, 255, 255, 255)
_TEXT = (32, 32, 32, 255)
_BAR_BORDER = (64, 64, 64, 255)
_DARK = np.array([24, 24, 24], dtype=np.float64)
_LIGHT = np.array([250, 250, 250], dtype=np.float64)
# Lines (outlines, isolines) are dark over light colours and light over dark
# ones: Oklab lightness of the colour underneath above this gets a dark line.
_LIGHT_ABOVE = 0.62
ISOLINE_OPACITY = 0.7  # isolines are blended; fixed-region outlines are opaque


def _contrast_table() -> np.ndarray:
    """Line colour (float RGB) for each palette index, the last row for NO_DATA."""
    colours = np.vstack([colormap.PALETTE, colormap.NO_DATA[None, :]])
    lightness = colormap.srgb_to_oklab(colours)[:, 0]
    return np.where((lightness > _LIGHT_ABOVE)[:, None], _DARK, _LIGHT)


_CONTRAST = _contrast_table()
_PALETTE_EXT = np.vstack([colormap.PALETTE, colormap.NO_DATA[None, :]])  # index 256 = no data


@dataclass(frozen=True)
class PictureLayout:
    """Where things are in a picture made by :func:`render_picture` (pixels, x right, y down)."""

    width: int
    height: int
    scale: int
    field_box: tuple[int, int, int, int]  # x0, y0, x1, y1 (exclusive) of the field
    bar_box: tuple[int, int, int, int]  # the colour ramp inside its border
    vmin: float
    vmax: float
    ticks: tuple[float, ...]
    levels: tuple[float, ...]  # isoline levels drawn


def _value_range(u: np.ndarray, dom: np.ndarray, vmin, vmax) -> tuple[float, float]:
    values = u[dom]
    values = values[np.isfinite(values)]
    lo = float(values.min()) if vmin is None and values.size else (0.0 if vmin is None else float(vmin))
    hi = float(values.max()) if vmax is None and values.size else (0.0 if vmax is None else float(vmax))
    if not (math.isfinite(lo) and math.isfinite(hi)):
        raise UsageError(f"picture range must be finite, got {lo:g} .. {hi:g}")
    if lo > hi:
        raise UsageError(f"picture range is empty: vmin {lo:g} > vmax {hi:g}")
    return lo, hi


def _levels(isolines, lo: float, hi: float) -> np.ndarray:
    if isolines is None:
        return np.empty(0)
    if isinstance(isolines, (bool, np.bool_)):
        raise UsageError("isolines must be a count or a list of levels, not a boolean")
    if isinstance(isolines, (int, np.integer)):
        n = int(isolines)
        if n < 0:
            raise UsageError(f"isolines must be at least 0, got {n}")
        if n == 0 or hi <= lo:
            return np.empty(0)
        return lo + (hi - lo) * np.arange(1, n + 1) / (n + 1)
    levels = np.asarray(isolines, dtype=np.float64).ravel()
    if not np.all(np.isfinite(levels)):
        raise UsageError("isoline levels must be finite numbers")
    return np.unique(levels)


def _font(size: int):
    from PIL import ImageFont

    try:
        return ImageFont.load_default(size=size)
    except (TypeError, ValueError, OSError, ImportError):  # no FreeType: the fixed bitmap font
        return ImageFont.load_default()


def _text_size(font, text: str) -> tuple[int, int]:
    x0, y0, x1, y1 = font.getbbox(text)
    return int(math.ceil(x1 - min(x0, 0))), int(math.ceil(y1 - min(y0, 0)))


def _bar_title(case: Case) -> str:
    quantity = (case.quantity or "").strip()
    unit = (case.unit or "").strip()
    if quantity and unit:
        return f"{quantity} ({unit})"
    return quantity or unit


def render_picture(field, case: Case, *, scale: int = 1, isolines=None, vmin=None, vmax=None):
    """Draw a field as an RGBA Pillow image; return ``(image, layout)``.

    The field occupies the top-left ``cols*scale x rows*scale`` pixels, each
    cell a ``scale x scale`` block in the colour :func:`relaxtui.colormap.colors`
    gives ``(u - vmin) / (vmax - vmin)`` (mid-scale when vmin == vmax); cells
    outside the domain are fully transparent; a domain cell without a value
    (NaN) is drawn in :data:`colormap.NO_DATA`. A fixed cell is outlined
    (1 pixel, opaque, dark over light colours and light over dark ones) on
    each side where it meets a cell of another region. Isolines (``isolines``:
    a count N of evenly spaced levels strictly between vmin and vmax, or a
    sequence of levels) are marked between neighbouring domain cells whose
    values straddle a level, at the linearly interpolated crossing, blended
    at :data:`ISOLINE_OPACITY`. The colour bar sits on an opaque white panel
    to the right: vmax at the top, vmin at the bottom, round tick values and
    the case's quantity and unit above it. ``vmin``/``vmax`` default to the
    range of the domain's finite values.

    The field part is built in strips, so the memory used is the image itself
    plus a few megabytes.
    """
    from PIL import Image, ImageDraw

    u = _check_field(field, case)
    if isinstance(scale, bool) or not isinstance(scale, (int, np.integer)) or scale < 1:
        raise UsageError(f"scale must be a whole number of at least 1, got {scale!r}")
    s = int(scale)
    rows, cols = case.shape
    dom = domain_mask(case)
    lo, hi = _value_range(u, dom, vmin, vmax)
    levels = _levels(isolines, lo, hi)

    # --- layout --------------------------------------------------------------
    field_w, field_h = cols * s, rows * s
    font_px = int(min(max(round(max(field_h, 240) / 40), 11), 36))
    font = _font(font_px)
    text_h = _text_size(font, "0123456789")[1]
    margin = max(6, font_px // 2)
    title = _bar_title(case)
    title_w, title_h = _text_size(font, title) if title else (0, 0)
    bar_w = max(12, int(round(font_px * 1.4)))
    min_bar_h = 8 * text_h
    height = max(field_h, margin + title_h + margin + text_h + min_bar_h + text_h + margin)
    bar_top = margin + (title_h + margin if title else 0) + text_h // 2 + 1
    bar_bottom = height - margin - text_h // 2 - 1  # exclusive, inside the border
    bar_h = bar_bottom - bar_top
    n_ticks = int(min(max(bar_h // (3 * text_h), 2), 8))
    ticks = colormap.nice_ticks(lo, hi, n_ticks) if hi > lo else [lo]
    labels = colormap.format_ticks(ticks)
    label_w = max((_text_size(font, t)[0] for t in labels), default=0)
    tick_len = max(3, font_px // 3)
    panel_w = max(margin + bar_w + 2 + tick_len + 3 + label_w + margin, title_w + 2 * margin)
    panel_x = field_w + (margin if field_w else 0)
    width = panel_x + panel_w
    if width * height > MAX_PICTURE_PIXELS:
        raise UsageError(
            f"picture would be {width} x {height} pixels (more than {MAX_PICTURE_PIXELS:,}); use a smaller scale"
        )
    bar_x0 = panel_x + margin + 1
    bar_x1 = bar_x0 + bar_w

    image = Image.new("RGBA", (width, height), (0, 0, 0, 0))

    # --- the field, in strips of whole cell rows ---------------------------------
    span = hi - lo
    strip_rows = max(1, _STRIP_PIXELS // max(1, field_w * s))
    codes = case.codes
    fixed = case.kind_codes()[codes] == FIXED
    band = np.searchsorted(levels, u, side="right") if levels.size else None
    for r0 in range(0, rows, strip_rows):
        r1 = min(rows, r0 + strip_rows)
        strip = _draw_strip(u, dom, codes, fixed, band, levels, lo, span, r0, r1, s)
        image.paste(Image.fromarray(strip), (0, r0 * s))

    # --- the colour bar panel ---------------------------------------------------------
    draw = ImageDraw.Draw(image)
    draw.rectangle([panel_x, 0, width - 1, height - 1], fill=_PANEL_BACKGROUND)
    if title:
        draw.text((panel_x + margin, margin), title, fill=_TEXT, font=font)
    if hi > lo:
        t = 1.0 - np.arange(bar_h) / max(bar_h - 1, 1)
    else:
        t = np.full(bar_h, 0.5)
    ramp = colormap.colors(t)  # (bar_h, 3), vmax at the top
    ramp = np.concatenate([ramp, np.full((bar_h, 1), 255, np.uint8)], axis=1)
    image.paste(Image.fromarray(np.ascontiguousarray(np.broadcast_to(ramp[:, None, :], (bar_h, bar_w, 4)))), (bar_x0, bar_top))
    draw.rectangle([bar_x0 - 1, bar_top - 1, bar_x1, bar_bottom], outline=_BAR_BORDER)
    for value, label in zip(ticks, labels):
        frac = 0.5 if hi <= lo else (hi - value) / span
        y = bar_top + int(round(frac * (bar_h - 1)))
        draw.line([bar_x1 + 1, y, bar_x1 + tick_len, y], fill=_BAR_BORDER)
        _, lh = _text_size(font, label)
        draw.text((bar_x1 + tick_len + 3, y - lh // 2 - 1), label, fill=_TEXT, font=font)

    layout = PictureLayout(
        width=width,
        height=height,
        scale=s,
        field_box=(0, 0, field_w, field_h),
        bar_box=(bar_x0, bar_top, bar_x1, bar_bottom),
        vmin=lo,
        vmax=hi,
        ticks=tuple(ticks),
        levels=tuple(float(v) for v in levels),
    )
    return image, layout


def _draw_strip(u, dom, codes, fixed, band, levels, lo, span, r0, r1, s) -> np.ndarray:
    """RGBA pixels (uint8) of cell rows r0..r1-1 at ``s`` pixels per cell."""
    rows, cols = u.shape
    us = u[r0:r1]
    ds = dom[r0:r1]
    with np.errstate(invalid="ignore"):
        t = (us - lo) / span if span > 0 else np.where(np.isnan(us), np.nan, 0.5)
    idx = colormap.index(t)
    idx = np.where(idx < 0, 256, idx).astype(np.int16)
    if s > 1:
        idx_px = np.repeat(np.repeat(idx, s, axis=0), s, axis=1)
        dom_px = np.repeat(np.repeat(ds, s, axis=0), s, axis=1)
    else:
        idx_px, dom_px = idx, ds
    h_px, w_px = idx_px.shape
    rgb = _PALETTE_EXT[idx_px].astype(np.float64) if levels.size else _PALETTE_EXT[idx_px]

    # isolines: a mark per crossing, at the interpolated position
    if levels.size:
        iso = np.zeros((h_px, w_px), dtype=bool)
        # horizontal neighbours (same row): a mark is a vertical run of s pixels
        a, b = us[:, :-1], us[:, 1:]
        pair = ds[:, :-1] & ds[:, 1:]
        for rr, cc, frac in _crossings(a, b, band[r0:r1, :-1], band[r0:r1, 1:], pair, levels):
            px = np.clip(np.floor((cc + 0.5 + frac) * s).astype(np.int64), cc * s, (cc + 2) * s - 1)
            for k in range(s):
                iso[rr * s + k, px] = True
        # vertical neighbours (rows r, r+1), including the pair across the strip's top edge
        q0, q1 = max(r0 - 1, 0), min(r1, rows - 1)
        if q1 > q0:
            a, b = u[q0:q1], u[q0 + 1 : q1 + 1]
            pair = dom[q0:q1] & dom[q0 + 1 : q1 + 1]
            for rr, cc, frac in _crossings(a, b, band[q0:q1], band[q0 + 1 : q1 + 1], pair, levels):
                r = rr + q0
                py = np.clip(np.floor((r + 0.5 + frac) * s).astype(np.int64), r * s, (r + 2) * s - 1)
                keep = (py >= r0 * s) & (py < r1 * s)
                py, c = py[keep] - r0 * s, cc[keep]
                for k in range(s):
                    iso[py, c * s + k] = True
        if iso.any():
            alpha = ISOLINE_OPACITY
            rgb[iso] = (1.0 - alpha) * rgb[iso] + alpha * _CONTRAST[idx_px[iso]]
        rgb = np.rint(rgb).astype(np.uint8)

    # fixed-region outlines: on a fixed cell's side that meets another region's cell
    fs = fixed[r0:r1]
    if fs.any():
        edge = np.zeros((r1 - r0, s, cols, s), dtype=bool)  # a view of the strip's pixels
        cs = codes[r0:r1]
        left = np.zeros_like(fs)
        left[:, 1:] = fs[:, 1:] & (cs[:, 1:] != cs[:, :-1])
        right = np.zeros_like(fs)
        right[:, :-1] = fs[:, :-1] & (cs[:, :-1] != cs[:, 1:])
        up = fs & np.concatenate([np.zeros((1, cols), bool) if r0 == 0 else (codes[r0 - 1 : r0] != cs[:1]), cs[1:] != cs[:-1]])
        down = fs & np.concatenate([cs[:-1] != cs[1:], np.zeros((1, cols), bool) if r1 == rows else (codes[r1 : r1 + 1] != cs[-1:])])
        edge[:, :, :, 0] |= left[:, None, :]
        edge[:, :, :, s - 1] |= right[:, None, :]
        edge[:, 0, :, :] |= up[:, :, None]
        edge[:, s - 1, :, :] |= down[:, :, None]
        edge = edge.reshape(h_px, w_px)
        if edge.any():
            rgb[edge] = _CONTRAST[idx_px[edge]].astype(np.uint8)

    out = np.empty((h_px, w_px, 4), dtype=np.uint8)
    out[..., :3] = rgb
    out[..., 3] = np.where(dom_px, 255, 0)
    out[~dom_px, :3] = 0
    return out


def _crossings(a, b, band_a, band_b, pair, levels):
    """Yield (rows, cols, frac) of each level crossed between values a and b.

    A level L is crossed between a and b when it lies in (min, max] of the two
    (``band`` counts the levels <= a value); ``frac`` in [0, 1] is where, from
    a towards b, by linear interpolation.
    """
    ok = pair & (band_a != band_b) & np.isfinite(a) & np.isfinite(b)
    if not ok.any():
        return
    rr, cc = np.nonzero(ok)
    av, bv = a[rr, cc], b[rr, cc]
    first = np.minimum(band_a[rr, cc], band_b[rr, cc])
    count = np.abs(band_a[rr, cc] - band_b[rr, cc])
    for j in range(int(count.max())):
        sel = count > j
        level = levels[first[sel] + j]
        frac = (level - av[sel]) / (bv[sel] - av[sel])
        yield rr[sel], cc[sel], np.clip(frac, 0.0, 1.0)


def write_picture(path, field, case: Case, *, scale: int = 1, isolines=None, vmin=None, vmax=None) -> Path:
    """Write :func:`render_picture`'s image as a PNG, atomically; return the path.

    The folder is checked before any drawing (:func:`relaxtui.output.check_target`).
    """
    target = check_target(path, "picture")
    image, _ = render_picture(field, case, scale=scale, isolines=isolines, vmin=vmin, vmax=vmax)
    with atomic_write(target, "wb", "picture") as f:
        image.save(f, format="PNG", compress_level=4)
    return target


# --- VTK ImageData ----------------------------------------------------------------------------

# Bytes per base64 piece: a multiple of 3, so pieces encode without padding
# and concatenate into one valid base64 stream.
_B64_CHUNK = 3 * (1 << 20)


def write_vtk(path, field, case: Case) -> Path:
    """Write the field as VTK ImageData XML (``.vti``, VTK's XML file formats), atomically.

    The grid is the picture's cells: ``WholeExtent="0 cols 0 rows 0 0"``
    (point indices), ``Spacing`` = cell_size, ``Origin`` = (0, 0, 0) at the
    picture's bottom-left corner, so VTK's y points up and rows are written
    bottom-up (image row rows-1 first), x fastest. Cell data:

    * ``<quantity>`` (the case's quantity, e.g. "temperature"), Float64, NaN
      outside the domain — the active scalars;
    * ``region``, Int32: the region index of each cell (``case.regions``
      order; an XML comment in the file lists index, name and kind);
    * ``flux``, Float64 x 3: (qx, qy, 0) from :func:`flux` — the active vectors.

    Encoding: ``format="binary"`` (inline base64), little-endian,
    ``header_type="UInt64"``, uncompressed: each array is one base64 stream of
    an 8-byte byte count followed by the raw values. The file is streamed in
    pieces, so memory stays near the size of one array.
    """
    target = check_target(path, "VTK file")
    u = _check_field(field, case)
    rows, cols = case.shape
    qx, qy = flux(u, case)
    name = _xml_attr(case.quantity or "field")
    h = repr(float(case.cell_size))
    extent = f"0 {cols} 0 {rows} 0 0"
    comment = "; ".join(f"{i} = {r.name} ({r.kind})" for i, r in enumerate(case.regions)).replace("--", "- -")

    def flipped(a):
        return np.ascontiguousarray(a[::-1])

    arrays = [
        (name, "Float64", 1, lambda: flipped(u).astype("<f8", copy=False)),
        ("region", "Int32", 1, lambda: flipped(case.codes).astype("<i4")),
        ("flux", "Float64", 3, lambda: np.stack([flipped(qx), flipped(qy), np.zeros((rows, cols))], axis=-1).astype("<f8", copy=False)),
    ]
    with atomic_write(target, "wb", "VTK file") as f:
        f.write(b'<?xml version="1.0"?>\n')
        f.write(b'<VTKFile type="ImageData" version="1.0" byte_order="LittleEndian" header_type="UInt64">\n')
        f.write(f"  <!-- relaxtui: region index = name (kind): {_xml_text(comment)} -->\n".encode())
        f.write(f'  <ImageData WholeExtent="{extent}" Origin="0 0 0" Spacing="{h} {h} {h}">\n'.encode())
        f.write(f'    <Piece Extent="{extent}">\n'.encode())
        f.write(f'      <CellData Scalars="{name}" Vectors="flux">\n'.encode())
        for array_name, vtk_type, components, make in arrays:
            data = make()
            f.write(
                f'        <DataArray type="{vtk_type}" Name="{array_name}" NumberOfComponents="{components}" format="binary">\n          '.encode()
            )
            _write_base64(f, np.uint64(data.nbytes).astype("<u8").tobytes(), memoryview(data).cast("B"))
            f.write(b"\n        </DataArray>\n")
            del data
        f.write(b"      </CellData>\n    </Piece>\n  </ImageData>\n</VTKFile>\n")
    return target


def _write_base64(f, head: bytes, body: memoryview) -> None:
    """Write base64(head + body) as one stream, in pieces."""
    first = len(head) + (-len(head)) % 3  # complete the head to a multiple of 3 from the body
    f.write(base64.b64encode(head + bytes(body[: first - len(head)])))
    pos = first - len(head)
    while pos < len(body):
        f.write(base64.b64encode(body[pos : pos + _B64_CHUNK]))
        pos += _B64_CHUNK


def _xml_attr(text: str) -> str:
    return text.replace("&", "&amp;").replace('"', "&quot;").replace("<", "&lt;").replace(">", "&gt;")


def _xml_text(text: str) -> str:
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


# --- the bundle and the field loader ---------------------------------------------------------------

HISTORY_COLUMNS = ("sweep", "seconds", "residual", "estimated_error")


def write_bundle(path, *, field, case: Case, history, report) -> Path:
    """Write one ``.npz`` archive of a run, atomically; return the path.

    Arrays (all loadable with ``numpy.load(path, allow_pickle=False)``):

    * ``field``: float64 (rows, cols), NaN outside the domain;
    * ``codes``: uint8 (rows, cols), the region index of each cell;
    * ``regions``: unicode (n,), the region names in index order;
    * ``history``: float64 (sweeps, k), one row per recorded sweep, columns
      named by ``history_columns`` — sweep, seconds, residual, estimated_error,
      and omega when the history records it;
    * ``history_columns``: unicode (k,);
    * ``report``: a 0-d unicode array holding the report as JSON text.

    ``history`` is an object with 1-D array attributes ``sweep``, ``seconds``,
    ``residual``, ``estimated_error`` (and optionally ``omega``), such as
    :class:`relaxtui.driver.History`; ``report`` is a JSON-serialisable dict.
    """
    target = check_target(path, "bundle")
    u = _check_field(field, case)
    columns = list(HISTORY_COLUMNS)
    if history is not None and getattr(history, "omega", None) is not None:
        columns.append("omega")
    if history is None:
        table = np.empty((0, len(columns)))
    else:
        cols = [np.asarray(getattr(history, c), dtype=np.float64).ravel() for c in columns]
        lengths = {len(c) for c in cols}
        if len(lengths) != 1:
            raise UsageError(f"history columns differ in length: {dict(zip(columns, map(len, cols)))}")
        table = np.column_stack(cols) if cols[0].size else np.empty((0, len(columns)))
    text = json.dumps(report, indent=2, ensure_ascii=False, allow_nan=False)
    with atomic_write(target, "wb", "bundle") as f:
        np.savez(
            f,
            field=np.ascontiguousarray(u, dtype=np.float64),
            codes=np.ascontiguousarray(case.codes, dtype=np.uint8),
            regions=np.array([r.name for r in case.regions], dtype=str),
            history=table,
            history_columns=np.array(columns, dtype=str),
            report=np.array(text, dtype=str),
        )
    return target


_NPY_MAGIC = b"\x93NUMPY"
_ZIP_MAGIC = b"PK\x03\x04"


def load_field(path, shape, what: str = "initial field") -> np.ndarray:
    """Load a field for ``--initial`` or ``render``: a ``.npy`` array or a bundle's ``field``.

    The file is recognised by its content (numpy's ``.npy`` magic, or a zip
    archive as written by :func:`write_bundle`), not its name. It must hold a
    floating-point array of the given shape: float64, or float32/float16,
    which convert to float64 exactly. Integer, boolean, complex and
    extended-precision arrays are refused (an integer array cannot hold NaN,
    the mark of a cell outside the domain), and so is anything that needs
    unpickling (object arrays). Every problem is a :class:`UsageError` with a
    one-line message naming the file. Returns a new C-contiguous float64 array.
    """
    label = f"{what} {str(path)!r}"
    p = Path(path)
    if not p.exists():
        raise UsageError(f"{label}: file does not exist")
    if p.is_dir():
        raise UsageError(f"{label}: is a folder, not a numpy file")
    try:
        with open(p, "rb") as f:
            magic = f.read(6)
            f.seek(0)
            if magic == _NPY_MAGIC:
                array = _read_npy(f, label, shape)
            elif magic[:4] == _ZIP_MAGIC:
                array = _read_bundle_field(f, label, shape)
            else:
                raise UsageError(f"{label}: not a numpy file (.npy array or .npz bundle)")
    except UsageError:
        raise
    except (OSError, ValueError, EOFError, zipfile.BadZipFile, KeyError) as exc:
        raise UsageError(f"{label}: cannot be read as numpy data ({_one_line(exc)})") from None
    return np.array(array, dtype=np.float64, order="C", copy=True)


def _check_header(label: str, dtype: np.dtype, got_shape, shape) -> None:
    if dtype.hasobject:
        raise UsageError(f"{label}: holds Python objects (pickled data), which are refused; save a float64 array")
    if dtype.kind != "f" or dtype.itemsize > 8:
        raise UsageError(f"{label}: has dtype {dtype}, a float64 (or float32) array is needed")
    if tuple(got_shape) != tuple(shape):
        raise UsageError(f"{label}: has shape {tuple(got_shape)}, the case's grid is {tuple(shape)}")


def _read_npy(f, label: str, shape) -> np.ndarray:
    from numpy.lib import format as npy

    version = npy.read_magic(f)
    if version == (1, 0):
        got_shape, fortran, dtype = npy.read_array_header_1_0(f)
    elif version == (2, 0):
        got_shape, fortran, dtype = npy.read_array_header_2_0(f)
    else:  # pragma: no cover - newer versions are read by read_array below
        got_shape, fortran, dtype = None, None, None
    if dtype is not None:
        _check_header(label, dtype, got_shape, shape)
    f.seek(0)
    array = npy.read_array(f, allow_pickle=False)
    _check_header(label, array.dtype, array.shape, shape)
    return array


def _read_bundle_field(f, label: str, shape) -> np.ndarray:
    with zipfile.ZipFile(f) as bundle:
        names = bundle.namelist()
        if "field.npy" not in names:
            arrays = ", ".join(n.removesuffix(".npy") for n in names) or "none"
            raise UsageError(f"{label}: archive has no 'field' array (arrays: {arrays})")
        with bundle.open("field.npy") as member:
            return _read_npy(member, label + " (its 'field')", shape)


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__


# --- the render command ------------------------------------------------------------------------------


def run_render(args) -> int:
    """``relaxtui render FIELD.npy --case CASE.toml -o FIELD.png [--scale K] [--isolines N]``."""
    target = check_target(args.output, "picture")
    from relaxtui.case import load_case

    case = load_case(args.case)
    field = load_field(args.field, case.shape, what="field")
    write_picture(target, field, case, scale=getattr(args, "scale", 1) or 1, isolines=getattr(args, "isolines", None))
    print(os.fspath(target))
    return 0


__all__ = [
    "HISTORY_COLUMNS",
    "ISOLINE_OPACITY",
    "MAX_PICTURE_PIXELS",
    "PictureLayout",
    "cell_conductivity",
    "domain_mask",
    "flux",
    "gradient",
    "load_field",
    "peak_flux",
    "render_picture",
    "run_render",
    "write_bundle",
    "write_picture",
    "write_vtk",
]
