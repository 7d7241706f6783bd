"""How much memory a solve needs, and how much the machine has.

The loader calls :func:`estimate_solve_bytes` with the picture's size (read
from the PNG header, before any pixel is decoded) and refuses a case whose
estimate exceeds :func:`available_bytes`.

The byte model, per cell of the picture (rows x cols), plus a fixed part:

======================  ==============  =========================================
array                   bytes per cell  note
======================  ==============  =========================================
working field           8               float64, padded by one cell all round
class codes             1 or 2          uint8 up to 256 classes, else uint16
sweep buffers           8 each          ``Method.buffers`` of the registry (Jacobi:
                                        old and new iterate), padded
method's own            ``Method.bytes_per_cell`` (multigrid: its hierarchy,
                                        44: coarse levels and CG vectors)
output copy             8               the exported float64 field (NaN outside)
decoded picture         4               transient, while the PNG is decoded
fixed                   200 MiB         interpreter, numba, compiled code, UI
======================  ==============  =========================================

The per-method numbers live in the method registry (``relaxtui.solver.methods``),
the rest are named below.
"""

from __future__ import annotations

import os

FIELD_BYTES_PER_CELL = 8
CLASS_CODE_BYTES_SMALL = 1  # up to CLASS_CODE_SMALL_LIMIT classes
CLASS_CODE_BYTES_LARGE = 2
CLASS_CODE_SMALL_LIMIT = 256
BUFFER_BYTES_PER_CELL = 8  # one float64 sweep buffer, padded
OUTPUT_BYTES_PER_CELL = 8
PICTURE_BYTES_PER_CELL = 4
FIXED_BYTES = 200 * 1024 * 1024


def estimate_solve_bytes(rows: int, cols: int, method: str | None = None, materials: int = 1) -> int:
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
    total = FIXED_BYTES
    total += FIELD_BYTES_PER_CELL * padded
    total += code_bytes * padded
    from relaxtui.solver.methods import METHODS

    m = METHODS.get(method) if isinstance(method, str) else None
    if m is not None:
        total += BUFFER_BYTES_PER_CELL * m.buffers * padded
        total += m.bytes_per_cell * cells
    total += OUTPUT_BYTES_PER_CELL * cells
    total += PICTURE_BYTES_PER_CELL * cells
    return int(total)


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
