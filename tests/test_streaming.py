"""Report quantities computed in row strips equal the same quantities computed on the whole grid.

Outside reference: the whole-grid flux (relaxtui.output.flux.flux, itself checked against
Fourier's law on linear fields in tests/test_export.py) and numpy's argmax.
"""

from __future__ import annotations

import numpy as np
import pytest
from cases import convection, fixed, interior, make_case, outside

from relaxtui.output import flux as flux_module


@pytest.mark.parametrize("strip", [1, 7, 40, 10_000])
def test_peak_flux_in_strips_is_the_whole_grid_peak(monkeypatch, strip):
    art = ["HHHHHHHHHH", "H..x....aH", "H..x.....H", "H.....xx.H", "HccccccccH"]
    case = make_case(art, {"H": fixed("hot", 1.0), ".": interior(), "a": interior(conductivity=5.0), "x": outside(),
                           "c": convection("air", 2.0, 0.0)})
    rng = np.random.default_rng(3)
    u = rng.random(case.shape)
    qx, qy = flux_module.flux(u, case)
    mag = np.hypot(qx, qy)
    mag[~np.isfinite(mag)] = -1.0
    r, c = divmod(int(np.argmax(mag)), case.shape[1])
    monkeypatch.setattr(flux_module, "PEAK_STRIP_CELLS", strip)
    peak = flux_module.peak_flux(u, case)
    assert (peak["row"], peak["col"]) == (r, c)
    assert peak["value"] == mag[r, c] and peak["qx"] == qx[r, c] and peak["qy"] == qy[r, c]
