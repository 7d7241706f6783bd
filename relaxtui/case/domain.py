"""Domain checks: every 4-connected group of interior cells must be anchored.

Nothing here imports numba at module level. Groups are labelled through the graph of
horizontal runs in numpy; only a picture with more than RUN_GRAPH_LIMIT runs (noise-like)
loads the compiled labelling kernel.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from relaxtui.case.model import CONVECTION, FIXED, INTERIOR, Region
from relaxtui.errors import CaseError


def anchored_interior(cell_kind: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Interior cells, and those of them with a face on a fixed or convection cell.

    ``cell_kind`` is the per-cell kind integer (rows x cols). Returns two bool
    arrays of the same shape.
    """
    interior = cell_kind == INTERIOR
    anchor = (cell_kind == FIXED) | (cell_kind == CONVECTION)
    touch = np.zeros_like(interior)
    touch[1:, :] |= anchor[:-1, :]
    touch[:-1, :] |= anchor[1:, :]
    touch[:, 1:] |= anchor[:, :-1]
    touch[:, :-1] |= anchor[:, 1:]
    touch &= interior
    return interior, touch


# Above this many horizontal runs of interior cells (a noisy picture), the
# compiled labelling kernel is faster than the vectorised run graph.
RUN_GRAPH_LIMIT = 300_000


def interior_runs(interior: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
    """Horizontal runs of true cells, in raster order.

    Returns ``starts`` and ``ends`` (exclusive) as positions in the row-major
    flattening of the mask padded by one false column on each side, and that
    padded row length. Row of a run: ``starts // stride``; its first column:
    ``starts % stride - 1``.
    """
    h, w = interior.shape
    padded = np.zeros((h, w + 2), dtype=bool)
    padded[:, 1:-1] = interior
    flat = padded.reshape(-1)
    before, after = flat[:-1], flat[1:]
    starts = np.flatnonzero(after & ~before) + 1
    ends = np.flatnonzero(before & ~after) + 1
    return starts, ends, w + 2


def _run_components(n: int, u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Connected components of n nodes joined by edges (u, v).

    Returns f with f[x] = the smallest node of x's component. Min-label
    hooking of roots plus full path compression, repeated until nothing
    changes (a Shiloach-Vishkin style iteration, vectorised).
    """
    f = np.arange(n, dtype=np.int64)
    while True:
        before = f.copy()
        fu, fv = f[u], f[v]
        np.minimum.at(f, fu, fv)
        np.minimum.at(f, fv, fu)
        while True:
            g = f[f]
            if np.array_equal(g, f):
                break
            f = g
        if np.array_equal(f, before):
            return f


def label_groups(interior: np.ndarray, runs=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """4-connected groups of interior cells through the graph of horizontal runs.

    Returns per run (raster order): ``starts``, ``ends`` (padded flat
    positions, see :func:`interior_runs`; pass its result as ``runs`` to
    reuse it) and ``group``, the group number 0..count-1, numbered in raster
    order of each group's first cell.
    """
    starts, ends, stride = runs if runs is not None else interior_runs(interior)
    n = len(starts)
    # Run j of row r+1 and run i of row r share a face where their column
    # ranges overlap. Shifted up one row, j's range [qs, qe) meets the runs i
    # with ends[i] > qs and starts[i] < qe: a contiguous index range.
    qs, qe = starts - stride, ends - stride
    lo = np.searchsorted(ends, qs, side="right")
    hi = np.searchsorted(starts, qe, side="left")
    count = np.maximum(hi - lo, 0)
    total = int(count.sum())
    u = np.repeat(np.arange(n), count)
    v = np.arange(total) - np.repeat(np.cumsum(count) - count, count) + np.repeat(lo, count)
    roots = _run_components(n, u, v)
    _, group = np.unique(roots, return_inverse=True)  # roots are each group's first run
    return starts, ends, group.reshape(-1)


def _floating_runs(starts, ends, stride, touched) -> tuple[int, int, tuple[int, int]]:
    """:func:`floating_groups` from the runs and their ``touched`` flags (:func:`anchored_runs`)."""
    starts, ends, group = label_groups(None, (starts, ends, stride))
    return _first_floating(starts, ends, stride, group, touched)


def _first_floating(starts, ends, stride, group, touched) -> tuple[int, int, tuple[int, int]]:
    """(groups none of whose runs is ``touched``, size of the first, its first cell) from labelled runs."""
    ok = np.zeros(int(group.max()) + 1, dtype=bool)
    ok[group[touched]] = True
    bad = np.flatnonzero(~ok)
    if not bad.size:
        return 0, 0, (-1, -1)
    g = int(bad[0])
    mine = group == g
    size = int((ends[mine] - starts[mine]).sum())
    first = int(starts[np.argmax(mine)])
    return int(bad.size), size, (first // stride, first % stride - 1)


def floating_groups(interior: np.ndarray, touch: np.ndarray) -> tuple[int, int, tuple[int, int]]:
    """Groups of interior cells with no cell in ``touch``.

    Returns (number of such groups, size of the first one in raster order,
    (row, col) of its first cell); (0, 0, (-1, -1)) when every group is anchored.
    """
    h, w = interior.shape
    runs = interior_runs(interior)
    starts, ends, stride = runs
    if len(starts) <= RUN_GRAPH_LIMIT:
        starts, ends, group = label_groups(interior, runs)
        r, c = np.divmod(np.flatnonzero(touch), w)
        keys = r * stride + c + 1
        run_of_touch = np.searchsorted(starts, keys, side="right") - 1
        return _first_floating(starts, ends, stride, group, run_of_touch)
    from relaxtui.kernels.labels import label4

    labels, count = label4(interior)
    ok = np.zeros(count + 1, dtype=bool)
    ok[labels[touch]] = True
    ok[0] = True
    bad = np.flatnonzero(~ok)
    if not bad.size:
        return 0, 0, (-1, -1)
    g = int(bad[0])
    size = int(np.count_nonzero(labels == g))
    first = int(np.argmax(labels.reshape(-1) == g))
    return int(bad.size), size, divmod(first, w)


def check_domain(codes: np.ndarray, regions: Sequence[Region], label: str) -> None:
    """Refuse a domain without interior cells, or with a group of interior
    cells (4-connected) that touches no fixed or convection cell (the
    contract: such a group has no unique solution)."""
    _check(codes, np.array([r.kind_code for r in regions], np.int8), label, need_interior=True)


def check_anchored(codes: np.ndarray, kinds: np.ndarray, label: str) -> None:
    """Refuse a group of interior cells that touches no fixed or convection cell.

    The one anchoring check: the loader (through :func:`check_domain`) and the
    operator call it. ``kinds`` holds the per-region kind integers.
    """
    _check(codes, np.asarray(kinds, np.int8), label, need_interior=False)


STRIP_CELLS = 1 << 20  # cells per row strip of the check's temporaries (the picture is never copied whole)


def anchored_runs(codes: np.ndarray, kinds: np.ndarray, strip_cells: int | None = None):
    """The horizontal runs of interior cells (as :func:`interior_runs`) and, per run, whether one of
    its cells has a face on a fixed or convection cell: ``(starts, ends, stride, touched)``.

    Computed in row strips (with one halo row each side) of about ``strip_cells`` cells, so the
    temporaries are a strip's, not the picture's; the runs come out in raster order.
    """
    h, w = codes.shape
    stride = w + 2
    step = max(1, (STRIP_CELLS if strip_cells is None else int(strip_cells)) // max(w, 1))
    parts_s, parts_e, parts_t = [], [], []
    for a in range(0, h, step):
        b = min(h, a + step)
        lo, hi = max(0, a - 1), min(h, b + 1)
        interior, touch = anchored_interior(kinds[codes[lo:hi]])
        interior, touch = interior[a - lo : b - lo], touch[a - lo : b - lo]
        starts, ends, _ = interior_runs(interior)
        padded = np.zeros((b - a, stride), dtype=bool)
        padded[:, 1:-1] = touch
        total = np.zeros(padded.size + 1, dtype=np.int64)
        np.cumsum(padded.reshape(-1), out=total[1:])
        parts_t.append(total[ends] > total[starts])  # a touching cell within [start, end)
        parts_s.append(starts + a * stride)
        parts_e.append(ends + a * stride)
    if not parts_s:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty, stride, np.zeros(0, dtype=bool)
    return np.concatenate(parts_s), np.concatenate(parts_e), stride, np.concatenate(parts_t)


def _check(codes: np.ndarray, kinds: np.ndarray, label: str, need_interior: bool) -> None:
    starts, ends, stride, touched = anchored_runs(codes, kinds)
    if not starts.size:
        if not need_interior:
            return
        raise CaseError(f"{label}: no interior cells: no pixel belongs to a region of kind 'interior', so there is nothing to solve for")
    if starts.size <= RUN_GRAPH_LIMIT:
        nbad, size, (r, c) = _floating_runs(starts, ends, stride, touched)
    else:  # a noise-like picture: the compiled labelling kernel on the whole mask
        nbad, size, (r, c) = floating_groups(*anchored_interior(kinds[codes]))
    if nbad:
        more = f"; {nbad - 1} more such groups" if nbad > 1 else ""
        raise CaseError(
            f"{label}: a group of {size} interior cells (one of them at row {r}, column {c}) touches no fixed "
            f"or convection cell, so its values are not determined{more}; put a fixed or convection region next to it"
        )


def mask_outside_folder(case) -> str | None:
    """The resolved picture path when it lies outside the case file's folder (shared masks are
    allowed, but made visible), else None."""
    import os

    if case.path is None or case.mask_path is None:
        return None
    folder = os.path.realpath(os.path.dirname(os.path.abspath(case.path)))
    mask = os.path.realpath(case.mask_path)
    if os.path.commonpath([folder, mask]) == folder:
        return None
    return mask
