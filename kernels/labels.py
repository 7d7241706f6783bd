"""Connected-component labelling of a 2-D mask, 4-connectivity.

Used by the case loader's solvability check (every group of interior cells
must touch a fixed or convection cell). Arrays in, arrays out; nothing here
imports from the rest of relaxtui.
"""

import numpy as np

from ._jit import kernel


@kernel
def _find(parent, i):
    # Root of i, halving the path on the way up.
    while parent[i] != i:
        parent[i] = parent[parent[i]]
        i = parent[i]
    return i


@kernel
def label4(mask):
    """Label the 4-connected groups of true cells of ``mask``.

    Parameters
    ----------
    mask : (rows, cols) array of bool or uint8
        Cells to label (non-zero = part of a group). Not modified.

    Returns
    -------
    labels : (rows, cols) int32
        0 outside the mask, else the group number 1..count. Groups are
        numbered in image (raster) order of their first cell, so group 1
        contains the first masked cell met reading row 0 left to right, then
        row 1, and so on.
    count : int
        Number of groups.

    Two raster passes with union-find (union by smaller label, so each root is
    the provisional label given at the group's first cell in raster order).
    """
    rows, cols = mask.shape
    labels = np.zeros((rows, cols), np.int32)
    # A new provisional label needs a cell whose left neighbour is not in the
    # mask, so a row holds at most ceil(cols / 2) of them.
    parent = np.zeros(rows * ((cols + 1) // 2) + 1, np.int32)
    n = 0
    for r in range(rows):
        for c in range(cols):
            if mask[r, c] == 0:
                continue
            up = labels[r - 1, c] if r > 0 else 0
            left = labels[r, c - 1] if c > 0 else 0
            if up == 0 and left == 0:
                n += 1
                parent[n] = n
                labels[r, c] = n
            elif up == 0:
                labels[r, c] = left
            elif left == 0 or left == up:
                labels[r, c] = up
            else:
                labels[r, c] = left
                a = _find(parent, up)
                b = _find(parent, left)
                if a < b:
                    parent[b] = a
                elif b < a:
                    parent[a] = b
    # Roots become 1..count in increasing provisional order (= raster order
    # of each group's first cell); every other label takes its root's number.
    final = np.zeros(n + 1, np.int32)
    count = 0
    for i in range(1, n + 1):
        root = _find(parent, i)
        if root == i:
            count += 1
            final[i] = count
        else:
            final[i] = final[root]
    for r in range(rows):
        for c in range(cols):
            labels[r, c] = final[labels[r, c]]
    return labels, count
