"""Kernels that read the field: residual, Jacobi operator, flows, export, start field.

Same layout as :mod:`relaxtui.kernels.sweeps` (padded field ``u``, padded
class array ``cls``, class ``table``, row segments); ``codes`` is the
unpadded region-index picture and the per-region arrays are those of
:func:`relaxtui.kernels.assemble.class_table`.
"""

import numpy as np
from numba import prange
from relaxtui.kernels._bits import abs_bits, from_bits
from relaxtui.kernels._jit import kernel
from relaxtui.kernels.assemble import face_conductance, film_conductance
from relaxtui.kernels.blocks import segment, span, wsum, wsum_of

INTERIOR, FIXED, OUTSIDE, FLUX, CONVECTION = 0, 1, 2, 3, 4


@kernel(inline=True)
def _residual_bulk(up, mid, dn, wn, ws, ww, we, q, out, write, mr):
    for k in range(up.shape[0]):
        s = wsum(up, mid, dn, k, wn, ws, ww, we) + q
        r = s - mid[k + 1]
        if write:
            out[k] = r
        mr = max(mr, abs_bits(r))
    return mr


@kernel(inline=True)
def _residual_mixed(up, mid, dn, crow, table, out, write, mr):
    for k in range(up.shape[0]):
        c = crow[k]
        s = wsum_of(up, mid, dn, k, table, c)
        r = s - mid[k + 1]
        r = r if c != 0 else 0.0
        if write and c != 0:
            out[k] = r
        mr = max(mr, abs_bits(r))
    return mr


@kernel(parallel=True)
def residual(u, cls, table, row_ptr, seg_start, seg_end, seg_class, out, write, nblk):
    """Largest |contract residual| over the unknowns; with ``write``, also out[i - 1, j - 1] = residual.

    ``out`` is (rows, cols) (or a dummy when ``write`` is False); cells that
    are not unknowns are not written, the caller fills them with NaN first.
    """
    n = u.shape[0] - 2
    blk = np.zeros(nblk, dtype=np.int64)
    for b in prange(nblk):
        mr = 0
        lo, hi = span(b, n, nblk)
        for i in range(1 + lo, 1 + hi):
            up, mid, dn, crow = u[i - 1], u[i], u[i + 1], cls[i]
            orow = out[i - 1] if write else out[0]
            for s in range(row_ptr[i], row_ptr[i + 1]):
                j0, j1, c = segment(seg_start, seg_end, seg_class, s)
                o = orow[j0 - 1 : j1 - 1] if write else orow
                if c > 0:
                    mr = _residual_bulk(up[j0:j1], mid[j0 - 1 : j1 + 1], dn[j0:j1],
                                        table[c, 0], table[c, 1], table[c, 2], table[c, 3], table[c, 4], o, write, mr)
                else:
                    mr = _residual_mixed(up[j0:j1], mid[j0 - 1 : j1 + 1], dn[j0:j1], crow[j0:j1], table, o, write, mr)
        blk[b] = mr
    return from_bits(blk.max())


@kernel(inline=True)
def _apply_bulk(up, mid, dn, out, wn, ws, ww, we):
    for k in range(out.shape[0]):
        out[k] = wsum(up, mid, dn, k, wn, ws, ww, we)


@kernel(inline=True)
def _apply_mixed(up, mid, dn, out, crow, table):
    for k in range(out.shape[0]):
        c = crow[k]
        out[k] = wsum(up, mid, dn, k, table[c, 0], table[c, 1], table[c, 2], table[c, 3])


@kernel(parallel=True)
def jacobi_apply(x, out, cls, table, row_ptr, seg_start, seg_end, seg_class, nblk):
    """out = J x on the unknowns (J: the weights, no right-hand side); out must be zero elsewhere on entry."""
    n = x.shape[0] - 2
    for b in prange(nblk):
        lo, hi = span(b, n, nblk)
        for i in range(1 + lo, 1 + hi):
            up, mid, dn, orow, crow = x[i - 1], x[i], x[i + 1], out[i], cls[i]
            for s in range(row_ptr[i], row_ptr[i + 1]):
                j0, j1, c = segment(seg_start, seg_end, seg_class, s)
                if c > 0:
                    _apply_bulk(up[j0:j1], mid[j0 - 1 : j1 + 1], dn[j0:j1], orow[j0:j1], table[c, 0], table[c, 1], table[c, 2], table[c, 3])
                else:
                    _apply_mixed(up[j0:j1], mid[j0 - 1 : j1 + 1], dn[j0:j1], orow[j0:j1], crow[j0:j1], table)


@kernel(parallel=True)
def flows(codes, up_codes, dn_codes, has_up, has_dn, u, cls, row_ptr, seg_start, seg_end, seg_class, boundary, kind,
          conductivity, fixed_conductivity, value, flux, coefficient, ambient, h, nblk):
    """Per row block: the flow into the domain through each region's faces.

    ``acc[b, r]`` sums, over the interior cells of row block b and their faces
    with region r, G (value - u_P) for a fixed r, flux h for a flux r and
    U h (ambient - u_P) for a convection r (not multiplied by the depth).
    Only cells of classes with ``boundary[class] != 0`` (a fixed, flux or
    convection neighbour) are visited, found through the row segments: bulk
    runs never have such faces. ``u`` and ``cls`` are padded, ``codes`` is not.
    Blocks depend on ``nblk`` only, so the caller's sum does not depend on
    the thread count.

    ``up_codes`` and ``dn_codes`` are the picture rows just above and below
    ``codes``, read only when ``has_up`` / ``has_dn``: a strip of an MPI run
    (:mod:`relaxtui.parallel.strip`) passes its neighbours' rows; the whole
    picture passes any row and False, False (no neighbour rows).
    """
    rows, cols = codes.shape
    nreg = kind.shape[0]
    acc = np.zeros((nblk, nreg))
    for b in prange(nblk):
        for pi in range(1 + b * rows // nblk, 1 + (b + 1) * rows // nblk):
            i = pi - 1
            for s in range(row_ptr[pi], row_ptr[pi + 1]):
                if seg_class[s] > 0 and boundary[seg_class[s]] == 0:
                    continue
                for pj in range(seg_start[s], seg_end[s]):
                    if boundary[cls[pi, pj]] == 0:
                        continue
                    j = pj - 1
                    kp = conductivity[codes[i, j]]
                    up = u[pi, pj]
                    for side in range(4):
                        a = i + (-1 if side == 0 else (1 if side == 1 else 0))
                        c = j + (-1 if side == 2 else (1 if side == 3 else 0))
                        if c < 0 or c >= cols:
                            continue
                        if a < 0:
                            if not has_up:
                                continue
                            rx = up_codes[c]
                        elif a >= rows:
                            if not has_dn:
                                continue
                            rx = dn_codes[c]
                        else:
                            rx = codes[a, c]
                        kx = kind[rx]
                        if kx == FIXED:
                            kn = fixed_conductivity[rx]
                            if kn <= 0.0:
                                kn = kp
                            acc[b, rx] += face_conductance(kp, kn) * (value[rx] - up)
                        elif kx == FLUX:
                            acc[b, rx] += flux[rx] * h
                        elif kx == CONVECTION:
                            uh = film_conductance(coefficient[rx], kp, h)
                            acc[b, rx] += uh * (ambient[rx] - up)
    return acc


@kernel(parallel=True)
def export_field(codes, kind, value, u, out):
    """out (rows, cols) = the padded field's interior cells, fixed cells at their exact value
    (``value`` per code: a float32 field holds only its rounding), NaN elsewhere."""
    rows, cols = codes.shape
    for i in prange(rows):
        for j in range(cols):
            r = codes[i, j]
            k = kind[r]
            out[i, j] = u[i + 1, j + 1] if k == INTERIOR else (value[r] if k == FIXED else np.nan)


@kernel(parallel=True)
def init_field(codes, kind, value, initial, use_initial, guess, u):
    """Fill the padded field u (zeros on entry): fixed cells at their value, interior cells at
    ``initial`` (when ``use_initial``) or ``guess``.

    Returns the number of interior cells whose initial value is not finite
    (those get ``guess``); the caller rejects the field if it is not 0.
    """
    rows, cols = codes.shape
    bad = np.zeros(rows, dtype=np.int64)
    for i in prange(rows):
        for j in range(cols):
            r = codes[i, j]
            k = kind[r]
            if k == FIXED:
                u[i + 1, j + 1] = value[r]
            elif k == INTERIOR:
                v = guess
                if use_initial:
                    x = initial[i, j]
                    if np.isfinite(x):
                        v = x
                    else:
                        bad[i] += 1
                u[i + 1, j + 1] = v
    return bad.sum()


@kernel
def first_bad_initial(codes, kind, initial):
    """(row, col) of the first interior cell whose initial value is not finite, or (-1, -1)."""
    rows, cols = codes.shape
    for i in range(rows):
        for j in range(cols):
            if kind[codes[i, j]] == INTERIOR and not np.isfinite(initial[i, j]):
                return i, j
    return -1, -1
