"""Assembly of the case format v1.1 operator: contacts, orthotropy, maps, axisymmetry.

The v1 operator (``relaxtui.solver.assembled``) is class-coded: a cell's
normalised equation depends only on the regions of the cell and its four
neighbours. Two of the v1.1 features keep that property and stay on the class
path; two break it and take the per-cell path.

*Class path* (contacts, orthotropy; planar; no maps). The classes, segments
and keys are built by the v1 code; only the class table is recomputed here
from each class's key with per-direction conductivities (x faces use kx,
y faces ky) and the contact resistance of the pair of regions on each face.
A class is still a 5-tuple of regions, so the sweeps, the Jacobi radius and
multigrid run unchanged, with the same speed.

*Column classes* (axisymmetric, no maps): a cell's weights depend on its v1
class and its column (the radius), so the distinct (class, column) pairs are
the classes; the table has about one row per column and material and is read
from cache.

*Mapped cells* (planar, with maps): the class path everywhere, then a class
of its own for every cell a map touches (its region's cells and, for a
conductivity map, their interior neighbours).

*Per-cell path* (axisymmetric with maps; and the mapped cells above). Every
such unknown is its own class: ``cls`` (uint8/16/32 by the count) numbers the interior cells 1..N in
row-major order and ``table`` holds one row (wN, wS, wW, wE, q) per cell, with
``diag`` the unnormalised diagonal. The sweep kernels then see one mixed
segment per row run (a table gather per cell, the table read in order), and
every method, the Galerkin coarse levels of multigrid included (they read
``cls``, ``table`` and ``diag``), works as on the class path. Memory: 4 B of
class code, 40 B of table and 8 B of diagonal per unknown (against 1 B for a
class-coded case).

The discrete equations (docs/case-format.md, "v1.1 additions"): with h the
cell size and a geometric factor f (planar: 1; axisymmetric: the radius of
the face, r = j h for the west face of column j, (j + 1) h for its east face,
the cell centre's r = (j + 1/2) h for north, south faces and for the volume),

    G_x = f / (1 / K_x + R / h),   K_x = 2 kx_P kx_N / (kx_P + kx_N)   (x faces; y faces alike with ky)

where R is the contact resistance of the face's pair of regions (0 without
a contact: then G_x = f K_x, the v1 conductance),

and the boundary terms of v1 multiplied by f. Flows are scaled by the depth
(planar) or by 2 pi (axisymmetric: totals around the axis).

Everything here is numpy over arrays of cells or classes: assembly is a
one-off O(cells) step; the sweeps stay in the kernels.
"""

from __future__ import annotations

import math

import numpy as np

from relaxtui.case.model import CONVECTION, FIXED, FLUX, INTERIOR, OUTSIDE

# (di, dj, direction) of the north, south, west and east neighbours: the order of the table's columns
SIDES = ((-1, 0, "y"), (1, 0, "y"), (0, -1, "x"), (0, 1, "x"))


class Physics:
    """The v1.1 part of an :class:`~relaxtui.solver.assembled.Operator` (built by it).

    Attributes
    ----------
    per_cell : bool
        True on the per-cell path (maps or axisymmetric geometry).
    flow_scale : float
        What the flows are multiplied by: the depth, or 2 pi around the axis.
    """

    def __init__(self, op, case):
        self.op = op
        self.case = case
        regions = case.regions
        n = len(regions)
        self.border = n
        self.h = float(op.cell_size)
        ext = lambda a, fill: np.append(np.asarray(a, dtype=np.float64), fill)  # noqa: E731 - index n is the border
        self.kind = np.append(op.kind, np.int8(OUTSIDE))
        self.kx = ext(op.conductivity, 1.0)
        self.ky = self.kx.copy()
        for i, r in enumerate(regions):
            if r.kind == "interior" and r.conductivity_y is not None:
                self.ky[i] = float(r.conductivity_y)
        self.fixed_k = ext(op.fixed_conductivity, 0.0)
        self.value = ext(op.value, 0.0)
        self.flux = ext(op.flux, 0.0)
        self.coefficient = ext(op.coefficient, 1.0)
        self.ambient = ext(op.ambient, 0.0)
        self.source = ext(op.source, 0.0)
        self.resistance = np.zeros((n + 1, n + 1))
        index = {r.name: i for i, r in enumerate(regions)}
        for c in case.contacts:
            a, b = index[c.a], index[c.b]
            self.resistance[a, b] = self.resistance[b, a] = float(c.resistance)
        self.axisymmetric = case.geometry == "axisymmetric"
        self.per_cell = bool(case.maps) or self.axisymmetric
        self.flow_scale = 2.0 * math.pi if self.axisymmetric else float(op.depth)
        self._cells = None

    # --- one side of many cells ------------------------------------------------------------

    def _terms(self, rp, rn, kp, kn, fac):
        """(G to an unknown neighbour, diagonal part of a boundary face, right-hand side part) per entry.

        ``rp``, ``rn``: regions of P and of the neighbour (``border`` for the
        image border); ``kp``, ``kn``: their conductivities in the face's
        direction (``kn`` of a fixed cell <= 0 when it has none); ``fac``:
        the geometric factor of the face (scalar or array).
        """
        h = self.h
        kind_n = self.kind[rn]
        fixed = kind_n == FIXED
        kn = np.where(fixed & ~(kn > 0.0), kp, kn)
        with np.errstate(divide="ignore", invalid="ignore"):
            g = _harmonic(kp, kn)  # the kernels' overflow-free form (kernels/assemble.face_conductance)
            r = self.resistance[rp, rn]
            if np.any(r > 0.0):
                g = np.where(r > 0.0, 1.0 / (1.0 / g + r / h), g)
            g = g * fac
            uh = 0.5 * _harmonic(self.coefficient[rn] * h, 2.0 * kp) * fac
        conv = kind_n == CONVECTION
        g_unknown = np.where(kind_n == INTERIOR, g, 0.0)
        a = np.where(fixed, g, 0.0) + np.where(conv, uh, 0.0)
        c = (np.where(fixed, g * self.value[rn], 0.0) + np.where(conv, uh * self.ambient[rn], 0.0)
             + np.where(kind_n == FLUX, self.flux[rn] * h * fac, 0.0))
        return g_unknown, a, c

    # --- the class path ---------------------------------------------------------------------

    def _key_regions(self, keys: np.ndarray):
        """(rp, rn, rs, rw, re): the cell's and its four neighbours' region codes packed in class keys
        (digits in base border + 1, east lowest); ``keys`` is not changed."""
        base = self.border + 1
        k = keys.copy()
        regs = []
        for _ in range(4):
            regs.append(k % base)
            k //= base
        re, rw, rs, rn = regs
        return k, rn, rs, rw, re

    def _class_table(self) -> None:
        op = self.op
        rp, rn, rs, rw, re = self._key_regions(op.class_keys[1:])
        nbrs = (rn, rs, rw, re)
        d = np.zeros(rp.shape[0])
        b = np.zeros(rp.shape[0])
        gs = []
        for (_, _, direction), rx in zip(SIDES, nbrs):
            k = self.kx if direction == "x" else self.ky
            kn = np.where(self.kind[rx] == FIXED, self.fixed_k[rx], k[rx])
            g, a, c = self._terms(rp, rx, k[rp], kn, 1.0)
            gs.append(g)
            d = d + (g + a)
            b = b + c
        b = b + self.source[rp] * self.h * self.h
        table = np.zeros((op.classes, 5))
        diag = np.zeros(op.classes)
        diag[1:] = d
        with np.errstate(divide="ignore", invalid="ignore"):
            for side in range(4):
                table[1:, side] = np.where(d > 0, gs[side] / d, 0.0)
            table[1:, 4] = np.where(d > 0, b / d, 0.0)
        op.table = table
        op.diag = diag

    # --- the per-cell path -----------------------------------------------------------------

    def cell_conductivities(self) -> tuple[np.ndarray, np.ndarray]:
        """(kx, ky) per cell, (rows, cols): interior cells their region's (or map's) value, fixed cells
        their own conductivity (0 where they have none), 1 elsewhere."""
        codes = self.op.codes
        fixed = self.kind[codes] == FIXED
        kx = np.where(fixed, self.fixed_k[codes], self.kx[codes])
        ky = np.where(fixed, self.fixed_k[codes], self.ky[codes])
        index = {r.name: i for i, r in enumerate(self.case.regions)}
        for m in self.case.maps:
            if m.key == "conductivity":
                cells = codes == index[m.region]
                kx[cells] = m.values[cells]
                ky[cells] = m.values[cells]
        return kx, ky

    def cell_sources(self) -> np.ndarray:
        codes = self.op.codes
        s = self.source[codes]
        index = {r.name: i for i, r in enumerate(self.case.regions)}
        for m in self.case.maps:
            if m.key == "source":
                cells = codes == index[m.region]
                s[cells] = m.values[cells]
        return s

    def _factor(self, jj, direction: str, side: int):
        if not self.axisymmetric:
            return 1.0
        h = self.h
        if direction == "y":
            return (jj + 0.5) * h
        return (jj + (0 if side == 2 else 1)) * h

    def volume_factor(self, jj):
        return (jj + 0.5) * self.h if self.axisymmetric else 1.0

    def _side_arrays(self, ii, jj, side, kx, ky):
        """For cells (ii, jj) and one side: regions of P and N, conductivities, geometric factor."""
        codes = self.op.codes
        rows, cols = codes.shape
        di, dj, direction = SIDES[side]
        a, c = ii + di, jj + dj
        inside = (a >= 0) & (a < rows) & (c >= 0) & (c < cols)
        a = np.clip(a, 0, rows - 1)
        c = np.clip(c, 0, cols - 1)
        rp = codes[ii, jj]
        rn = np.where(inside, codes[a, c], self.border)
        k = kx if direction == "x" else ky
        kp = k[ii, jj]
        kn = np.where(inside, k[a, c], 1.0)
        return rp, rn, kp, kn, self._factor(jj, direction, side)

    def _cell_rows(self, ii, jj):
        """Per-cell (G to each neighbour, diagonal D, right-hand side b) of the interior cells (ii, jj)."""
        n = ii.shape[0]
        kx, ky = self.cell_conductivities()
        d = np.zeros(n)
        b = np.zeros(n)
        gs = []
        for side in range(4):
            g, a, c = self._terms(*self._side_arrays(ii, jj, side, kx, ky))
            gs.append(g)
            d = d + (g + a)
            b = b + c
        b = b + self.cell_sources()[ii, jj] * self.h * self.h * self.volume_factor(jj)
        if n and not np.all(d > 0):  # pragma: no cover - the anchoring check catches these first
            from relaxtui.errors import CaseError

            raise CaseError("an interior cell has neither a domain neighbour nor a convection face")
        return gs, d, b

    def _assemble_mapped(self, assemble) -> None:
        """Planar maps: the class path everywhere, then a class of its own for every cell whose
        equation a map touches (the mapped region's cells and, for a conductivity map, their
        interior neighbours). A map over a small part of a picture costs only that part."""
        from relaxtui.solver.assembled import MIN_RUN, _class_dtype

        op = self.op
        op._assemble(assemble)
        self._class_table()
        codes = op.codes
        rows, cols = codes.shape
        index = {r.name: i for i, r in enumerate(self.case.regions)}
        touched = np.zeros(codes.shape, dtype=bool)
        for m in self.case.maps:
            cells = codes == index[m.region]
            touched |= cells
            if m.key == "conductivity":
                touched[1:] |= cells[:-1]
                touched[:-1] |= cells[1:]
                touched[:, 1:] |= cells[:, :-1]
                touched[:, :-1] |= cells[:, 1:]
        touched &= self.kind[codes] == INTERIOR
        ii, jj = np.nonzero(touched)
        n = ii.shape[0]
        gs, d, b = self._cell_rows(ii, jj)
        base = op.classes
        classes = base + n
        cls = np.zeros((rows + 2, cols + 2), dtype=_class_dtype(classes))
        cls[...] = op.cls
        cls[1:-1, 1:-1][touched] = np.arange(base, classes, dtype=np.int64).astype(cls.dtype)
        rows_new = np.zeros((n, 5))
        for side in range(4):
            rows_new[:, side] = gs[side] / d
        rows_new[:, 4] = b / d
        op.table = np.concatenate((op.table, rows_new))
        op.diag = np.concatenate((op.diag, d))
        op.cls = cls
        op.classes = classes
        # face counts come from the codes (Physics.face_counts): no per-class keys or counts are kept
        op.class_keys = np.full(1, -1, dtype=np.int64)
        op.class_cells = np.zeros(1, dtype=np.int64)
        op.row_ptr, op.seg_start, op.seg_end, op.seg_class = assemble.segments(op.cls, MIN_RUN)
        op._segments = (op.row_ptr, op.seg_start, op.seg_end, op.seg_class)
        op.cells_streamed = int((op.seg_end.astype(np.int64) - op.seg_start).sum())
        self.cells_with_own_class = int(n)

    def _assemble_cells(self, assemble) -> None:
        from relaxtui.solver.assembled import MIN_RUN, _class_dtype

        op = self.op
        codes = op.codes
        rows, cols = codes.shape
        interior = self.kind[codes] == INTERIOR
        ii, jj = np.nonzero(interior)
        n = ii.shape[0]
        gs, d, b = self._cell_rows(ii, jj)
        op.classes = n + 1
        op.cls = np.zeros((rows + 2, cols + 2), dtype=_class_dtype(n + 1))
        op.cls[1:-1, 1:-1][interior] = np.arange(1, n + 1, dtype=np.int64).astype(op.cls.dtype)
        table = np.zeros((n + 1, 5))
        for side in range(4):
            table[1:, side] = gs[side] / d
        table[1:, 4] = b / d
        op.table = table
        op.diag = np.concatenate(([0.0], d))
        op.unknowns = int(n)
        op.region_cells = np.bincount(codes.ravel(), minlength=self.border).astype(np.int64)
        # classes are cells: no keys; a stand-in key array keeps memory_bytes and the v1 helpers working
        op.class_keys = np.full(1, -1, dtype=np.int64)
        op.class_cells = np.zeros(1, dtype=np.int64)
        op.row_ptr, op.seg_start, op.seg_end, op.seg_class = assemble.segments(op.cls, MIN_RUN)
        op._segments = (op.row_ptr, op.seg_start, op.seg_end, op.seg_class)
        op._boundary = np.zeros(1, dtype=np.uint8)
        op.cells_streamed = int((op.seg_end.astype(np.int64) - op.seg_start).sum())

    # --- entry points ----------------------------------------------------------------------

    def _assemble_columns(self, assemble) -> None:
        """Axisymmetric without maps: a cell's weights depend on its v1 class and its column only,
        so the classes are the distinct (v1 class, column) pairs; the table stays small (it is
        read from cache) and a sweep streams a class code of 1-4 B per cell, not 48 B of weights."""
        from relaxtui.solver.assembled import MIN_RUN, _class_dtype

        op = self.op
        op._assemble(assemble)
        rows, cols = op.shape
        inner = op.cls[1:-1, 1:-1]
        live = inner != 0
        pair = inner.astype(np.int64) * cols + np.arange(cols, dtype=np.int64)[None, :]
        pairs, inverse = np.unique(pair[live], return_inverse=True)
        v1_class, column = pairs // cols, pairs % cols
        keys = op.class_keys[v1_class]
        rp, rn, rs, rw, re = self._key_regions(keys)
        d = np.zeros(pairs.shape[0])
        b = np.zeros(pairs.shape[0])
        gs = []
        for side, ((_, _, direction), rx) in enumerate(zip(SIDES, (rn, rs, rw, re))):
            kd = self.kx if direction == "x" else self.ky
            kn = np.where(self.kind[rx] == FIXED, self.fixed_k[rx], kd[rx])
            g, a, c = self._terms(rp, rx, kd[rp], kn, self._factor(column, direction, side))
            gs.append(g)
            d = d + (g + a)
            b = b + c
        b = b + self.source[rp] * self.h * self.h * self.volume_factor(column)
        classes = pairs.shape[0] + 1
        cls = np.zeros((rows + 2, cols + 2), dtype=_class_dtype(classes))
        cls[1:-1, 1:-1][live] = (inverse.ravel() + 1).astype(cls.dtype)
        op.cls = cls
        op.classes = classes
        table = np.zeros((classes, 5))
        for side in range(4):
            table[1:, side] = gs[side] / d
        table[1:, 4] = b / d
        op.table = table
        op.diag = np.concatenate(([0.0], d))
        op.class_keys = np.concatenate(([-1], keys)).astype(np.int64)
        op.class_cells = np.bincount(cls[1:-1, 1:-1].ravel(), minlength=classes).astype(np.int64)
        op.class_cells[0] = 0
        op.row_ptr, op.seg_start, op.seg_end, op.seg_class = assemble.segments(op.cls, MIN_RUN)
        op._segments = (op.row_ptr, op.seg_start, op.seg_end, op.seg_class)
        op.cells_streamed = int((op.seg_end.astype(np.int64) - op.seg_start).sum())

    def assemble(self, assemble) -> None:
        """Fill the operator's arrays (``cls``, ``table``, ``diag``, segments, counts)."""
        if self.axisymmetric and not self.case.maps:
            self._assemble_columns(assemble)
        elif self.case.maps and not self.axisymmetric:
            self._assemble_mapped(assemble)
        elif self.per_cell:
            self._assemble_cells(assemble)
        else:
            self.op._assemble(assemble)
            self._class_table()

    def face_counts(self) -> np.ndarray:
        """Faces between interior cells and each region (int64, one entry per region), from the codes."""
        codes = self.op.codes
        n = self.border
        interior = self.kind[codes] == INTERIOR
        ii, jj = np.nonzero(interior)
        out = np.zeros(n + 1, dtype=np.int64)
        rows, cols = codes.shape
        for di, dj, _ in SIDES:
            a, c = ii + di, jj + dj
            inside = (a >= 0) & (a < rows) & (c >= 0) & (c < cols)
            rn = np.where(inside, codes[np.clip(a, 0, rows - 1), np.clip(c, 0, cols - 1)], n)
            out += np.bincount(rn, minlength=n + 1)
        return out[:n]

    def flows(self, u) -> tuple[dict[str, float], float, float]:
        """The contract's flows with the v1.1 face conductances (see :meth:`Operator.flows`)."""
        op = self.op
        codes = op.codes
        interior = self.kind[codes] == INTERIOR
        ii, jj = np.nonzero(interior)
        kx, ky = self.cell_conductivities()
        field = op.view(u)
        up = field[ii, jj]
        acc = np.zeros(self.border + 1)
        for side in range(4):
            rp, rn, kp, kn, fac = self._side_arrays(ii, jj, side, kx, ky)
            boundary = np.isin(self.kind[rn], (FIXED, FLUX, CONVECTION))
            if not boundary.any():
                continue
            sel = np.flatnonzero(boundary)
            f = fac[sel] if isinstance(fac, np.ndarray) else fac
            _, a, c = self._terms(rp[sel], rn[sel], kp[sel], kn[sel], f)
            acc += np.bincount(rn[sel], weights=c - a * up[sel], minlength=self.border + 1)
        per_region = acc[: self.border] * self.flow_scale
        h2 = self.h * self.h
        source_total = float(np.sum(self.cell_sources()[ii, jj] * self.volume_factor(jj)) * h2 * self.flow_scale)
        from relaxtui.solver.assembled import flow_balance

        return flow_balance(self.case.regions, per_region, source_total)


def _harmonic(a, b):
    """2ab/(a + b) as 2 k_min / (1 + k_min/k_max), bit for bit the kernels' face_conductance."""
    lo, hi = np.minimum(a, b), np.maximum(a, b)
    return lo / (0.5 + 0.5 * (lo / hi))
