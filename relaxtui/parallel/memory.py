"""Memory a solve split across MPI ranks needs on each rank.

The byte model of :mod:`relaxtui.solver.memory`, applied to one strip: the
working field, class codes and (Jacobi) second buffer of the strip's rows
plus one halo row above and below, and the strip's exported copy while it is
sent to rank 0. Methods whose ω or stopping rule uses the Jacobi radius
(Jacobi and red-black SOR: all that run across ranks) also hold the
estimate's arrays of the strip while the radius is estimated, before the
second buffer and the export exist; the larger of the two phases counts.
They are counted as the three fine Lanczos vectors (24 B/cell) also where
the ranks run the two-level estimate (more than radius.COARSE_UNKNOWNS
cells, 9 B/cell, :mod:`relaxtui.parallel.coarse`): see :func:`rank_bytes`.
Strips are balanced by unknown count, so a strip of a masked picture can
hold more rows than rows / P; the largest strip of an even split by rows is
counted here. Multigrid (no radius) builds its coarse levels on a band wider
than the strip by (MARGIN + GHOST) * 2**K rows on each side
(:mod:`relaxtui.parallel.multigrid`): its set-up peak is counted on that band;
rank 0's gathered coarse levels (fewer than 65 536 cells) are not counted.

Rank 0 also decodes the picture (transient, 4 B/cell), keeps the region
picture of the whole grid (1 B/cell, for the report and pictures),
assembles the whole operator once before handing out the strips (class
codes of the whole grid, transient) and gathers the exported field of the
whole grid (8 B/cell) to write the outputs, one after the other: its peak
is its strip plus about 9 B/cell of the whole grid. A case with the v1.1
per-face physics (contacts, orthotropy, maps, axisymmetry) also keeps the
whole assembled operator on rank 0 for the flows (its class codes and
per-cell conductivities): not counted here.
"""

from __future__ import annotations

from relaxtui.solver import memory

LANCZOS_VECTORS = 3  # relaxtui.parallel.strip.Strip.lanczos_begin: v, v_prev, w


def rank_bytes(rows: int, cols: int, method: str | None, materials: int, ranks: int) -> tuple[int, int]:
    """(rank 0's bytes, every other rank's bytes) for a ``rows`` x ``cols`` picture on ``ranks`` ranks."""
    rows, cols, ranks = int(rows), int(cols), max(1, int(ranks))
    n = -(-rows // ranks)  # the largest strip of an even split
    if method == "multigrid" and ranks > 1:
        from relaxtui.parallel import multigrid as pm

        bounds = [(rows * r // ranks, rows * (r + 1) // ranks) for r in range(ranks)]
        depth = pm.split_depth(bounds, (rows, cols), pm.gather_cells())
        n = min(rows, n + 2 * (pm.MARGIN + pm.GHOST) * (1 << depth))
    code_bytes = memory.CLASS_CODE_BYTES_SMALL if int(materials) <= memory.CLASS_CODE_SMALL_LIMIT else memory.CLASS_CODE_BYTES_LARGE
    # a strip with its two halo rows costs what a single-process solve of that many rows costs
    # (the same phases: radius estimate, sweeps, outputs), less the picture it never decodes
    # the radius estimate is counted at the fine Lanczos vectors' 24 B/cell, though above COARSE_UNKNOWNS
    # the ranks run the two-level one (relaxtui.parallel.coarse, 9 B/cell, as in one process): the strip's
    # other phases need more than this model counts (measured at 4096^2 on 2 ranks, red-black SOR, 50
    # sweeps: rank 1 peaked at 415 MB with a given omega, where the model less its estimate gives 353 MB,
    # and at 420 MB with the two-level estimate; the model gives 554 MB this way, 428 MB at 9 B/cell)
    other = memory.estimate_solve_bytes(n + 2, cols, method, materials, fine_radius=True)
    whole = rows * cols
    # the region picture all along, plus the largest of: the decoded picture (loading), the
    # whole class array (assembly), the gathered exported field (outputs): one at a time
    rank0 = other + whole * (1 + max(memory.PICTURE_BYTES_PER_CELL, code_bytes, memory.OUTPUT_BYTES_PER_CELL))
    return int(rank0), int(other)
