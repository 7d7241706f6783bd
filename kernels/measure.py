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


@kernel(inline=True)
def _in_domain(codes, kind, i, j, rows, cols):
    if i < 0 or i >= rows or j < 0 or j >= cols:
        return False
    k = kind[codes[i, j]]
    return k == INTERIOR or k == FIXED


@kernel(inline=True)
def _difference(vc, vp, vn, has_p, has_n, h):
    """d u / d index / h at a cell: central where both neighbours are in the domain, one-sided where one
    is, 0 where neither (the rule and the order of operations of relaxtui.output.flux.gradient)."""
    g = 0.0
    g += (vn - vc) if has_n else 0.0
    g += (vc - vp) if has_p else 0.0
    if has_p and has_n:
        g *= 0.5
    return g / h


@kernel(inline=True)
def _conductivity(codes, kind, cond, inherit, i, j, rows, cols):
    """A domain cell's conductivity (relaxtui.output.flux.cell_conductivity): its region's, or for a fixed
    region without one the mean over its interior 4-neighbours (NaN with none)."""
    r = codes[i, j]
    if not inherit[r]:
        return cond[r]
    total = 0.0
    count = 0
    for side in range(4):  # north, south, west, east: the reference's order of summation
        a = i + (-1 if side == 0 else (1 if side == 1 else 0))
        b = j + (-1 if side == 2 else (1 if side == 3 else 0))
        if 0 <= a < rows and 0 <= b < cols:
            rn = codes[a, b]
            if kind[rn] == INTERIOR:
                total += cond[rn]
                count += 1
    return total / count if count > 0 else np.nan


@kernel(inline=True)
def _exported_at(codes, kind, value, u, i, j, du):
    """The exported value of cell (i, j) of ``codes`` (see :func:`export_field`: u, a fixed value, or NaN),
    its u at row i + du of ``u`` (du = 1: the padded layout)."""
    r = codes[i, j]
    k = kind[r]
    if k == INTERIOR:
        return np.float64(u[i + du, j + 1])
    if k == FIXED:
        return value[r]
    return np.nan


@kernel(inline=True)
def _exported(codes, kind, value, u, i, j):
    """The exported value of cell (i, j) (see :func:`export_field`): u, a fixed value, or NaN."""
    return _exported_at(codes, kind, value, u, i, j, 1)


@kernel(parallel=True)
def field_summary(codes, kind, value, cond, inherit, u, h, nblk, r0, r1, du):
    """Per row block of rows [r0, r1) of ``codes``, the report's extremes and peak flux, read straight
    from the padded working field.

    The exported field (:func:`export_field`: u on interior cells, the exact value on fixed ones,
    NaN elsewhere) is never built: each cell's value and its 4 neighbours' are read where needed.
    ``cond`` per region is the conductivity used for the flux (interior: its own, a fixed region:
    its declared one), ``inherit`` marks fixed regions without one (the mean of their interior
    neighbours'). The flux is q = -k grad u with the differences of relaxtui.output.flux.gradient
    (x right, y up; row i + 1 is down). Returns (nblk, 12) float64 rows
    [found, min, row, col, max, row, col, |q|, qx, qy, row, col]: ``found`` 1 when the block has a
    finite value; |q| is -1 when it has no finite flux. Within a block the first cell in row-major
    order wins a tie; the caller combines the blocks in order keeping strictly better ones, so the
    result does not depend on ``nblk``.

    The whole grid: ``codes`` (rows, cols), ``u`` padded, r0 = 0, r1 = rows, du = 1. A strip of it
    (the MPI ranks' field summary): ``codes`` holds the strip's rows and the neighbours' edge rows
    around them, ``u`` holds cell (i, j) of ``codes`` at row i + du (du = 0 when ``codes`` starts with
    the neighbour's row, which is ``u``'s halo row 0), and [r0, r1) are the strip's own rows; cells
    outside ``codes`` are outside the domain, as at the picture's edge. Row indices are ``codes``'.
    """
    rows, cols = codes.shape
    out = np.zeros((nblk, 12))
    for b in prange(nblk):
        lo, hi = span(b, r1 - r0, nblk)
        lo += r0
        hi += r0
        found = False
        vmin = np.inf
        vmax = -np.inf
        imin = jmin = imax = jmax = -1
        best = -1.0
        bqx = bqy = 0.0
        ib = jb = -1
        for i in range(lo, hi):
            for j in range(cols):
                r = codes[i, j]
                k = kind[r]
                if k != INTERIOR and k != FIXED:
                    continue
                v = _exported_at(codes, kind, value, u, i, j, du)
                if np.isfinite(v):
                    if not found or v < vmin:
                        vmin, imin, jmin = v, i, j
                    if not found or v > vmax:
                        vmax, imax, jmax = v, i, j
                    found = True
                has_w = _in_domain(codes, kind, i, j - 1, rows, cols)
                has_e = _in_domain(codes, kind, i, j + 1, rows, cols)
                has_n = _in_domain(codes, kind, i - 1, j, rows, cols)
                has_s = _in_domain(codes, kind, i + 1, j, rows, cols)
                vw = _exported_at(codes, kind, value, u, i, j - 1, du) if has_w else 0.0
                ve = _exported_at(codes, kind, value, u, i, j + 1, du) if has_e else 0.0
                vn = _exported_at(codes, kind, value, u, i - 1, j, du) if has_n else 0.0
                vs = _exported_at(codes, kind, value, u, i + 1, j, du) if has_s else 0.0
                gx = _difference(v, vw, ve, has_w, has_e, h)
                gy = -_difference(v, vn, vs, has_n, has_s, h)  # increasing row is -y
                kc = _conductivity(codes, kind, cond, inherit, i, j, rows, cols)
                qx = -(gx * kc)
                qy = -(gy * kc)
                mag = np.hypot(qx, qy)
                if np.isfinite(mag) and mag > best:
                    best, bqx, bqy, ib, jb = mag, qx, qy, i, j
        out[b, 0] = 1.0 if found else 0.0
        out[b, 1], out[b, 2], out[b, 3] = vmin, imin, jmin
        out[b, 4], out[b, 5], out[b, 6] = vmax, imax, jmax
        out[b, 7], out[b, 8], out[b, 9], out[b, 10], out[b, 11] = best, bqx, bqy, ib, jb
    return out


@kernel
def class_residual_max(u, cls, table, out):
    """out[c] = max(out[c], largest |contract residual| over the unknowns of class c) (serial: one pass).

    The per-class maxima feed the sharper residual certificate (``MultigridStepper.residual_bound``):
    ``|u - u_exact| <= (I - W)^-1 rho`` cell by cell, with rho the class's largest residual."""
    n = u.shape[0] - 2
    m = u.shape[1] - 2
    for i in range(1, n + 1):
        up, mid, dn, crow = u[i - 1, 1 : m + 1], u[i], u[i + 1, 1 : m + 1], cls[i, 1 : m + 1]
        for k in range(m):
            c = crow[k]
            if c != 0:
                r = abs(wsum_of(up, mid, dn, k, table, c) - mid[k + 1])
                if r > out[c] or r != r:
                    out[c] = r
