"""A colour picture of a field (PNG): colour bar, isolines, fixed-region outlines."""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from relaxtui.case.model import FIXED, Case
from relaxtui.errors import UsageError
from relaxtui.output import colormap
from relaxtui.output.atomic import atomic_write, check_target
from relaxtui.output.flux import _check_field, domain_mask

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
    cell a ``scale x scale`` block in the colour :func:`relaxtui.output.colormap.colors`
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


def has_finite_value(field, case: Case) -> bool:
    """Whether any cell of the domain holds a finite value (a field that has none has nothing to draw).

    Looked at in row strips, so the temporaries are a strip's, and it stops at the first strip with one."""
    u = np.asarray(field)
    dom = domain_mask(case)
    rows, cols = dom.shape
    step = max(1, (1 << 20) // max(cols, 1))
    for r in range(0, rows, step):
        if np.isfinite(u[r : r + step][dom[r : r + step]]).any():
            return True
    return False


def write_picture(path, field, case: Case, *, scale: int = 1, isolines=None, vmin=None, vmax=None) -> Path:
    """Write :func:`render_picture`'s image as a PNG, atomically; return the path.

    The folder is checked before any drawing (:func:`relaxtui.output.atomic.check_target`).
    """
    target = check_target(path, "picture")
    image, _ = render_picture(field, case, scale=scale, isolines=isolines, vmin=vmin, vmax=vmax)
    with atomic_write(target, "wb", "picture") as f:
        image.save(f, format="PNG", compress_level=4)
    return target


