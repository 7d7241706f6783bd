"""Symmetric SOR: one iteration is a forward lexicographic SOR sweep, then a backward one.

Same layout as :mod:`relaxtui.kernels.sweeps` (padded field ``u``, class codes
``cls``, class table ``table``). Each half uses the project's update of an
unknown cell P,

    s = (((wN uN + wS uS) + wW uW) + wE uE) + q,    u_P <- u_P + omega (s - u_P),

the forward half row by row from the top, west to east; the backward half row
by row from the bottom, east to west. ``buf`` (the shape of ``u``) keeps each
cell's value from before the iteration, so the largest update written per
iteration is exactly max |u_k - u_(k-1)|; the residual written is the backward
half's largest |u_new - u_old| / omega (the residual of each cell at the
moment it is updated, as for the other Gauss-Seidel-type sweeps).
"""

import numpy as np
from relaxtui.kernels._bits import abs_bits, from_bits
from relaxtui.kernels._jit import kernel


@kernel
def sor_symmetric(u, buf, cls, table, omega, sweeps, updates, residuals):
    """``sweeps`` symmetric SOR iterations in place; returns the iterations done (stops after a non-finite update)."""
    n0, n1 = u.shape
    done = 0
    for it in range(sweeps):
        for i in range(1, n0 - 1):
            for j in range(1, n1 - 1):
                c = cls[i, j]
                if c != 0:
                    uo = u[i, j]
                    buf[i, j] = uo
                    s = (((table[c, 0] * u[i - 1, j] + table[c, 1] * u[i + 1, j]) + table[c, 2] * u[i, j - 1])
                         + table[c, 3] * u[i, j + 1]) + table[c, 4]
                    u[i, j] = uo + omega * (s - uo)
        mu = 0
        mr = 0
        for i in range(n0 - 2, 0, -1):
            for j in range(n1 - 2, 0, -1):
                c = cls[i, j]
                if c != 0:
                    uo = u[i, j]
                    s = (((table[c, 0] * u[i - 1, j] + table[c, 1] * u[i + 1, j]) + table[c, 2] * u[i, j - 1])
                         + table[c, 3] * u[i, j + 1]) + table[c, 4]
                    v = uo + omega * (s - uo)
                    u[i, j] = v
                    mr = max(mr, abs_bits(v - uo))
                    mu = max(mu, abs_bits(v - buf[i, j]))
        updates[it] = from_bits(mu)
        residuals[it] = from_bits(mr) / omega
        done = it + 1
        if not np.isfinite(updates[it]):
            break
    return done
