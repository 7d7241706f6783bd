"""How much memory a solve needs, and how much the machine has.

The loader calls :func:`estimate_solve_bytes` with the picture's size (read
from the PNG header, before any pixel is decoded) and refuses a case whose
estimate exceeds :func:`available_bytes`.

The byte model, per cell of the picture (rows x cols), plus a fixed part. A
solve passes through phases, and the estimate is the largest of them (not
the sum of every array ever allocated): what is resident all along, plus the
largest transient of any one phase.

======================  ==============  =========================================
array                   bytes per cell  note
======================  ==============  =========================================
resident
  working field         8               float64, padded by one cell all round (4: float32,
                                        ``precision = "single"``, relaxation methods)
  class codes           1 or 2          uint8 up to 256 classes, else uint16
  region codes          1               the case's own uint8 picture codes
  after the decode      7               memory the allocators keep once the PNG is
                                        decoded (measured in RSS; tracemalloc does
                                        not see it)
phases (the largest counts)
  sweeps                                the sweep buffers, and the Jacobi radius
                                        estimate beside them (methods that use it)
    sweep buffers       8 each          ``Method.buffers`` of the registry (Jacobi:
                                        old and new iterate), padded; released
                                        when the run ends (4 each in single)
    Jacobi radius       9               pictures of more than radius.COARSE_UNKNOWNS
                                        cells: the two-level estimate
                                        (relaxtui.solver.coarse: coarse operator 4,
                                        two coarse Lanczos vectors 4, Ritz vector 1)
                        24              smaller pictures: three fine Lanczos vectors
                                        (padded); either is freed once the estimate
                                        is final, and ``relaxtui solve`` drops an
                                        unfinished one before its output (a screen
                                        session keeps it, paused, for its next run)
  output                8               the exported field, when a picture, VTK file or
                                        bundle needs it whole (the report and the .npy
                                        read the working array in strips and need
                                        none; the sweep buffers are released first)
  method's own          ``Method.bytes_per_cell``: the peak of what the
                                        method builds (multigrid 38: coarse levels
                                        and CG vectors, held through the iterations)
  decoded picture       16              while the PNG is decoded in row strips (RSS,
                                        Pillow's buffers included); 44 for a picture
                                        of up to picture.STRIP_PIXELS, decoded whole
fixed                   200 MiB         interpreter, numba, compiled code, UI,
                                        the decoder's and report's fixed buffers
======================  ==============  =========================================

The per-method numbers live in the method registry (``relaxtui.solver.methods``),
the rest are named below.

Measured peaks (tracemalloc, which sees numpy's allocations) over a whole
``relaxtui solve`` of a 770 x 770 picture, beyond the warmed-up interpreter
(tests/test_memory.py, which keeps the estimate an upper bound within 20 %):
red-black SOR and Jacobi 42.5 B/cell (estimate 45), reached while the RGB
picture is decoded whole; multigrid 51.3 (estimate 58; 79.0 before its
certificate's norm of the inverse came from its own hierarchy instead of a
Lanczos estimate, and before its coarse levels dropped their planes of
inverses). Peak RSS of a multigrid solve to 1e-4 of the model problem, report and .npy
written (benchmarks/scale.py, load 1.9-2.4): 46.4 B/cell at 4097 x 4097, 47.1
at 8193 x 8193, 47.3 at 16 385 x 16 385 (estimate 55; 49.1 / 50.0 before the
float32 interpolation weights).
Peak RSS (benchmarks/footprint.py, model problem 4097 x 4097 cells, one
material, auto omega, 1000 sweeps with the two-level radius estimate beside
them, report and field written; (peak - 200 MiB) / cells, load 1-2.5):
red-black SOR 21.3 B/cell (estimate 26), Jacobi 24.9 B/cell (estimate 34).
With the fine Lanczos estimate (24 B/cell) before it: 43 B/cell red-black
(20 sweeps, its vectors held by the paused estimate).
Earlier, at 2900 x 2900: multigrid 57.3 B/cell (estimate 72: its set-up
allocates zeroed arrays whose pages are never all touched, which tracemalloc
counts and RSS does not).
"""

from __future__ import annotations

import os

FIELD_BYTES_PER_CELL = 8
CLASS_CODE_BYTES_SMALL = 1  # up to CLASS_CODE_SMALL_LIMIT classes
CLASS_CODE_BYTES_LARGE = 2
CLASS_CODE_SMALL_LIMIT = 256
REGION_CODE_BYTES_PER_CELL = 1
DECODE_RETAINED_BYTES_PER_CELL = 7  # resident memory the allocators keep after the PNG decode (RSS, 2900²)
RADIUS_BYTES_PER_CELL = 24  # fine Lanczos vectors of the Jacobi-radius estimate (padded cells), small pictures
COARSE_RADIUS_BYTES_PER_CELL = 9  # the two-level estimate (relaxtui.solver.coarse.BYTES_PER_CELL), larger ones
BUFFER_BYTES_PER_CELL = 8  # one float64 sweep buffer, padded
OUTPUT_BYTES_PER_CELL = 8
PICTURE_BYTES_PER_CELL = 6  # the decoded picture's own arrays (relaxtui.parallel.memory: rank 0's share)
DECODE_BYTES_PER_CELL = 16  # the decode's peak for a large PNG, in strips (RSS, Pillow's buffers: 16.2 at 4097², 18.9 at 2049²)
WHOLE_DECODE_BYTES_PER_CELL = 44  # pictures of up to picture.STRIP_PIXELS, decoded whole (tracemalloc 42.6, 770² RGB)
FIXED_BYTES = 200 * 1024 * 1024


# Case format v1.1 per-cell path (coefficient maps, axisymmetry; relaxtui.solver.assembly): a uint32
# class code (3 B more than uint8), a table row (40 B) and a diagonal (8 B) per cell, 8 B per value of
# up to two maps, and the numpy assembly's transient peak above what it keeps. Measured with tracemalloc
# on the 1024² model problem with one map: 52 B per cell held, 183 B per cell at the assembly's peak.
PER_CELL_PATH_BYTES_PER_CELL = 3 + 40 + 8 + 16 + 128


SINGLE_FIELD_BYTES_PER_CELL = 4  # float32: the field and sweep buffers of a single-precision relaxation run


def field_bytes_per_cell(method: str | None, precision: str | None = "double") -> int:
    """Bytes per cell of the working field and of each sweep buffer: 8 (float64), or 4 for a
    single-precision run of a relaxation method (multigrid keeps float64: see relaxtui.solver.driver)."""
    from relaxtui.solver.methods import METHODS

    m = METHODS.get(method) if isinstance(method, str) else None
    relaxation = m is None or m.kernel is not None  # None: the default red-black SOR
    return SINGLE_FIELD_BYTES_PER_CELL if precision == "single" and relaxation else FIELD_BYTES_PER_CELL


def estimate_solve_bytes(rows: int, cols: int, method: str | None = None, materials: int = 1, per_cell: bool = False,
                         precision: str | None = "double", fine_radius: bool = False) -> int:
    """Bytes a solve of a ``rows`` x ``cols`` picture is expected to need.

    Parameters
    ----------
    rows, cols : int
        Picture size in cells.
    method : str or None
        Method name (see ``relaxtui.solver.methods``); ``None`` (or a name the
        registry does not know) counts as the default red-black SOR (one field buffer).
    materials : int
        Number of distinct cell classes (regions); more than 256 need 2-byte codes.
    per_cell : bool
        The case takes the v1.1 per-cell path (coefficient maps or axisymmetric geometry).
    fine_radius : bool
        The radius estimate keeps fine Lanczos vectors whatever the size (the distributed estimate
        of :mod:`relaxtui.parallel`), not the two-level one of large pictures.
    precision : "double" or "single"
        The working field's storage: single halves the field and the sweep buffers
        of the relaxation methods (:func:`field_bytes_per_cell`).

    Returns
    -------
    int
        The estimate in bytes, by the model in this module's docstring.
    """
    rows = int(rows)
    cols = int(cols)
    cells = rows * cols
    padded = (rows + 2) * (cols + 2)
    code_bytes = CLASS_CODE_BYTES_SMALL if int(materials) <= CLASS_CODE_SMALL_LIMIT else CLASS_CODE_BYTES_LARGE
    field = field_bytes_per_cell(method, precision)
    resident = (field * padded + code_bytes * padded + REGION_CODE_BYTES_PER_CELL * cells
                + DECODE_RETAINED_BYTES_PER_CELL * cells)
    from relaxtui.options import DEFAULT_METHOD
    from relaxtui.solver.methods import METHODS
    from relaxtui.solver.radius import COARSE_UNKNOWNS  # compared with the cells: the unknowns are not known yet

    m = METHODS.get(method if isinstance(method, str) else DEFAULT_METHOD)
    sweeps = field * m.buffers * padded if m is not None else 0  # BUFFER_BYTES_PER_CELL each in double
    if m is None or m.uses_radius:
        # the estimate runs beside the sweeps; it is freed when final, or dropped before the output of a solve
        per = COARSE_RADIUS_BYTES_PER_CELL if cells > COARSE_UNKNOWNS and not fine_radius else RADIUS_BYTES_PER_CELL
        sweeps += per * padded
    from relaxtui.case.picture import STRIP_PIXELS

    decode = WHOLE_DECODE_BYTES_PER_CELL if cells <= STRIP_PIXELS else DECODE_BYTES_PER_CELL
    phases = [decode * cells + REGION_CODE_BYTES_PER_CELL * cells,
              resident + sweeps, resident + OUTPUT_BYTES_PER_CELL * cells]  # the buffers are released before the output
    if m is not None and m.bytes_per_cell:
        phases.append(resident + m.bytes_per_cell * cells)
    if per_cell:  # case format v1.1 per-cell path: its weight arrays stay resident
        return int(FIXED_BYTES + max(phases) + PER_CELL_PATH_BYTES_PER_CELL * cells)
    return int(FIXED_BYTES + max(phases))


def _meminfo_available() -> int | None:
    try:
        with open("/proc/meminfo", encoding="ascii") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    parts = line.split()
                    scale = 1024 if len(parts) > 2 and parts[2].lower() == "kb" else 1
                    return int(parts[1]) * scale
    except (OSError, ValueError, IndexError):
        return None
    return None


def _sysconf_available() -> int | None:
    try:
        pages = os.sysconf("SC_AVPHYS_PAGES")
        size = os.sysconf("SC_PAGE_SIZE")
    except (AttributeError, ValueError, OSError):
        return None
    if pages <= 0 or size <= 0:
        return None
    return int(pages) * int(size)


def _cgroup_headroom() -> int | None:
    """Room left under a cgroup v2 memory limit, if this process has one."""
    try:
        with open("/proc/self/cgroup", encoding="ascii") as f:
            lines = f.read().splitlines()
    except OSError:
        return None
    for line in lines:
        if line.startswith("0::"):
            base = "/sys/fs/cgroup" + line[3:].strip()
            try:
                with open(os.path.join(base, "memory.max"), encoding="ascii") as f:
                    limit = f.read().strip()
                if limit == "max":
                    return None
                with open(os.path.join(base, "memory.current"), encoding="ascii") as f:
                    current = int(f.read().strip())
                return max(0, int(limit) - current)
            except (OSError, ValueError):
                return None
    return None


def available_bytes() -> int | None:
    """Memory this process can still take, in bytes; ``None`` if unknown.

    ``MemAvailable`` from ``/proc/meminfo`` (else ``os.sysconf`` free pages),
    lowered to the room under a cgroup v2 memory limit where one applies.
    """
    found = _meminfo_available()
    if found is None:
        found = _sysconf_available()
    room = _cgroup_headroom()
    if room is not None:
        found = room if found is None else min(found, room)
    return found


def format_bytes(n: int | float | None) -> str:
    """``1536`` -> ``'1.5 KiB'``; ``None`` -> ``'unknown'``."""
    if n is None:
        return "unknown"
    value = float(n)
    for unit in ("B", "KiB", "MiB", "GiB"):
        if abs(value) < 1024 or unit == "GiB":
            return f"{value:.0f} {unit}" if unit == "B" else f"{value:.1f} {unit}"
        value /= 1024
    return f"{value:.1f} TiB"  # pragma: no cover - unreachable
