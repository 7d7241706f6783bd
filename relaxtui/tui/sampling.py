"""Field snapshots for the screen: small, bounded-cost samples of a large grid.

The solve worker owns the live field; a few times a second it turns the part
of the grid on screen into a small array of *pixels* (one pixel is half a
character cell of the heatmap) and hands that copy to the UI thread. This
module holds the pure numpy parts of that, importable without Textual:

* :class:`CellLayout` -- which cells are in the domain and which are held
  (fixed), with pyramids of "any domain cell" / "any fixed cell" masks for
  blocks of 2, 3, 4, 6, 8, 12, ... cells, built once when the case is loaded;
* :class:`Viewport` -- what the field panel shows: a top-left cell, a zoom
  (a block of ``BLOCKS[zoom]`` cells per pixel, or ``1 - zoom`` pixels per cell),
  the pixel grid size and the probe cursor (a cell);
* :class:`SamplingPlan` -- for one viewport, the cells to read; built once per
  pan/zoom, reused for every snapshot;
* :class:`Frame` -- one immutable snapshot: pixel values, masks, the probe.

Cost. Zoomed in (one pixel per cell or more) a pixel is its cell's value, read
exactly. Zoomed out, a pixel is the mean of up to ``S x S`` evenly spaced
domain cells of its ``b x b`` block, where ``S = min(b, sqrt(budget / pixels))``
(so the whole snapshot reads at most ``budget`` cells, :data:`SAMPLE_BUDGET`);
for blocks of up to ``S x S`` cells that is the exact block average. A block
whose samples all miss the domain (a one-cell channel) still shows the value
of one of its domain cells, so thin features never vanish when zoomed out.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from relaxtui.case.model import FIXED, INTERIOR

# At most this many cells are read per snapshot (about 2 ms of numpy work).
SAMPLE_BUDGET = 200_000
# Largest magnification (pixels per cell) the panel zooms in to.
MAX_MAGNIFY = 8


def _readonly(a: np.ndarray) -> np.ndarray:
    a.setflags(write=False)
    return a


def _blocks(limit: int = 1 << 20) -> tuple[int, ...]:
    out, b = [1], 2
    while b <= limit:
        out += [b, b * 3 // 2] if b >= 4 else [b] + ([3] if b == 2 else [])
        b *= 2
    return tuple(sorted(set(out)))


# Block sizes (cells per pixel side) of the zoomed-out views: 1, 2, 3, 4, 6, 8, 12, 16, ...
# so the whole grid always fills at least three quarters of the panel's width or height.
BLOCKS = _blocks()


def _pool(d: np.ndarray, f: np.ndarray, r: np.ndarray | None, k: int, cols: int):
    """Pool k x k blocks: any domain, any fixed, and one domain cell's flat index per block.

    ``r`` is the representative index of each input entry; ``None`` means the
    input is the cells themselves (the index is then computed, not stored).
    """
    h, w = d.shape
    ph, pw = -(-h // k) * k, -(-w // k) * k
    if (ph, pw) != (h, w):
        d = np.pad(d, ((0, ph - h), (0, pw - w)), constant_values=False)
        f = np.pad(f, ((0, ph - h), (0, pw - w)), constant_values=False)
        if r is not None:
            r = np.pad(r, ((0, ph - h), (0, pw - w)), constant_values=-1)
    H, W = ph // k, pw // k
    children = d.reshape(H, k, W, k).transpose(0, 2, 1, 3).reshape(H, W, k * k)
    dom = children.any(axis=2)
    fix = f.reshape(H, k, W, k).any(axis=(1, 3))
    # the first child in reading order that holds a domain cell
    if r is None:
        first = np.argmax(children, axis=2)
        rows = np.arange(H)[:, None] * k + first // k
        cols_ = np.arange(W)[None, :] * k + first % k
        rep = np.where(dom, rows * cols + cols_, -1)
    else:
        reps = r.reshape(H, k, W, k).transpose(0, 2, 1, 3).reshape(H, W, k * k)
        first = np.argmax(reps >= 0, axis=2)
        rep = np.take_along_axis(reps, first[..., None], axis=2)[..., 0]
    return dom, fix, rep


class CellLayout:
    """Domain and held cells of a case, with block pyramids for zoomed-out views.

    Parameters
    ----------
    kinds : (rows, cols) int array
        The kind code of every cell (``relaxtui.case.model`` INTERIOR, FIXED, ...).
    cell_size : float
        Side of a cell in metres (for probe positions).

    For every block size ``b`` of :data:`BLOCKS` up to the grid's size there
    is one entry per ``b x b`` block of cells (blocks start at row and column
    0): ``domain[b]`` (any domain cell), ``fixed[b]`` (any fixed cell) and,
    for ``b > 1``, ``rep[b]`` (the flat index of one domain cell of the
    block, -1 if none). Two chains build them exactly: 2, 4, 8, ... by 2 x 2
    pooling of the cells, 3, 6, 12, ... by 3 x 3 pooling first. Every array is
    read-only, so a layout can be shared by the UI thread and the solve worker.
    """

    def __init__(self, kinds: np.ndarray, cell_size: float = 1.0) -> None:
        kinds = np.asarray(kinds)
        if kinds.ndim != 2 or kinds.size == 0:
            raise ValueError("kinds must be a non-empty 2-D array")
        self.shape = (int(kinds.shape[0]), int(kinds.shape[1]))
        self.cell_size = float(cell_size)
        rows, cols = self.shape
        domain = (kinds == INTERIOR) | (kinds == FIXED)
        fixed = kinds == FIXED
        self.domain: dict[int, np.ndarray] = {1: _readonly(domain)}
        self.fixed: dict[int, np.ndarray] = {1: _readonly(fixed)}
        self.rep: dict[int, np.ndarray] = {}
        index_type = np.int32 if rows * cols < 2**31 else np.int64
        for first in (2, 3):
            if first > max(rows, cols) and first != 2:
                continue
            d, f, r = _pool(domain, fixed, None, first, cols)
            b = first
            while True:
                self.domain[b], self.fixed[b] = _readonly(d), _readonly(f)
                self.rep[b] = _readonly(r.astype(index_type))
                if max(d.shape) <= 1:
                    break
                d, f, r = _pool(d, f, r, 2, cols)
                b *= 2

    @classmethod
    def from_case(cls, case) -> "CellLayout":
        """The layout of a :class:`relaxtui.case.model.Case`."""
        return cls(case.kind_codes()[case.codes], case.cell_size)

    @property
    def blocks(self) -> list[int]:
        return sorted(self.domain)

    def position(self, row: int, col: int) -> tuple[float, float]:
        """Centre of cell (row, col) in metres: x = (col+0.5)h, y = (rows-row-0.5)h."""
        h = self.cell_size
        return ((col + 0.5) * h, (self.shape[0] - row - 0.5) * h)


@dataclass(frozen=True)
class Viewport:
    """What the field panel shows.

    ``zoom >= 0``: one pixel is a block of ``b x b`` cells, ``b = BLOCKS[zoom]``, and
    ``row0``/``col0`` are multiples of the block. ``zoom < 0``: one cell is
    ``1 - zoom`` pixels on a side. ``height``/``width`` is the pixel grid the
    panel has room for; ``cursor`` the probed cell (row, col).
    """

    row0: int
    col0: int
    zoom: int
    height: int
    width: int
    cursor: tuple[int, int] = (0, 0)

    @property
    def block(self) -> int:
        return BLOCKS[self.zoom] if self.zoom > 0 else 1

    @property
    def magnify(self) -> int:
        return 1 - self.zoom if self.zoom < 0 else 1

    @property
    def plan_key(self) -> tuple[int, int, int, int, int]:
        return (self.row0, self.col0, self.zoom, self.height, self.width)

    def cells_shown(self) -> tuple[int, int]:
        """How many cell rows and columns the pixel grid spans (before clipping to the grid)."""
        if self.zoom >= 0:
            return self.height * self.block, self.width * self.block
        return -(-self.height // self.magnify), -(-self.width // self.magnify)

    def pixel_of(self, row: int, col: int) -> tuple[int, int, int]:
        """Pixel (i, j) of the top-left corner of cell (row, col) and the pixels per cell side."""
        if self.zoom >= 0:
            return ((row - self.row0) // self.block, (col - self.col0) // self.block, 1)
        m = self.magnify
        return ((row - self.row0) * m, (col - self.col0) * m, m)


def fit_zoom(shape: tuple[int, int], height: int, width: int) -> int:
    """The zoom that shows a whole grid of ``shape`` cells in ``height x width`` pixels."""
    rows, cols = shape
    height, width = max(height, 1), max(width, 1)
    if rows <= height and cols <= width:
        m = max(1, min(height // rows, width // cols, MAX_MAGNIFY))
        return 1 - m
    z = 0
    while -(-rows // BLOCKS[z]) > height or -(-cols // BLOCKS[z]) > width:
        z += 1
    return z


def clamp_viewport(vp: Viewport, shape: tuple[int, int]) -> Viewport:
    """Keep the cursor inside the grid and in view, the view inside the grid, blocks aligned."""
    rows, cols = shape
    r, c = min(max(vp.cursor[0], 0), rows - 1), min(max(vp.cursor[1], 0), cols - 1)
    span_r, span_c = vp.cells_shown()
    b = vp.block
    # Visible cells when the last pixel is only partly filled: keep whole pixels.
    if vp.zoom < 0:
        span_r, span_c = max(vp.height // vp.magnify, 1), max(vp.width // vp.magnify, 1)

    def axis(start, cursor, span, n):
        start = min(max(start, cursor - span + 1), cursor)  # cursor in view
        start = min(start, max(n - span, 0))  # no empty space past the end ...
        start = max(start, 0)
        start -= start % b  # ... aligned to the block
        if cursor >= start + span:  # alignment pushed the cursor out: next block
            start += b
        return start

    return Viewport(axis(vp.row0, r, span_r, rows), axis(vp.col0, c, span_c, cols), vp.zoom, vp.height, vp.width, (r, c))


def centred(vp: Viewport, shape: tuple[int, int]) -> Viewport:
    """The viewport moved so its cursor sits in the middle of the panel (then clamped)."""
    span_r, span_c = vp.cells_shown()
    r, c = vp.cursor
    moved = Viewport(r - span_r // 2, c - span_c // 2, vp.zoom, vp.height, vp.width, vp.cursor)
    return clamp_viewport(moved, shape)


@dataclass(frozen=True)
class Probe:
    """The probed cell: position, and its value in the snapshot (None outside the domain)."""

    row: int
    col: int
    x: float
    y: float
    value: float | None
    block_mean: float | None = None  # the pixel's value when a pixel is a block of cells


@dataclass(frozen=True, eq=False)
class Frame:
    """An immutable snapshot of the screen part of a field (read-only arrays, small)."""

    values: np.ndarray  # (h, w) float64 pixel values; NaN where a pixel has no domain cell
    domain: np.ndarray  # (h, w) bool: pixel holds a domain cell
    fixed: np.ndarray  # (h, w) bool: pixel holds a fixed (held) cell
    viewport: Viewport
    probe: Probe | None
    vmin: float  # finite range of the pixel values (nan if none)
    vmax: float
    label: str = ""  # where the values come from, e.g. "run 2 · sweep 1 400"
    mode: str = "solution"  # the field view: solution, residual or update
    sweeps: int = -1  # the sweep the values belong to (-1: not a run's live field)


class SamplingPlan:
    """The cells one viewport reads; built once per pan/zoom, reused per snapshot."""

    def __init__(self, layout: CellLayout, vp: Viewport, budget: int = SAMPLE_BUDGET) -> None:
        self.layout = layout
        self.viewport = vp
        rows, cols = layout.shape
        if vp.zoom <= 0:
            m = vp.magnify
            nr = max(min(-(-vp.height // m), rows - vp.row0), 0)
            nc = max(min(-(-vp.width // m), cols - vp.col0), 0)
            self.rows = slice(vp.row0, vp.row0 + nr)
            self.cols = slice(vp.col0, vp.col0 + nc)
            dom = layout.domain[1][self.rows, self.cols]
            fix = layout.fixed[1][self.rows, self.cols]
            self.m = m
            self.domain = _readonly(self._grow(dom))
            self.fixed = _readonly(self._grow(fix))
            self.samples = None
            return
        self.m = 1
        b = vp.block if vp.block in layout.domain else max(layout.domain)
        br0, bc0 = vp.row0 // b, vp.col0 // b
        level_dom, level_fix = layout.domain[b], layout.fixed[b]
        h = max(min(vp.height, level_dom.shape[0] - br0), 0)
        w = max(min(vp.width, level_dom.shape[1] - bc0), 0)
        self.domain = _readonly(level_dom[br0 : br0 + h, bc0 : bc0 + w].copy())
        self.fixed = _readonly(level_fix[br0 : br0 + h, bc0 : bc0 + w].copy())
        s = int(min(b, max(1, math.isqrt(max(budget // max(h * w, 1), 1)))))
        offsets = (np.arange(s) * b + b // 2) // s if s < b else np.arange(b)
        ri = ((br0 + np.arange(h))[:, None] * b + offsets[None, :]).ravel()
        ci = ((bc0 + np.arange(w))[:, None] * b + offsets[None, :]).ravel()
        ok_r, ok_c = ri < rows, ci < cols
        self.ri, self.ci = np.minimum(ri, rows - 1), np.minimum(ci, cols - 1)
        sampled = layout.domain[1][np.ix_(self.ri, self.ci)] & ok_r[:, None] & ok_c[None, :]
        self.sampled = _readonly(sampled)
        self.s, self.h, self.w = s, h, w
        self.counts = sampled.reshape(h, s, w, s).sum(axis=(1, 3))
        # Blocks with domain cells that no sample hit: read one representative cell.
        missed = self.domain & (self.counts == 0)
        self.missed = np.nonzero(missed)
        reps = layout.rep[b][br0 : br0 + h, bc0 : bc0 + w][self.missed]
        self.missed_cells = np.unravel_index(reps.astype(np.int64), layout.shape)
        self.samples = sampled.sum()

    def _grow(self, a: np.ndarray) -> np.ndarray:
        if self.m == 1:
            return a.copy()
        grown = np.repeat(np.repeat(a, self.m, axis=0), self.m, axis=1)
        return np.ascontiguousarray(grown[: self.viewport.height, : self.viewport.width])

    def sample(self, field: np.ndarray) -> np.ndarray:
        """Pixel values of ``field`` ((rows, cols), any strides) for this viewport: a new array."""
        if self.samples is None:
            values = np.where(self.layout.domain[1][self.rows, self.cols], field[self.rows, self.cols], np.nan)
            return self._grow(values.astype(np.float64, copy=False))
        h, w, s = self.h, self.w, self.s
        sub = field[np.ix_(self.ri, self.ci)]
        total = np.where(self.sampled, sub, 0.0).reshape(h, s, w, s).sum(axis=(1, 3))
        with np.errstate(invalid="ignore", divide="ignore"):
            values = np.where(self.counts > 0, total / self.counts, np.nan)
        if self.missed[0].size:
            values[self.missed] = field[self.missed_cells]
        return values

    def frame(self, field: np.ndarray, cursor: tuple[int, int] | None = None, label: str = "", viewport: Viewport | None = None,
              mode: str = "solution", sweeps: int = -1) -> Frame:
        """Snapshot ``field`` into a :class:`Frame` (copies; safe to hand to another thread)."""
        values = self.sample(field)
        finite = values[np.isfinite(values)]
        vmin, vmax = (float(finite.min()), float(finite.max())) if finite.size else (math.nan, math.nan)
        vp = viewport or self.viewport
        probe = None
        cursor = cursor if cursor is not None else vp.cursor
        if cursor is not None:
            probe = self.probe(field, values, cursor, vp)
        return Frame(_readonly(values), self.domain, self.fixed, vp, probe, vmin, vmax, label, mode, sweeps)

    def probe(self, field: np.ndarray, values: np.ndarray, cursor: tuple[int, int], vp: Viewport) -> Probe:
        r, c = cursor
        x, y = self.layout.position(r, c)
        inside = bool(self.layout.domain[1][r, c])
        value = float(field[r, c]) if inside else None
        block_mean = None
        if vp.zoom > 0:
            i, j, _ = vp.pixel_of(r, c)
            if 0 <= i < values.shape[0] and 0 <= j < values.shape[1] and np.isfinite(values[i, j]):
                block_mean = float(values[i, j])
        return Probe(r, c, x, y, value, block_mean)
