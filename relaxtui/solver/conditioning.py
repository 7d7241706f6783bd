"""How well float64 can resolve a case: the norm of the inverse and the attainable accuracy.

Every iteration here solves the normalised equations ``(I - W) u = q`` (W the
per-cell neighbour weights of the operator, q the folded boundary and source
terms). Two facts of numerical linear algebra (e.g. Higham, *Accuracy and
Stability of Numerical Algorithms*, 2002, ch. 7 and 17; common practice):

* **A residual certifies an error.** For any field u with residual
  ``r = q - (I - W) u``, ``u - u_exact = -(I - W)^-1 r``, so
  ``max |u - u_exact| <= ||(I - W)^-1||_inf * max |r|``. This is what lets the
  stopping rule call a field that no longer changes *converged* (its residual
  is at the rounding floor) or refuse to (its residual is not: the updates
  vanished because ω or a conductivity is too small for float64 to move the
  field).
* **Rounding bounds the attainable accuracy.** The residual of a float64
  field cannot be computed more accurately than a few units of roundoff of
  the largest field value, so no iteration gets closer than about
  ``kappa * eps * max |u|`` with ``kappa = ||I - W|| * ||(I - W)^-1||``
  (``||I - W||_inf <= 2``). When that floor exceeds the tolerance the honest
  status is ``stalled``, not ``converged`` (near-singular cases: convection
  faces with tiny coefficients and nothing else holding the field).

``(I - W)`` is an M-matrix (non-negative weights summing to at most 1 per row,
strictly less where a cell leaks to a fixed or convection face), so
``||(I - W)^-1||_inf = max w`` for the solution of ``(I - W) w = 1`` (all
ones): the expected number of random-walk steps before a walker leaves the
domain. It is computed exactly (banded Cholesky of the symmetric unnormalised
form, the multigrid kernels' own) on grids where that is cheap,
bounded above by a quadratic barrier in one pass where that holds (``barrier_inverse_norm``;
when the bound is too loose to certify a stop the rule asks for one of the next two), bounded
from above to about 1 % by a multigrid run's own hierarchy (``MultigridStepper.inverse_norm``; under MPI
the same steps by strips, ``relaxtui.parallel.multigrid.StripMultigrid.inverse_norm``),
and estimated from the Jacobi spectral radius μ elsewhere (``1/(1 - μ)`` is the D-norm of
the inverse; times a safety factor for the infinity norm). That last estimate comes from a
Lanczos Ritz value, which lies below μ: on strongly mixed conductivities it falls far short
(1400 times on a random 1:1e8 mix of 128 x 128 cells), and a floor built on it is too low.
"""

from __future__ import annotations

import math

import numpy as np

_EPS = float(np.finfo(float).eps)
EXACT_WORK = 4e7  # unknowns * bandwidth^2 of a banded Cholesky worth doing for the exact norm
ESTIMATE_SAFETY = 2.0  # D-norm 1/(1 - mu) to infinity-norm estimate
NORM_OF_OPERATOR = 2.0  # ||I - W||_inf <= 2 (weights sum to at most 1 per row)
FLOOR_SAFETY = 4.0  # on the random-sign estimate of the rounding floor (see rounding_floor)
LANCZOS_STEPS = 120  # most Lanczos steps spent when nothing else gives the radius (multigrid, large grids)
# SOR-type sweeps, which converge for every omega in (0, 2) on a symmetric positive definite system
# (Ostrowski-Reich; the stopping rule then never calls growing updates divergence). Multigrid too:
# conjugate gradients with a symmetric positive definite preconditioner (the symmetric cycle: SOR
# smoothing with omega in (0, 2), Galerkin coarse operators, an exact coarsest solve) lower the error's
# energy norm at every step, while their residuals and updates need not fall (measured on a
# 96 x 96 random 1:1e6 mix: the updates rose 1000-fold over 10 steps while the error fell from 4.1 to
# 0.68; the growth test had called that divergence).
CONVERGENT_METHODS = ("gauss-seidel", "sor", "red-black-sor", "symmetric-sor", "multigrid")
# Methods whose updates may understate the error by orders of magnitude, so that a converged estimate
# from them needs the residual certificate as well. Symmetric SOR: its step is B^-1 r with the SSOR
# preconditioner B = (D + wL) D^-1 (D + wU) / (w (2 - w)) (Saad, Iterative Methods for Sparse Linear
# Systems, 2003, ch. 4, from memory), so as w nears 2 (auto omega on a weakly held case) the forward
# sweep's change is nearly undone by the backward one: measured on 6 x 10 cells held by convection of
# coefficient 1e-14, updates 1e-5 beside residuals 0.5, a decay of the updates 1e6 times faster than the
# error's, and a "converged" 1e6 tolerances away from the answer. Jacobi's and SOR's steps are at least
# about w times the residual (Delta = w D^-1 r, resp. w (D + wL)^-1 r), so theirs cannot hide it.
RESIDUAL_CERTIFIED_METHODS = ("symmetric-sor",)
# Multigrid's CG on a picture with conductivity jumps: its updates' geometric tail misses error modes the
# cycle leaves to CG (about one per island of the other material) until CG has found them, so its
# converged estimate needs the residual certificate too where a cell's neighbour weights differ by this
# ratio or more (a jump of conductivity by c gives a ratio of about c / 2). Measured on random mixes of
# 96 x 96 and 160 x 160 cells (two random draws, 30/50/70 % of the low conductivity, tolerances 1e-3, 1e-6 and
# 1e-8, against spsolve): at a jump of 1e3 the true error at most 0.2 times the claimed one; at 1e4
# within the tolerance but up to 2.6 times the claim; at 3e4 3 of 36 runs said converged up to 1.2
# times the tolerance away; at 1e5 and 1e6 12 of 72, up to 10 times the tolerance (77 times their own
# estimate). The threshold leaves the demos (weight ratios up to 5.3e3: the well-drawdown demo's 1:8e3
# jump on an axisymmetric grid) to the estimate. The price above it: more iterations, and a stall with
# the certified bound where even the weighted one (MultigridStepper.residual_bound) cannot reach the
# tolerance (at 1e5 and 1e6, 33 of the same 72 runs: a 96 x 96 1:1e6 mix at 1e-6 stalls certifying
# about 1e-5 where the true error is below 1e-7).
CERTIFIED_CONTRAST = 1e4


def weight_contrast(table) -> float:
    """The largest ratio between two non-zero neighbour weights of one class (1.0 without neighbours):
    the conductivity jumps of a picture, as the operator sees them (a harmonic-mean face conductance
    between k and c k, c << 1, is about 2 c k)."""
    t = np.asarray(table, dtype=np.float64)[1:, :4]  # row 0 is no unknown's class
    low = np.where(t > 0.0, t, np.inf).min(axis=1, initial=np.inf)
    some = np.isfinite(low)  # classes with a neighbour
    return float((t[some].max(axis=1) / low[some]).max(initial=1.0))


def exact_inverse_norm(operator) -> float | None:
    """``max w`` for ``(I - W) w = 1`` by banded Cholesky, or None when too costly.

    Returns ``math.inf`` when the factorisation fails (the system is singular to
    float64).
    """
    if operator.unknowns == 0:
        return 0.0
    rows, cols = operator.shape
    bw = min(rows, cols) + 1
    if float(operator.unknowns) * bw * bw > EXACT_WORK:
        return None
    from relaxtui.kernels import multigrid as mg

    diag = np.asarray(operator.diag, dtype=np.float64)
    top = float(np.max(diag[1:])) if diag.size > 1 else 1.0
    if not (top > 0.0 and math.isfinite(top)):
        return math.inf
    scaled = diag / top  # the symmetric form D (I - W), scaled to O(1) entries
    shape = operator.padded_shape
    A = np.zeros((5,) + shape)
    b = np.zeros(shape)
    mg.planes0(operator.cls, operator.table, scaled, A, b)
    index, cells, half = mg.band_order(A, cols <= rows)
    L, ok = mg.band_factor(A, index, cells, half)
    if not ok or not np.all(np.isfinite(L)):
        return math.inf
    rhs = np.where(operator.cls != 0, scaled[operator.cls], 0.0)  # D 1, so that (I - W) w = 1
    w = np.zeros(shape)
    mg.band_solve(L, cells, half, rhs, w)
    top_w = float(np.max(w)) if w.size else 0.0
    if not math.isfinite(top_w) or top_w < 0.0 or float(np.min(w)) < -1e-9 * max(top_w, 1.0):
        return math.inf  # an M-matrix inverse is non-negative: rounding has taken over
    return max(top_w, 1.0)


BARRIER_HOW = "bounded above by a quadratic barrier"
HIERARCHY_HOW = "solved for with the multigrid hierarchy"
# the ways of finding the norm that bound it from above (the Lanczos estimate of the Jacobi radius lies
# below it): only these may grant "converged" on the residual bound alone at a stall
TRUSTED_NORMS = ("exact", BARRIER_HOW, HIERARCHY_HOW)


def barrier_inverse_norm(operator) -> float | None:
    """An upper bound on ``||(I - W)^-1||_inf`` from one pass over the operator, or None.

    Comparison principle for M-matrices (common practice; e.g. Berman and Plemmons, *Nonnegative
    Matrices in the Mathematical Sciences*, 1994, ch. 6): with W >= 0, a v > 0 with
    ``(I - W) v >= m > 0`` on every unknown makes ``I - W`` a nonsingular M-matrix, and then
    ``w = (I - W)^-1 1 <= v / m``, so ``||(I - W)^-1||_inf = max w <= max v / m``. The candidates
    are quadratics centred in the unknowns' bounding box (kernels/certificate.py): on the
    5-point Laplacian with equal weights each gives m = 1 and bounds max w within a factor of
    about 2 (2047² model problem: 2.1e6 against about 1.2e6). Where the weights are uneven
    (conductivity jumps, insulated faces on the wrong side of the centre) they may fail: None,
    and the caller finds the norm another way. The rounding of the kernel's sums is taken off m.
    """
    if operator.unknowns == 0 or not all(hasattr(operator, a) for a in ("cls", "row_ptr", "seg_class", "_blocks")):
        return None  # (an operator split across MPI ranks has its strips' arrays only)
    table = np.asarray(operator.table, dtype=np.float64)
    w = table[1:, :4]
    if w.size == 0 or not np.all(w >= 0.0) or not np.all(np.isfinite(w)) or float(np.max(w.sum(axis=1))) > 1.0 + 1e-12:
        return None  # not the weights of an M-matrix (the comparison needs W >= 0, rows summing to at most 1)
    row_ptr, seg_start, seg_end = operator.row_ptr, operator.seg_start, operator.seg_end
    counts = np.diff(row_ptr)
    rows = np.nonzero(counts)[0]
    if rows.size == 0:
        return None
    i0, i1 = int(rows[0]), int(rows[-1])  # every unknown lies in rows i0..i1, columns j0..j1 (a box around the segments)
    j0, j1 = int(seg_start.min()), int(seg_end.max()) - 1
    ci, cj = (i0 + i1) // 2, (j0 + j1) // 2
    ri2 = float(max(ci - i0, i1 - ci) ** 2 + 1)  # + 1: v >= 1 > 0 on every unknown
    rj2 = float(max(cj - j0, j1 - cj) ** 2 + 1)
    r2 = ri2 + rj2 - 1.0
    from relaxtui.kernels import certificate

    res = certificate.barriers(operator.cls, table, row_ptr, seg_start, seg_end, operator.seg_class, ci, cj, r2, ri2, rj2,
                               operator._blocks()[1])
    best = None
    for low, high, least in res:
        # the kernel's sums carry a few roundings of terms up to max v (the leak term) and 2 sqrt(max v) + 1
        margin = 64.0 * _EPS * (abs(high) + 2.0 * math.sqrt(abs(high)) + 2.0)
        m = float(low) - margin
        if not (math.isfinite(m) and m > 0.0 and least > 0.0 and math.isfinite(high)):
            continue
        bound = max(float(high) / m, 1.0)  # ||(I - W)^-1|| >= 1 (W >= 0)
        best = bound if best is None else min(best, bound)
    return best


def inverse_norm(run) -> tuple[float, str]:
    """``||(I - W)^-1||_inf`` for a run's operator (cached on it) and how it was found.

    In order: exact (banded Cholesky) where that is cheap; else the quadratic barrier's upper
    bound (one pass); else the method's own solve or the Jacobi-radius estimate. The barrier's
    bound may be loose: :func:`tighter_inverse_norm` replaces it when it does not certify a stop.
    """
    op = run.operator
    if op.inverse_norm is not None:
        return op.inverse_norm
    exact = exact_inverse_norm(op) if hasattr(op, "cls") else None
    if exact is None:
        bound = barrier_inverse_norm(op)
        if bound is not None:
            op.inverse_norm = (bound, BARRIER_HOW)
            return op.inverse_norm
    return _estimated(run, exact)


def tighter_inverse_norm(run) -> tuple[float, str] | None:
    """The norm found without the barrier, when the cached one is the barrier's bound (else None):
    what the stopping rule asks for when the bound is too loose to certify a stop."""
    op = run.operator
    if op.inverse_norm is None or op.inverse_norm[1] != BARRIER_HOW:
        return None
    op.inverse_norm = None
    return _estimated(run, None)


def _estimated(run, exact) -> tuple[float, str]:
    op = run.operator
    own = None
    if exact is None:
        # a stepper with a hierarchy of its own (multigrid) solves for the norm with it: a few cycles
        # in its own work vectors, where the Lanczos estimate below needs three field-sized ones
        solver = getattr(getattr(run, "_stepper", None), "inverse_norm", None)
        own = solver() if callable(solver) else None
    if exact is not None:
        found = (exact, "exact")
    elif own is not None:
        found = (own, HIERARCHY_HOW)
    else:
        mu = run.mu
        how = "from the Jacobi radius"
        est = op.radius_job().result() if mu is None else None  # the operator's shared estimate, if finished
        if est is not None:
            mu = est.mu
        elif mu is None:
            if hasattr(op, "jacobi_apply"):
                from relaxtui.solver.radius import jacobi_radius

                mu = jacobi_radius(op.jacobi_apply, op.cls, op.diag, min_steps=30, max_steps=LANCZOS_STEPS).mu
            else:  # an operator split across MPI ranks: the same estimate, its vectors by strips
                mu = op.jacobi_radius(min_steps=30, max_steps=LANCZOS_STEPS).mu
            how = f"from a Lanczos estimate of the Jacobi radius ({LANCZOS_STEPS} steps at most)"
        gap = 1.0 - float(mu)
        found = (ESTIMATE_SAFETY / gap if gap > 0.0 else math.inf, how)
    op.inverse_norm = found
    return found


def rounding_floor(inv_norm: float, scale: float, cells: int = 1, eps: float = _EPS) -> float:
    """The attainable accuracy in field units: ``FLOOR_SAFETY * kappa * eps * max |u| / sqrt(cells)``.

    ``kappa * eps * max |u|`` is the worst case, rounding errors of the residual
    all aligned with the slowest mode. They are not: each cell's is its own,
    of size about ``eps * max |u|``, so their projection on the (smooth,
    spread-out) slowest mode is smaller by about ``sqrt(cells)`` (a random-sign
    sum; common practice in rounding-error estimates, Higham 2002, §2.8). The
    near-singular case of tests/test_edges.py (32 x 30 cells held by convection
    faces of coefficient 1e-10) measures a true error of 2.5e-4 against this
    estimate's 3.4e-3 (the worst case says 0.05).

    ``eps`` is the field's machine epsilon: float64's by default, float32's for
    a single-precision run, whose field is rounded to float32 on every store
    (each cell's residual at the fixed point is then a float32 rounding of its
    own, of size about ``eps32 * max |u|``: the same random-sign model).
    """
    s = max(abs(float(scale)), np.finfo(float).tiny)
    return FLOOR_SAFETY * NORM_OF_OPERATOR * inv_norm * float(eps) * s / math.sqrt(max(int(cells), 1))


def attach(rule, run) -> None:
    """Give a run's stopping rule the residual of the current field, the norm of the inverse and
    the number of unknowns (for the rounding floor); refuse an operator float64 cannot hold."""
    op = run.operator
    if not (np.all(np.isfinite(op.table)) and np.all(np.isfinite(op.diag))):
        from relaxtui.errors import CaseError

        raise CaseError(f"{_label(run.case)}: the case's numbers (conductivities, coefficients, sources, fluxes "
                        "and the cell size together) exceed the range of float64; rescale the units")
    rule.field_residual = lambda: op.residual(run._u)
    rule.field_magnitude = run._field_magnitude
    rule.inverse_norm = lambda: inverse_norm(run)
    rule.tighter_inverse_norm = lambda: tighter_inverse_norm(run)
    rule.floor_cells = int(op.unknowns)
    rule.convergent_by_theory = run.method in CONVERGENT_METHODS
    rule.residual_certified = run.method in RESIDUAL_CERTIFIED_METHODS or (
        run.method == "multigrid" and weight_contrast(op.table) >= CERTIFIED_CONTRAST)
    rule.residual_bound = _weighted_bound(run) if rule.residual_certified else None


def _weighted_bound(run):
    """The rule's ``residual_bound(inv, r, sweeps, final)``: the run's stepper's weighted residual bound
    (multigrid: ``MultigridStepper.residual_bound``; None for other methods). It costs a solve, so before
    the stop (``final``) it is computed again only once the largest residual has halved or the sweeps have
    doubled since the last time (None between: the plain certificate stands)."""
    last = {"r": math.inf, "sweeps": 0}

    def bound(inv: float, r: float, sweeps: int, final: bool = False):
        solver = getattr(getattr(run, "_stepper", None), "residual_bound", None)
        if not callable(solver) or getattr(run, "_u", None) is None:
            return None
        if not (final or r <= 0.5 * last["r"] or sweeps >= 2 * last["sweeps"]):
            return None
        last["r"], last["sweeps"] = r, max(int(sweeps), 1)
        return solver(run._u, inv)

    return bound


def _label(case) -> str:
    return str(case.path) if getattr(case, "path", None) is not None else str(getattr(case, "name", "case"))
