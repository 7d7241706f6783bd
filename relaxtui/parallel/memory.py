"""Memory a solve split across MPI ranks needs on each rank.

The model is the single-process one of :mod:`relaxtui.solver.memory`,
applied to one strip: the working field, class codes and (Jacobi) second
buffer of the strip's rows plus one halo row above and below, and the
strip's exported copy while it is sent to rank 0. Strips are balanced by
unknown count, so a strip of a masked picture can hold more rows than
rows / P; the largest strip of an even split by rows is counted here.

Rank 0 also decodes the picture (transient, 4 B/cell), keeps the region
picture of the whole grid (1 B/cell, needed for the report and pictures),
assembles the whole operator once before handing out the strips (class
codes of the whole grid, transient) and gathers the exported field of the
whole grid (8 B/cell) to write the outputs, one after the other: its peak
is its strip plus about 9 B/cell of the whole grid.
"""

from __future__ import annotations

from relaxtui.solver import memory


def rank_bytes(rows: int, cols: int, method: str | None, materials: int, ranks: int) -> tuple[int, int]:
    """(rank 0's bytes, every other rank's bytes) for a ``rows`` x ``cols`` picture on ``ranks`` ranks."""
    rows, cols, ranks = int(rows), int(cols), max(1, int(ranks))
    n = -(-rows // ranks)  # the largest strip of an even split
    cells = n * cols
    strip = memory.estimate_solve_bytes(n, cols, method, materials) - memory.FIXED_BYTES
    strip -= memory.PICTURE_BYTES_PER_CELL * cells  # the picture is decoded on rank 0 only
    other = memory.FIXED_BYTES + strip
    whole = rows * cols
    code_bytes = memory.CLASS_CODE_BYTES_SMALL if int(materials) <= memory.CLASS_CODE_SMALL_LIMIT else memory.CLASS_CODE_BYTES_LARGE
    # the region picture all along, plus the largest of: the decoded picture (loading), the
    # whole class array (assembly), the gathered exported field (outputs): one at a time
    rank0 = other + whole * (1 + max(memory.PICTURE_BYTES_PER_CELL, code_bytes, memory.OUTPUT_BYTES_PER_CELL))
    return int(rank0), int(other)
