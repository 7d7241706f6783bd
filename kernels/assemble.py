"""Assembly kernels: region codes in, class codes, class table and row segments out.

Every interior cell's normalised equation (the contract's, divided by its
diagonal) depends only on the regions of the cell and of its 4 neighbours.
So a cell's *class* is that 5-tuple, encoded as one int64 *key*

    key = (((r_P * B + r_N) * B + r_S) * B + r_W) * B + r_E,   B = regions + 1,

where the image border is region number B - 1 (it behaves like ``outside``).
Class 0 means "not an unknown". A *bulk* cell (all 5 regions equal) gets its
region's bulk class without any search; the other interior cells (next to a
boundary or an interface, O(perimeter) of them) are keyed, the distinct keys
sorted, and each such cell finds its class by binary search.

Arrays (all image order; ``cls`` is padded by one cell on every side):
- ``codes`` (rows, cols) uint8: region index per pixel;
- ``interior`` (regions,) uint8: 1 where the region is interior;
- ``cls`` (rows + 2, cols + 2) uint8/uint16/uint32: class per cell;
- ``table`` (classes, 5) float64: wN, wS, wW, wE, q of each class;
- ``diag`` (classes,) float64: the unnormalised diagonal D of each class.

The kernels know nothing of the case file: the caller passes per-region
property arrays (see :func:`class_table`).
"""

import numpy as np
from numba import prange
from relaxtui.kernels._jit import kernel

# Region kinds as integers (the order of relaxtui.case.model.KINDS).
INTERIOR, FIXED, OUTSIDE, FLUX, CONVECTION = 0, 1, 2, 3, 4


@kernel(inline=True)
def face_conductance(a, b):
    """The harmonic mean 2ab/(a + b) of two positive conductivities, without overflow or underflow.

    Written as 2 k_min / (1 + k_min/k_max): the ratio lies in (0, 1], so the
    result is within rounding of the textbook form wherever that one is finite,
    and stays finite for any positive float64 inputs (1e160 squared would not).
    """
    lo = a if a < b else b
    hi = b if a < b else a
    return lo / (0.5 + 0.5 * (lo / hi))


@kernel(inline=True)
def film_conductance(coefficient, kp, h):
    """U h = h / (1/coefficient + h/(2 k_P)) of a convection face, without overflow or underflow.

    The same number as 1 / (1/(coefficient h) + 1/(2 k_P)): half the harmonic
    mean of coefficient * h and 2 k_P.
    """
    return 0.5 * face_conductance(coefficient * h, 2.0 * kp)


@kernel(inline=True)
def _is_bulk(codes, i, j, r):
    rows, cols = codes.shape
    if i == 0 or j == 0 or i == rows - 1 or j == cols - 1:
        return False
    return codes[i - 1, j] == r and codes[i + 1, j] == r and codes[i, j - 1] == r and codes[i, j + 1] == r


@kernel(inline=True)
def _key(codes, i, j, border):
    rows, cols = codes.shape
    base = border + 1
    rn = codes[i - 1, j] if i > 0 else border
    rs = codes[i + 1, j] if i < rows - 1 else border
    rw = codes[i, j - 1] if j > 0 else border
    re = codes[i, j + 1] if j < cols - 1 else border
    return (((np.int64(codes[i, j]) * base + rn) * base + rs) * base + rw) * base + re


@kernel(parallel=True)
def edge_keys(codes, interior, border):
    """The distinct keys of the non-bulk interior cells, and counts.

    Returns (keys, key_cells, region_cells): ``keys`` sorted (int64), the
    number of cells with each key, and the number of cells of each region
    (int64, (border,)).
    """
    rows, cols = codes.shape
    nreg = border
    nblk = min(rows, 64)
    counts = np.zeros(rows, dtype=np.int64)
    per_block = np.zeros((nblk, nreg), dtype=np.int64)
    for b in prange(nblk):
        for i in range(b * rows // nblk, (b + 1) * rows // nblk):
            n = 0
            for j in range(cols):
                r = codes[i, j]
                per_block[b, r] += 1
                if interior[r] != 0 and not _is_bulk(codes, i, j, r):
                    n += 1
            counts[i] = n
    region_cells = np.zeros(nreg, dtype=np.int64)
    for b in range(nblk):
        for r in range(nreg):
            region_cells[r] += per_block[b, r]
    offsets = np.zeros(rows + 1, dtype=np.int64)
    for i in range(rows):
        offsets[i + 1] = offsets[i] + counts[i]
    keys = np.empty(offsets[rows], dtype=np.int64)
    for i in prange(rows):
        k = offsets[i]
        for j in range(cols):
            r = codes[i, j]
            if interior[r] != 0 and not _is_bulk(codes, i, j, r):
                keys[k] = _key(codes, i, j, border)
                k += 1
    keys.sort()
    distinct = 0
    for k in range(keys.shape[0]):
        if k == 0 or keys[k] != keys[k - 1]:
            distinct += 1
    out = np.empty(distinct, dtype=np.int64)
    cells = np.zeros(distinct, dtype=np.int64)
    d = -1
    for k in range(keys.shape[0]):
        if k == 0 or keys[k] != keys[k - 1]:
            d += 1
            out[d] = keys[k]
        cells[d] += 1
    return out, cells, region_cells


@kernel(parallel=True)
def assign_classes(codes, interior, border, bulk_class, edge_keys, edge_base, cls):
    """Fill the padded class array ``cls`` (zero on entry) in place.

    Bulk cells of region r get ``bulk_class[r]``; a non-bulk interior cell
    gets ``edge_base + position of its key in the sorted edge_keys``.
    """
    rows, cols = codes.shape
    for i in prange(rows):
        for j in range(cols):
            r = codes[i, j]
            if interior[r] == 0:
                continue
            if _is_bulk(codes, i, j, r):
                cls[i + 1, j + 1] = bulk_class[r]
            else:
                cls[i + 1, j + 1] = edge_base + np.searchsorted(edge_keys, _key(codes, i, j, border))


@kernel
def class_table(class_keys, border, kind, conductivity, fixed_conductivity, value, flux, coefficient, ambient, source, h, table, diag):
    """Fill ``table`` (classes, 5) and ``diag`` (classes,) from each class's key (class 0: key < 0, left zero).

    Per region (index < border): ``kind``, ``conductivity`` (interior k),
    ``fixed_conductivity`` (k of a fixed region, <= 0 when it has none: the
    face then uses k_P), ``value`` (fixed), ``flux``, ``coefficient`` and
    ``ambient`` (convection), ``source`` (interior). ``h`` is the cell size.
    A class whose diagonal is 0 (an interior cell with no domain neighbour
    and no convection face) gets diag 0 and a zero row; the caller rejects it.
    """
    base = border + 1
    for c in range(class_keys.shape[0]):
        key = class_keys[c]
        if key < 0:
            continue
        re = key % base
        key //= base
        rw = key % base
        key //= base
        rs = key % base
        key //= base
        rn = key % base
        rp = key // base
        kp = conductivity[rp]
        d = 0.0
        b = 0.0
        g = np.zeros(4)
        for side in range(4):
            rx = rn if side == 0 else (rs if side == 1 else (rw if side == 2 else re))
            if rx == border:
                continue
            kx = kind[rx]
            if kx == INTERIOR:
                kn = conductivity[rx]
                gx = face_conductance(kp, kn)
                g[side] = gx
                d += gx
            elif kx == FIXED:
                kn = fixed_conductivity[rx]
                if kn <= 0.0:
                    kn = kp
                gx = face_conductance(kp, kn)
                d += gx
                b += gx * value[rx]
            elif kx == FLUX:
                b += flux[rx] * h
            elif kx == CONVECTION:
                uh = film_conductance(coefficient[rx], kp, h)
                d += uh
                b += uh * ambient[rx]
        b += source[rp] * h * h
        diag[c] = d
        if d > 0.0:
            for side in range(4):
                table[c, side] = g[side] / d
            table[c, 4] = b / d


@kernel(inline=True)
def _scan_row(cls, i, min_run, out_start, out_end, out_class, k0, write):
    """Split padded row i (cells 1..cols) into segments; return the count (and write them if asked).

    A run of one nonzero class of at least ``min_run`` cells is a *bulk*
    segment (its class, constant weights); a run of class 0 that long is
    skipped; everything in between forms *mixed* segments (class -1: a
    weight gather per cell, class 0 cells masked). Mixed segments holding no
    unknown are dropped.
    """
    last = cls.shape[1] - 2
    k = k0
    j = 1
    mixed_start = -1
    mixed_any = False
    while j <= last:
        c = cls[i, j]
        e = j + 1
        while e <= last and cls[i, e] == c:
            e += 1
        if e - j >= min_run:
            if mixed_start >= 0:
                if mixed_any:
                    if write:
                        out_start[k] = mixed_start
                        out_end[k] = j
                        out_class[k] = -1
                    k += 1
                mixed_start = -1
                mixed_any = False
            if c != 0:
                if write:
                    out_start[k] = j
                    out_end[k] = e
                    out_class[k] = c
                k += 1
        else:
            if mixed_start < 0:
                mixed_start = j
            if c != 0:
                mixed_any = True
        j = e
    if mixed_start >= 0 and mixed_any:
        if write:
            out_start[k] = mixed_start
            out_end[k] = last + 1
            out_class[k] = -1
        k += 1
    return k - k0


@kernel(parallel=True)
def segments(cls, min_run):
    """Row segments of the padded class array (see :func:`_scan_row`).

    Returns (row_ptr, seg_start, seg_end, seg_class): row i's segments are
    ``row_ptr[i]:row_ptr[i + 1]`` (int64, (rows + 3,)); start and end (int32)
    are padded column indices, class (int64) > 0 for bulk, -1 for mixed.
    """
    n = cls.shape[0]
    counts = np.zeros(n, dtype=np.int64)
    dummy32 = np.zeros(1, dtype=np.int32)
    dummy64 = np.zeros(1, dtype=np.int64)
    for i in prange(1, n - 1):
        counts[i] = _scan_row(cls, i, min_run, dummy32, dummy32, dummy64, 0, False)
    row_ptr = np.zeros(n + 1, dtype=np.int64)
    for i in range(n):
        row_ptr[i + 1] = row_ptr[i] + counts[i]
    total = row_ptr[n]
    seg_start = np.empty(total, dtype=np.int32)
    seg_end = np.empty(total, dtype=np.int32)
    seg_class = np.empty(total, dtype=np.int64)
    for i in prange(1, n - 1):
        _scan_row(cls, i, min_run, seg_start, seg_end, seg_class, row_ptr[i], True)
    return row_ptr, seg_start, seg_end, seg_class
