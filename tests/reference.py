"""Slow, obvious reference sweeps: plain Python loops over the picture, one cell at a time.

Each interior cell's equation is built here from the regions, following the
contract's text (``the case-format contract (case-format.md)``, "The discrete equations"),
with none of the operator's machinery (no classes, no table, no padding):

    D_P = sum of G_PN over domain neighbours + sum of U h over convection faces
    u_P = ( sum over interior N of G_PN u_N + sum over fixed N of G_PN value_N
            + sum over flux faces of flux h + sum over convection faces of U h ambient + s h^2 ) / D_P

taken face by face in the order north, south, west, east. Fields are
(rows, cols) float64 arrays holding values at interior and fixed cells
(other cells are ignored).

The update of one cell follows the kernels' documented arithmetic
(``relaxtui.kernels.sweeps``) so that comparisons can be exact or to 1e-14:
    s = (((wN uN + wS uS) + wW uW) + wE uE) + q,  u <- u + omega (s - u)
and, for the lexicographic sweep, a = u + omega (((wN uN + wS uS) + wE uE) + q - u), u <- a + (omega wW) uW.
"""

from __future__ import annotations

NORTH, SOUTH, WEST, EAST = (-1, 0), (1, 0), (0, -1), (0, 1)
SIDES = (NORTH, SOUTH, WEST, EAST)


def _k(region) -> float:
    return 1.0 if region.conductivity is None else float(region.conductivity)


def cell_equation(case, i, j):
    """Normalised equation of interior cell (i, j): ([weight of N, S, W, E], q).

    The weight of a side is 0 unless the neighbour there is an interior cell.
    """
    codes = case.codes
    rows, cols = codes.shape
    h = float(case.cell_size)
    rp = case.regions[int(codes[i, j])]
    kp = _k(rp)
    g = [0.0, 0.0, 0.0, 0.0]
    d = 0.0
    b = 0.0
    for n, (di, dj) in enumerate(SIDES):
        a, c = i + di, j + dj
        if not (0 <= a < rows and 0 <= c < cols):
            continue  # the image border carries nothing
        rn = case.regions[int(codes[a, c])]
        if rn.kind == "interior":
            kn = _k(rn)
            g[n] = 2.0 * kp * kn / (kp + kn)
            d += g[n]
        elif rn.kind == "fixed":
            kn = kp if rn.conductivity is None else float(rn.conductivity)
            gx = 2.0 * kp * kn / (kp + kn)
            d += gx
            b += gx * float(rn.value)
        elif rn.kind == "flux":
            b += float(rn.flux) * h
        elif rn.kind == "convection":
            uh = h / (1.0 / float(rn.coefficient) + h / (2.0 * kp))
            d += uh
            b += uh * float(rn.ambient)
    b += float(rp.source) * h * h
    return [x / d for x in g], b / d


def equations(case):
    """{(i, j): (weights, q)} for every interior cell, in image order."""
    out = {}
    rows, cols = case.codes.shape
    for i in range(rows):
        for j in range(cols):
            if case.regions[int(case.codes[i, j])].kind == "interior":
                out[(i, j)] = cell_equation(case, i, j)
    return out


def _s(u, i, j, w, q):
    rows, cols = u.shape
    total = 0.0
    for n, (di, dj) in enumerate(SIDES):
        if w[n] != 0.0:
            total = total + w[n] * u[i + di, j + dj]
    return total + q


def residual(case, u) -> float:
    """Largest |s - u| over interior cells: the change one Jacobi update would make."""
    return max((abs(_s(u, i, j, w, q) - u[i, j]) for (i, j), (w, q) in equations(case).items()), default=0.0)


def jacobi_sweep(case, u, omega):
    """One weighted-Jacobi sweep. Returns (new field, largest update, largest residual)."""
    new = u.copy()
    big_u = big_r = 0.0
    for (i, j), (w, q) in equations(case).items():
        r = _s(u, i, j, w, q) - u[i, j]
        new[i, j] = u[i, j] + omega * r
        big_u = max(big_u, abs(new[i, j] - u[i, j]))
        big_r = max(big_r, abs(r))
    return new, big_u, big_r


def red_black_sweep(case, u, omega):
    """One red-black SOR sweep, two passes: every red cell ((row + col) even), then every black one.

    Returns (new field, largest update, largest update / omega).
    """
    new = u.copy()
    eqs = equations(case)
    big = 0.0
    for colour in (0, 1):
        for (i, j), (w, q) in eqs.items():
            if (i + j) % 2 != colour:
                continue
            old = new[i, j]
            new[i, j] = old + omega * (_s(new, i, j, w, q) - old)
            big = max(big, abs(new[i, j] - old))
    return new, big, big / omega


def lexicographic_sweep(case, u, omega):
    """One lexicographic SOR sweep (row by row, west to east). Returns (new field, largest update, largest update / omega)."""
    new = u.copy()
    big = 0.0
    for (i, j), (w, q) in equations(case).items():
        old = new[i, j]
        t = 0.0
        for n in (0, 1, 3):  # north, south, east
            di, dj = SIDES[n]
            if w[n] != 0.0:
                t = t + w[n] * new[i + di, j + dj]
        a = old + omega * ((t + q) - old)
        new[i, j] = a + (omega * w[2]) * new[i, j - 1] if w[2] != 0.0 else a
        big = max(big, abs(new[i, j] - old))
    return new, big, big / omega


def symmetric_sweep(case, u, omega):
    """One symmetric SOR iteration: a lexicographic sweep (row by row from the top, west to east),
    then the same in reverse order (from the bottom row, east to west), each cell by
    u <- u + omega (s - u). Returns (new field, largest |new - u|, largest update of the
    backward half / omega)."""
    new = u.copy()
    eqs = list(equations(case).items())
    for (i, j), (w, q) in eqs:
        old = new[i, j]
        new[i, j] = old + omega * (_s(new, i, j, w, q) - old)
    big_r = 0.0
    for (i, j), (w, q) in reversed(eqs):
        old = new[i, j]
        new[i, j] = old + omega * (_s(new, i, j, w, q) - old)
        big_r = max(big_r, abs(new[i, j] - old))
    big_u = max((abs(new[i, j] - u[i, j]) for (i, j), _ in eqs), default=0.0)
    return new, big_u, big_r / omega


SWEEPS = {"jacobi": jacobi_sweep, "gauss-seidel": lexicographic_sweep, "sor": lexicographic_sweep, "red-black-sor": red_black_sweep,
          "symmetric-sor": symmetric_sweep}


def red_black_two_pass(u, cls, table, omega):
    """Two-pass red-black SOR over the operator's own padded arrays (schedule reference).

    Uses the class table the kernel uses, so a comparison isolates the fused
    and blocked schedule of the kernel from the assembly. Returns the largest update.
    """
    rows, cols = u.shape
    big = 0.0
    for colour in (0, 1):
        for i in range(1, rows - 1):
            for j in range(1, cols - 1):
                c = cls[i, j]
                if c == 0 or (i + j) % 2 != colour:
                    continue
                w = table[c]
                s = (((w[0] * u[i - 1, j] + w[1] * u[i + 1, j]) + w[2] * u[i, j - 1]) + w[3] * u[i, j + 1]) + w[4]
                old = u[i, j]
                u[i, j] = old + omega * (s - old)
                big = max(big, abs(u[i, j] - old))
    return big
