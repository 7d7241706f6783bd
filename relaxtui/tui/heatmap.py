"""The field heatmap as a Rich renderable: a pure function, no widgets, no app.

:func:`render_heatmap` draws a 2-D array into ``width x height`` character
cells: the map (two pixels per character, stacked with the upper half block
``▀``: its foreground is the upper pixel, its background the lower one) and a
two-line legend (the colour scale with its unit, then round tick values).

* NaN pixels are not part of the domain and stay blank; blank pixels that
  touch the domain are drawn in a dim neutral grey, so the domain's edge shows
  even where the field is dark;
* held (fixed) pixels are drawn in a light neutral grey, a colour the scale
  never takes (every scale colour has chroma, see :mod:`relaxtui.output.colormap`);
* domain pixels whose value is not finite (a diverged run) take the scale's
  ``NO_DATA`` grey;
* without colour (``mono=True``, e.g. under ``NO_COLOR``) each character is one
  pair of pixels drawn with the character ramp :data:`relaxtui.output.colormap.RAMP`,
  held cells as :data:`MONO_FIXED`, and the probe cursor in reverse video.

Larger arrays are block-averaged (NaN-aware) to fit; with ``magnify=True``
smaller ones are enlarged by a whole factor.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from rich.color import Color
from rich.console import Console, ConsoleOptions, RenderResult
from rich.measure import Measurement
from rich.segment import Segment
from rich.style import Style

from relaxtui.output import colormap

LEGEND_LINES = 2
FIXED_RGB = (196, 196, 190)  # held cells: light neutral grey
EDGE_RGB = (60, 60, 66)  # blank pixels beside the domain: dim neutral grey
MONO_FIXED = "X"  # held cells without colour (not a ramp character)
MONO_BAD = "?"  # a non-finite value without colour

# Pixel codes: palette index 0..255, then these.
BLANK, FIXED_CODE, EDGE_CODE, BAD_CODE, CURSOR_DARK, CURSOR_LIGHT = -1, 256, 257, 258, 259, 260
_N_CODES = 261


def _rgb_table(palette: np.ndarray) -> list[tuple[int, int, int]]:
    table = [tuple(int(v) for v in rgb) for rgb in np.asarray(palette, dtype=np.uint8)]
    if len(table) != 256:
        raise ValueError("palette must have 256 entries")
    nd = tuple(int(v) for v in colormap.NO_DATA)
    return table + [FIXED_RGB, EDGE_RGB, nd, (16, 16, 16), (250, 250, 250)]


def _block_mean(a: np.ndarray, b: int) -> np.ndarray:
    """NaN-aware mean over ``b x b`` blocks (the last row/column of blocks may be partial)."""
    rows, cols = a.shape
    h, w = -(-rows // b), -(-cols // b)
    padded = np.full((h * b, w * b), np.nan)
    padded[:rows, :cols] = a
    blocks = padded.reshape(h, b, w, b)
    ok = ~np.isnan(blocks)
    counts = ok.sum(axis=(1, 3))
    with np.errstate(invalid="ignore"):
        total = np.where(ok, blocks, 0.0).sum(axis=(1, 3))
        return np.where(counts > 0, total / np.maximum(counts, 1), np.nan)


def _block_any(a: np.ndarray, b: int) -> np.ndarray:
    rows, cols = a.shape
    h, w = -(-rows // b), -(-cols // b)
    padded = np.zeros((h * b, w * b), dtype=bool)
    padded[:rows, :cols] = a
    return padded.reshape(h, b, w, b).any(axis=(1, 3))


def fit_pixels(values: np.ndarray, fixed: np.ndarray | None, domain: np.ndarray | None, height: int, width: int, magnify: bool = True):
    """Resample to at most ``height x width`` pixels; returns (values, fixed, domain, block, magnification).

    A grid too large is block-averaged with the smallest block ``b`` that fits
    (NaN cells left out of each mean; a block is held if any cell is, in the
    domain if any cell is); a grid that fits is enlarged by the largest whole
    factor that still fits when ``magnify`` (at most 8).
    """
    rows, cols = values.shape
    if domain is None:
        domain = ~np.isnan(values)
    if fixed is None:
        fixed = np.zeros(values.shape, dtype=bool)
    height, width = max(height, 1), max(width, 1)
    if rows > height or cols > width:
        b = max(-(-rows // height), -(-cols // width))
        masked = np.where(domain, values, np.nan)
        return _block_mean(masked, b), _block_any(fixed, b), _block_any(domain, b), b, 1
    m = max(1, min(height // rows, width // cols, 8)) if magnify else 1
    if m > 1:
        grow = lambda a: np.repeat(np.repeat(a, m, axis=0), m, axis=1)  # noqa: E731
        return grow(values), grow(fixed), grow(domain), 1, m
    return values, fixed, domain, 1, 1


@dataclass
class Heatmap:
    """A drawn heatmap: lines of segments, ready for a Rich console."""

    lines: list[list[Segment]]
    width: int
    block: int = 1  # cells per pixel side (downsampling)
    magnification: int = 1  # pixels per cell side (enlarging)
    pixel_shape: tuple[int, int] = (0, 0)
    vmin: float = math.nan
    vmax: float = math.nan

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        new_line = Segment.line()
        for line in self.lines:
            yield from line
            yield new_line

    def __rich_measure__(self, console: Console, options: ConsoleOptions) -> Measurement:
        return Measurement(self.width, self.width)


def render_heatmap(
    array,
    width: int,
    height: int,
    *,
    mono: bool = False,
    palette: np.ndarray | None = None,
    vmin: float | None = None,
    vmax: float | None = None,
    fixed=None,
    domain=None,
    unit: str = "",
    cursor: tuple[int, int, int] | None = None,
    legend: bool = True,
    magnify: bool = True,
    ticks: list[tuple[float, str]] | None = None,
) -> Heatmap:
    """Draw ``array`` as a heatmap of at most ``width`` x ``height`` characters.

    Parameters
    ----------
    array : (rows, cols) float array
        Field values; NaN where a cell is not part of the domain.
    width, height : int
        Characters available; ``height`` includes the legend's two lines.
    mono : bool
        Draw with characters only (no colour).
    palette : (256, 3) uint8, optional
        The colour scale; default :data:`relaxtui.output.colormap.PALETTE`.
    vmin, vmax : float, optional
        Ends of the scale; default the finite range of ``array``.
    fixed : (rows, cols) bool, optional
        Held cells, drawn apart from the scale.
    domain : (rows, cols) bool, optional
        Domain cells; default ``~isnan(array)``. A domain cell whose value is
        not finite is drawn as "no data".
    unit : str
        The case's unit, written at the end of the scale.
    cursor : (i, j, size), optional
        Pixel (row, column) and side, in pixels of the *fitted* grid, of the
        probed cell: drawn in a contrasting colour (reverse video in mono).
    legend : bool
        Append the two legend lines.
    magnify : bool
        Enlarge a small array by a whole factor to fill the space.
    ticks : list of (value, label), optional
        The legend's ticks (values in the array's units, e.g. of a transformed
        scale); default round values from :func:`relaxtui.output.colormap.nice_ticks`.
    """
    values = np.asarray(array, dtype=np.float64)
    if values.ndim != 2:
        raise ValueError("array must be 2-D")
    width = max(int(width), 1)
    map_rows = max(int(height) - (LEGEND_LINES if legend else 0), 1)
    fixed_a = None if fixed is None else np.asarray(fixed, dtype=bool)
    domain_a = None if domain is None else np.asarray(domain, dtype=bool)
    if values.size == 0:
        pix, pfix, pdom, block, mag = values.reshape(0, 0), np.zeros((0, 0), bool), np.zeros((0, 0), bool), 1, 1
    else:
        pix, pfix, pdom, block, mag = fit_pixels(values, fixed_a, domain_a, 2 * map_rows, width, magnify)
    finite = pix[pdom & np.isfinite(pix)] if pix.size else pix
    lo = float(finite.min()) if vmin is None and finite.size else vmin
    hi = float(finite.max()) if vmax is None and finite.size else vmax
    lo = math.nan if lo is None else float(lo)
    hi = math.nan if hi is None else float(hi)
    if math.isfinite(lo) and math.isfinite(hi) and hi < lo:
        lo, hi = hi, lo
    table = _rgb_table(colormap.PALETTE if palette is None else palette)

    codes, t = _codes(pix, pfix, pdom, lo, hi)
    if cursor is not None and pix.size:
        ci, cj, size = cursor
        i0, i1 = max(ci, 0), min(ci + max(size, 1), pix.shape[0])
        j0, j1 = max(cj, 0), min(cj + max(size, 1), pix.shape[1])
    else:
        i0 = i1 = j0 = j1 = 0
    if mono:
        lines = _mono_lines(pix, pfix, pdom, t, (i0, i1, j0, j1))
    else:
        if i1 > i0 and j1 > j0:
            patch = codes[i0:i1, j0:j1]
            light = (patch >= 150) & (patch < 256) | (patch == FIXED_CODE)
            codes[i0:i1, j0:j1] = np.where(light, CURSOR_DARK, CURSOR_LIGHT)
        lines = _colour_lines(codes, table)
    lines = [line for line in lines]
    while len(lines) < 1:
        lines.append([])
    if legend:
        lines.extend(_legend(width, lo, hi, unit, mono, table, has_fixed=bool(pfix.any()) if pfix.size else False, ticks=ticks))
    return Heatmap(lines, width, block, mag, tuple(pix.shape), lo, hi)


def _codes(pix, pfix, pdom, lo, hi):
    """Pixel codes (palette index or a special code) and the scale position t of each pixel."""
    if pix.size == 0:
        return np.zeros(pix.shape, dtype=np.int16), np.zeros(pix.shape)
    span = hi - lo
    with np.errstate(invalid="ignore", over="ignore"):
        if math.isfinite(span) and span > 0:
            t = (pix - lo) / span
        else:
            t = np.where(np.isfinite(pix), 0.5, np.nan)
    idx = colormap.index(np.where(np.isfinite(pix), t, np.nan))
    codes = idx.astype(np.int16)
    bad = pdom & ~np.isfinite(pix)
    codes[bad] = BAD_CODE
    blank = ~pdom & ~pfix
    codes[blank] = BLANK
    codes[pfix] = FIXED_CODE
    # Blank pixels next to the domain: the edge.
    inside = ~blank
    near = np.zeros_like(inside)
    near[1:, :] |= inside[:-1, :]
    near[:-1, :] |= inside[1:, :]
    near[:, 1:] |= inside[:, :-1]
    near[:, :-1] |= inside[:, 1:]
    codes[blank & near] = EDGE_CODE
    return codes, t


def _colour_lines(codes: np.ndarray, table) -> list[list[Segment]]:
    rows, cols = codes.shape
    if rows % 2:
        codes = np.vstack([codes, np.full((1, cols), BLANK, dtype=codes.dtype)])
    top = codes[0::2].astype(np.int32) + 1
    bottom = codes[1::2].astype(np.int32) + 1
    keys = top * (_N_CODES + 1) + bottom
    cache: dict[int, tuple[str, Style | None]] = {}
    colours = [None] + [Color.from_rgb(*rgb) for rgb in table]
    lines = []
    for row in keys.tolist():
        segs: list[Segment] = []
        run_key, run_len = None, 0
        for key in row + [None]:
            if key == run_key:
                run_len += 1
                continue
            if run_key is not None:
                char, style = cache.get(run_key) or cache.setdefault(run_key, _glyph(run_key, colours))
                segs.append(Segment(char * run_len, style))
            run_key, run_len = key, 1
        lines.append(segs)
    return lines


def _glyph(key: int, colours) -> tuple[str, Style | None]:
    top, bottom = divmod(key, _N_CODES + 1)
    ct, cb = colours[top], colours[bottom]
    if ct is None and cb is None:
        return " ", None
    if ct is None:
        return "▄", Style(color=cb)
    if cb is None:
        return "▀", Style(color=ct)
    return "▀", Style(color=ct, bgcolor=cb)


def _mono_lines(pix, pfix, pdom, t, cursor_box) -> list[list[Segment]]:
    rows, cols = pix.shape
    if rows == 0:
        return []
    if rows % 2:
        pad = lambda a, v: np.vstack([a, np.full((1, cols), v, dtype=a.dtype)])  # noqa: E731
        pix, pfix, pdom, t = pad(pix, np.nan), pad(pfix, False), pad(pdom, False), pad(t, np.nan)
    upper, lower = t[0::2], t[1::2]
    tt = np.where(np.isnan(upper), lower, np.where(np.isnan(lower), upper, 0.5 * (upper + lower)))
    dom = pdom[0::2] | pdom[1::2]
    fix = pfix[0::2] | pfix[1::2]
    chars = colormap.ramp_chars(tt)
    chars = np.where(dom & np.isnan(tt), MONO_BAD, chars)
    chars = np.where(fix, MONO_FIXED, chars)
    chars = np.where(~dom & ~fix, " ", chars)
    i0, i1, j0, j1 = cursor_box
    reverse = Style(reverse=True)
    lines = []
    for k, row in enumerate(chars.tolist()):
        text = "".join(row)
        if i1 > i0 and j1 > j0 and i0 // 2 <= k <= (i1 - 1) // 2:
            lines.append([Segment(text[:j0]), Segment(text[j0:j1], reverse), Segment(text[j1:])])
        else:
            lines.append([Segment(text)])
    return lines


def _legend(width: int, lo: float, hi: float, unit: str, mono: bool, table, has_fixed: bool, ticks=None) -> list[list[Segment]]:
    """The colour scale with its unit (and the key to held cells), then the tick labels."""
    unit_text = f" {unit}" if unit else ""
    key_text = ("  " + MONO_FIXED + " held") if mono else "  ▀ held"
    show_key = has_fixed and width >= 24 + len(key_text)
    bar_width = max(width - len(unit_text) - (len(key_text) if show_key else 0), 4)
    bar_width = min(bar_width, width)
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return [[Segment("no values yet"[:width])], []]
    positions = np.linspace(0.0, 1.0, bar_width) if bar_width > 1 else np.zeros(1)
    if mono:
        bar = [Segment("".join(colormap.ramp_chars(positions).tolist()))]
    else:
        idx = colormap.index(positions)
        bar, run_i, run_len = [], None, 0
        for i in list(idx) + [None]:
            if i == run_i:
                run_len += 1
                continue
            if run_i is not None:
                bar.append(Segment(" " * run_len, Style(bgcolor=Color.from_rgb(*table[int(run_i)]))))
            run_i, run_len = i, 1
    line1 = bar + [Segment(unit_text)]
    if show_key:
        line1.append(Segment("  "))
        line1.append(Segment("▀" if not mono else MONO_FIXED, None if mono else Style(color=Color.from_rgb(*FIXED_RGB))))
        line1.append(Segment(" held"))
    return [line1, [Segment(_tick_line(lo, hi, bar_width, ticks))]]


def _tick_line(lo: float, hi: float, bar_width: int, given=None) -> str:
    """Tick labels, each centred under its place on the scale, never overlapping."""
    if given is not None:
        ticks = [v for v, _ in given]
        labels = [text for _, text in given]
    else:
        n = max(2, min(bar_width // 8, 7))
        ticks = colormap.nice_ticks(lo, hi, n)
        labels = colormap.format_ticks(ticks)
    line = [" "] * bar_width
    last_end = -2
    span = hi - lo
    for v, text in zip(ticks, labels):
        frac = 0.5 if span <= 0 else (v - lo) / span
        pos = int(round(frac * (bar_width - 1)))
        start = min(max(pos - len(text) // 2, 0), max(bar_width - len(text), 0))
        if start <= last_end + 1 or start + len(text) > bar_width:
            continue
        line[start : start + len(text)] = list(text)
        last_end = start + len(text) - 1
    return "".join(line).rstrip()
