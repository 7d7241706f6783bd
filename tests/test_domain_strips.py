"""The anchoring check computed in row strips finds the groups scipy's labelling finds.

Reference: scipy.ndimage.label (4-connected: its default cross-shaped structure) on the whole
interior mask, and numpy's shifted comparisons for "has a face on a fixed or convection cell"
(the contract's anchoring rule, docs/case-format.md).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from relaxtui.case import domain
from relaxtui.case.model import CONVECTION, FIXED, FLUX, INTERIOR, OUTSIDE

KINDS = np.array([INTERIOR, FIXED, OUTSIDE, FLUX, CONVECTION, INTERIOR], np.int8)


def scipy_reference(codes):
    kind = KINDS[codes]
    interior = kind == INTERIOR
    anchor = (kind == FIXED) | (kind == CONVECTION)
    near = np.zeros_like(anchor)
    near[1:] |= anchor[:-1]
    near[:-1] |= anchor[1:]
    near[:, 1:] |= anchor[:, :-1]
    near[:, :-1] |= anchor[:, 1:]
    labels, count = ndimage.label(interior)
    anchored = np.zeros(count + 1, dtype=bool)
    anchored[labels[near & interior]] = True
    bad = [g for g in range(1, count + 1) if not anchored[g]]
    if not bad:
        return 0, 0, (-1, -1)
    firsts = {g: int(np.argmax(labels.reshape(-1) == g)) for g in bad}
    g = min(bad, key=firsts.get)  # the first group in raster order of its first cell
    return len(bad), int(np.count_nonzero(labels == g)), divmod(firsts[g], codes.shape[1])


@pytest.mark.parametrize("draw", range(6))
@pytest.mark.parametrize("strip_cells", [1, 13, 1 << 20])
def test_strips_find_the_floating_groups_of_the_whole_picture(draw, strip_cells):
    rng = np.random.default_rng(draw)
    for _ in range(40):
        h, w = (int(x) for x in rng.integers(1, 24, 2))
        codes = rng.choice(6, size=(h, w), p=[0.55, 0.03, 0.2, 0.05, 0.02, 0.15]).astype(np.uint8)
        starts, ends, stride, touched = domain.anchored_runs(codes, KINDS, strip_cells)
        expected = scipy_reference(codes)
        if not starts.size:
            assert not (KINDS[codes] == INTERIOR).any()
            continue
        assert domain._floating_runs(starts, ends, stride, touched) == expected
