"""Colour ranges of the field panel (pure numpy).

* :func:`domain_range` -- the range of the values the domain's own cells take
  (held cells left out), the default scale of the solution view;
* :func:`symlog` -- a symmetric logarithmic scale for signed quantities that
  span decades (the residual of each cell, the latest update):
  s = sign(v) log10(1 + |v| / c), linear near 0 (|v| << c), logarithmic
  beyond (common practice for signed data over decades). ``c`` is the largest
  |v| divided by ``10**decades``, so the scale shows ``decades`` decades below
  the largest magnitude and 0 sits in the middle of the colour ramp.
"""

from __future__ import annotations

import math

import numpy as np

DECADES = 4


def domain_range(values: np.ndarray, domain: np.ndarray, fixed: np.ndarray) -> tuple[float, float]:
    """Finite range of ``values`` on domain pixels that hold no held cell (all domain pixels if none)."""
    ok = domain & ~fixed & np.isfinite(values)
    if not ok.any():
        ok = domain & np.isfinite(values)
    if not ok.any():
        return math.nan, math.nan
    v = values[ok]
    return float(v.min()), float(v.max())


def symlog(values: np.ndarray, decades: int = DECADES):
    """``(s, limit, ticks, c)``: transformed values, the scale's end ±limit, legend ticks
    ``(s value, label)`` at 0 and ±10^k, and the linear threshold ``c`` (0 when all values are 0)."""
    v = np.asarray(values, dtype=np.float64)
    finite = np.abs(v[np.isfinite(v)])
    top = float(finite.max()) if finite.size else 0.0
    if top <= 0.0 or not math.isfinite(top):
        return np.where(np.isfinite(v), 0.0, np.nan), 1.0, [(0.0, "0")], 0.0
    c = top / 10.0**decades
    with np.errstate(invalid="ignore"):
        s = np.sign(v) * np.log10(1.0 + np.abs(v) / c)
    limit = math.log10(1.0 + top / c)
    ticks = [(0.0, "0")]
    k_top = math.floor(math.log10(top))
    for k in (k_top, k_top - decades // 2):
        if 10.0**k > c:
            t = math.log10(1.0 + 10.0**k / c)
            label = f"1e{k}"
            ticks = [(-t, "-" + label)] + ticks + [(t, label)]
    return s, limit, sorted(ticks), c
