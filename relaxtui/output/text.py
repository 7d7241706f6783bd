"""Numbers as people read them, shared by the command line and the terminal UI.

Thousands are grouped with U+202F NARROW NO-BREAK SPACE: narrow like a thin
space (the grouping of ISO 80000-1 and the SI brochure, common practice), and
never a place where a terminal or a text widget may break the line, so
"1 052 095 sweeps" cannot wrap inside the number. This module imports nothing
heavy (the CLI's parser may use it).
"""

from __future__ import annotations

import math

GROUP = "\u202f"  # NARROW NO-BREAK SPACE


def group(n) -> str:
    """A whole number with its thousands grouped: ``12 345`` (U+202F between groups)."""
    if isinstance(n, float) and not math.isfinite(n):
        return str(n)
    return f"{int(round(n)):,}".replace(",", GROUP)


def group_float(x: float, decimals: int = 0) -> str:
    """A number with ``decimals`` decimals and grouped thousands: ``12 345.6``."""
    if not math.isfinite(x):
        return str(x)
    return f"{x:,.{decimals}f}".replace(",", GROUP)
