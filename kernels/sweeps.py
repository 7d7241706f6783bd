"""Relaxation sweeps over the class-coded operator, in place.

Layout (built by :mod:`relaxtui.kernels.assemble`, owned by ``relaxtui.solver.assembled``):
- ``u`` (rows + 2, cols + 2) float64: the field padded by one cell; cells that
  are not unknowns hold finite values (a fixed cell its value, others 0), so a
  neighbour read with weight 0 is harmless;
- ``cls`` (rows + 2, cols + 2) uint8/16/32: class per cell, 0 = not an unknown;
- ``table`` (classes, 5) float64: wN, wS, wW, wE, q per class (row 0 zero);
- row segments ``row_ptr`` (rows + 3,), ``seg_start``, ``seg_end`` (int32),
  ``seg_class`` (int64): row i's segments are ``row_ptr[i]:row_ptr[i + 1]``,
  each a column range [start, end) with a class > 0 (a *bulk* run: constant
  weights, the class array is not even read) or -1 (*mixed*: one weight
  gather per cell, class 0 cells left alone).

Every kernel uses the same update of an unknown cell P,

    s = (((wN uN + wS uS) + wW uW) + wE uE) + q,    r = s - u_P,    u_P <- u_P + omega r,

except the lexicographic one, which evaluates it as
``a = u_P + omega ((wN uN + wS uS + wE uE) + q - u_P)``, ``u_P <- a + (omega wW) uW``
so that the serial dependency through the west neighbour is one multiply and
one add (see :func:`sor_lexicographic`). ``r`` is the contract residual.

Each kernel runs ``sweeps`` sweeps and writes, per sweep, the largest
|u_new - u_old| into ``updates`` and the largest residual into ``residuals``
(Jacobi: the exact contract residual of the field before the sweep; the
Gauss-Seidel family: the residual of each cell at the moment it is updated,
|u_new - u_old| / omega). It returns the number of sweeps done, stopping
after a sweep whose largest update is not finite. The maxima are integer
reductions over bit patterns (:mod:`relaxtui.kernels._bits`), computed in the
same loop as the update.

Why the kernels are shaped this way, with the measurements: docs/design/kernels.md.

Coarse grids whose weights vary per cell (multigrid) use the same kernels:
give every cell its own class (``cls`` uint32 = 1 + cell number, ``table`` one
row per cell, the right-hand side in column 4) and build segments with
``assemble.segments``: they then come out mixed.
"""

import numpy as np
from numba import prange
from relaxtui.kernels._bits import abs_bits, from_bits
from relaxtui.kernels._jit import kernel, serial_twin
from relaxtui.kernels.blocks import copy_into, segment, span, wsum, wsum_of

RED, BLACK = 0, 1  # colour of cell (i, j) is (i + j) & 1, padded or not (the padding shifts both by 1)


# --- one segment -------------------------------------------------------------------------
# Conventions: ``up``, ``dn``, ``out``, ``t`` and ``crow`` are the segment's cells of the row
# above, the row below, the output, a scratch row and the class row; ``mid`` is the segment's
# own row with one halo cell at each end (cell k of the segment is mid[k + 1]). Loops start at
# a constant 0 so that numba emits no negative-index wraparound and LLVM vectorises them.


@kernel(inline=True)
def _jacobi_cell(u, s, omega, live, mu, mr):
    """(new value, running maxima) of one Jacobi update from the stencil sum s; a cell that is not
    live keeps u and counts a residual of 0."""
    r = s - u
    v = u + omega * r
    v = v if live else u
    r = r if live else 0.0
    return v, max(mu, abs_bits(v - u)), max(mr, abs_bits(r))


@kernel(inline=True)
def _jacobi_bulk(up, mid, dn, out, wn, ws, ww, we, q, omega, mu, mr):
    for k in range(out.shape[0]):
        v, mu, mr = _jacobi_cell(mid[k + 1], wsum(up, mid, dn, k, wn, ws, ww, we) + q, omega, True, mu, mr)
        out[k] = v
    return mu, mr


@kernel(inline=True)
def _jacobi_mixed(up, mid, dn, out, crow, table, omega, mu, mr):
    for k in range(out.shape[0]):
        c = crow[k]
        v, mu, mr = _jacobi_cell(mid[k + 1], wsum_of(up, mid, dn, k, table, c), omega, c != 0, mu, mr)
        out[k] = v
    return mu, mr


@kernel(inline=True)
def _stencil_bulk(up, mid, dn, t, wn, ws, ww, we, q):
    for k in range(t.shape[0]):
        t[k] = wsum(up, mid, dn, k, wn, ws, ww, we) + q


@kernel(inline=True)
def _blend_bulk(cells, t, parity, omega, mu):
    # update the cells k with (k & 1) == parity from s = t[k]
    for k in range(t.shape[0]):
        u = cells[k]
        v = u + omega * (t[k] - u)
        v = v if (k & 1) == parity else u
        cells[k] = v
        mu = max(mu, abs_bits(v - u))
    return mu


@kernel(inline=True)
def _stencil_mixed(up, mid, dn, t, crow, table):
    for k in range(t.shape[0]):
        t[k] = wsum_of(up, mid, dn, k, table, crow[k])


@kernel(inline=True)
def _colour_bulk(up, mid, dn, half, wn, ws, ww, we, q, omega, mu):
    """Update cells 0, 2, 4, ... (``half`` of them) of a bulk segment in place, from the stencil
    sum; the other cells are only read. The caller offsets the segment's slices by the colour's
    parity, so the index is 2 k from a constant 0: no wraparound check, and LLVM vectorises the
    stride-2 loads and stores. Used for float64 fields: on the 2-core AVX2 machine (load 1-2) a
    red-black sweep of 4096² ran at 0.64-0.71 of the Jacobi rate timed beside it, against 0.46 for
    the stencil-then-blend form; a float32 field went the other way (733 against 1 274 Mcell/s for
    the blend), so float32 keeps the blend."""
    for h in range(half):
        k = 2 * h
        u = mid[k + 1]
        v = u + omega * ((wsum(up, mid, dn, k, wn, ws, ww, we) + q) - u)
        mid[k + 1] = v
        mu = max(mu, abs_bits(v - u))
    return mu


@kernel(inline=True)
def _blend_mixed(cells, t, crow, parity, omega, mu):
    for k in range(t.shape[0]):
        u = cells[k]
        v = u + omega * (t[k] - u)
        v = v if ((k & 1) == parity and crow[k] != 0) else u
        cells[k] = v
        mu = max(mu, abs_bits(v - u))
    return mu


# --- rows ----------------------------------------------------------------------------------


@kernel
def _jacobi_rows(src, dst, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, r0, r1):
    mu = 0
    mr = 0
    for i in range(r0, r1):
        up, mid, dn, out, crow = src[i - 1], src[i], src[i + 1], dst[i], cls[i]
        for s in range(row_ptr[i], row_ptr[i + 1]):
            j0, j1, c = segment(seg_start, seg_end, seg_class, s)
            if c > 0:
                mu, mr = _jacobi_bulk(up[j0:j1], mid[j0 - 1 : j1 + 1], dn[j0:j1], out[j0:j1],
                                      table[c, 0], table[c, 1], table[c, 2], table[c, 3], table[c, 4], omega, mu, mr)
            else:
                mu, mr = _jacobi_mixed(up[j0:j1], mid[j0 - 1 : j1 + 1], dn[j0:j1], out[j0:j1], crow[j0:j1], table, omega, mu, mr)
    return mu, mr


@kernel
def _colour_row(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, i, colour, tmp, mu):
    """Update the cells of one colour in row i (in place): a float64 bulk segment by a stride-2 loop
    over that colour's cells; float32 bulk and every mixed segment by s for the whole segment into
    tmp, then a blend. ``mid.itemsize`` is a constant of the compiled type: one branch survives."""
    up, mid, dn, crow = u[i - 1], u[i], u[i + 1], cls[i]
    for s in range(row_ptr[i], row_ptr[i + 1]):
        j0, j1, c = segment(seg_start, seg_end, seg_class, s)
        parity = (colour + i + j0) & 1  # cell j0 + k has the colour iff (k & 1) == parity
        t = tmp[: j1 - j0]
        if c > 0 and mid.itemsize == 8:
            a = j0 + parity
            mu = _colour_bulk(up[a:j1], mid[a - 1 : j1 + 1], dn[a:j1], (j1 - a + 1) // 2,
                              table[c, 0], table[c, 1], table[c, 2], table[c, 3], table[c, 4], omega, mu)
        elif c > 0:
            _stencil_bulk(up[j0:j1], mid[j0 - 1 : j1 + 1], dn[j0:j1], t, table[c, 0], table[c, 1], table[c, 2], table[c, 3], table[c, 4])
            mu = _blend_bulk(mid[j0:j1], t, parity, omega, mu)
        else:
            _stencil_mixed(up[j0:j1], mid[j0 - 1 : j1 + 1], dn[j0:j1], t, crow[j0:j1], table)
            mu = _blend_mixed(mid[j0:j1], t, crow[j0:j1], parity, omega, mu)
    return mu


@kernel(inline=True)
def _rb_block_inner(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, r0, r1, tmp):
    """Phase 1 of a fused red-black sweep over rows r0..r1-1: every red row, and every black
    row except the block's first and last (those read red rows of the neighbouring blocks).

    The order is red r0, red r0+1, red r0+2, black r0+1, red r0+3, black r0+2, ...: red row
    i + 1 and then black row i, both colours in one pass over the rows.
    """
    mu = np.int64(0)
    for t in range(2 * (r1 - r0)):
        if t % 2 == 0:
            mu = _colour_row(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, r0 + t // 2, np.int64(RED), tmp, mu)
        elif r0 < r0 + t // 2 - 1 < r1 - 1:
            mu = _colour_row(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, r0 + t // 2 - 1, np.int64(BLACK), tmp,
                             mu)
    return mu


@kernel(inline=True)
def _rb_block_edges(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, r0, r1, tmp):
    """Phase 2: the black rows at the block's edges (r0 and r1 - 1), once every red row is done."""
    mu = np.int64(0)
    for t in range(2):
        if t == 0 or r1 - 1 > r0:
            mu = _colour_row(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, r0 if t == 0 else r1 - 1, np.int64(BLACK),
                             tmp, mu)
    return mu


# --- sweeps ------------------------------------------------------------------------------


@kernel(parallel=True)
def jacobi(u, tmp, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, sweeps, updates, residuals, nblk):
    """Weighted Jacobi, two buffers, row blocks in parallel; the result ends in ``u``.

    ``tmp`` has u's shape and finite values outside the unknowns (zeros will
    do); it is scratch. After an odd number of sweeps the segments are
    copied back from ``tmp`` to ``u``.
    """
    n = u.shape[0] - 2
    blk_u = np.zeros(nblk, dtype=np.int64)
    blk_r = np.zeros(nblk, dtype=np.int64)
    done = 0
    for it in range(sweeps):
        src, dst = (u, tmp) if it % 2 == 0 else (tmp, u)
        for b in prange(nblk):
            lo, hi = span(b, n, nblk)
            blk_u[b], blk_r[b] = _jacobi_rows(src, dst, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, 1 + lo, 1 + hi)
        updates[it] = from_bits(blk_u.max())
        residuals[it] = from_bits(blk_r.max())
        done = it + 1
        if not np.isfinite(updates[it]):
            break
    if done % 2 == 1:
        for b in prange(nblk):
            lo, hi = span(b, n, nblk)
            for i in range(1 + lo, 1 + hi):
                for s in range(row_ptr[i], row_ptr[i + 1]):
                    u[i, seg_start[s] : seg_end[s]] = tmp[i, seg_start[s] : seg_end[s]]
    return done


@kernel(parallel=True)
def sor_red_black(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, sweeps, updates, residuals, nblk):
    """Red-black SOR (omega = 1: red-black Gauss-Seidel), colours fused, row blocks in parallel.

    Red cells are (i + j) even. Within a block, red row i + 1 and then black
    row i are updated, so the grid is streamed once per sweep; the black rows
    at block edges wait for a second, short parallel pass. Every update reads
    exactly what it reads in the two-pass schedule (all red, then all black),
    so the result is the same bit for bit, for any number of blocks.
    """
    n = u.shape[0] - 2
    width = u.shape[1]
    blk = np.zeros(nblk, dtype=np.int64)
    done = 0
    for it in range(sweeps):
        for b in prange(nblk):
            lo, hi = span(b, n, nblk)
            blk[b] = _rb_block_inner(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, 1 + lo, 1 + hi, np.empty(width))
        for b in prange(nblk):
            lo, hi = span(b, n, nblk)
            mu = _rb_block_edges(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, 1 + lo, 1 + hi, np.empty(width))
            blk[b] = max(blk[b], mu)
        updates[it] = from_bits(blk.max())
        residuals[it] = updates[it] / omega
        done = it + 1
        if not np.isfinite(updates[it]):
            break
    return done


# One-thread builds of the same two functions (small grids: no parallel start-up), with
# the call shape of the parallel ones less ``nblk``.
_jacobi_one_thread = serial_twin(jacobi)
_sor_red_black_one_thread = serial_twin(sor_red_black)


@kernel
def jacobi_serial(u, tmp, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, sweeps, updates, residuals):
    """The sweeps of :func:`jacobi` on one thread (its Python source built without ``parallel``)."""
    return _jacobi_one_thread(u, tmp, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, sweeps, updates, residuals, 1)


@kernel
def sor_red_black_serial(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, sweeps, updates, residuals):
    """The sweeps of :func:`sor_red_black` on one thread (its Python source built without ``parallel``)."""
    return _sor_red_black_one_thread(u, cls, table, row_ptr, seg_start, seg_end, seg_class, omega, sweeps, updates, residuals, 1)


GROUP = 4  # rows a lexicographic sweep advances together


@kernel
def sor_lexicographic(u, cls, table, omega, sweeps, updates, residuals):
    """Lexicographic SOR (omega = 1: Gauss-Seidel), row by row, west to east; one thread.

    The order of updates is the plain lexicographic one, but the loop walks
    ``GROUP`` rows at once on a skewed front: at step t row i0 + m updates
    column t - m. Cell (i, j) then still sees its north and west neighbours
    new and its south and east neighbours old, exactly as in the row-by-row
    order, while the out-of-order core overlaps the ``GROUP`` independent
    dependency chains (one per row) instead of waiting on one.
    """
    n0, n1 = u.shape
    last = n1 - 2
    done = 0
    for it in range(sweeps):
        mu = 0
        for i0 in range(1, n0 - 1, GROUP):
            for t in range(1, last + GROUP):
                for m in range(GROUP):
                    i = i0 + m
                    j = t - m
                    if i <= n0 - 2 and j >= 1 and j <= last:
                        c = cls[i, j]
                        if c != 0:
                            uo = u[i, j]
                            ts = ((table[c, 0] * u[i - 1, j] + table[c, 1] * u[i + 1, j]) + table[c, 3] * u[i, j + 1]) + table[c, 4]
                            a = uo + omega * (ts - uo)
                            v = a + (omega * table[c, 2]) * u[i, j - 1]
                            u[i, j] = v
                            mu = max(mu, abs_bits(v - uo))
        updates[it] = from_bits(mu)
        residuals[it] = updates[it] / omega
        done = it + 1
        if not np.isfinite(updates[it]):
            break
    return done


copy_kernel = copy_into  # dst[...] = src: the bandwidth yardstick of the benchmarks
