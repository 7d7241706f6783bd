"""The report's strip-wise extremes and peak flux equal the whole-field computations.

References: numpy's nanargmin/nanargmax (first occurrence on ties) and relaxtui.output.flux.peak_flux
on the whole field; the strips only bound the temporaries (tests/test_memory.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from cases import feature_case

from relaxtui.output import report
from relaxtui.output.flux import peak_flux
from relaxtui.solver.driver import solve


@pytest.mark.parametrize("two", [False, True])
@pytest.mark.parametrize("strip_rows", [1, 2, 3, 7, 100])
def test_strips_give_the_whole_field_numbers(monkeypatch, two, strip_rows):
    case = feature_case(two)
    field = solve(case, tolerance=1e-6).field
    whole = peak_flux(field, case)
    i_min, i_max = int(np.nanargmin(field)), int(np.nanargmax(field))
    monkeypatch.setattr(report, "STRIP_CELLS", strip_rows * case.shape[1])
    assert report.peak_flux_in_strips(field, case) == whole
    ext = report.extremes(case, field)
    cols = case.shape[1]
    assert (ext["min_at"]["row"], ext["min_at"]["col"]) == divmod(i_min, cols)
    assert (ext["max_at"]["row"], ext["max_at"]["col"]) == divmod(i_max, cols)
    assert ext["min"] == np.nanmin(field) and ext["max"] == np.nanmax(field)
