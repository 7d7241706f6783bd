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
form, the multigrid kernels' own) on grids where that is cheap, solved for to
about 1 % by a multigrid run's own hierarchy (``MultigridStepper.inverse_norm``; under MPI
the same steps by strips, ``relaxtui.parallel.multigrid.StripMultigrid.inverse_norm``),
and estimated from the Jacobi spectral radius μ elsewhere (``1/(1 - μ)`` is the D-norm of
the inverse; times a safety factor for the infinity norm).
"""

from __future__ import annotations

import math

import numpy as np

_EPS = float(np.finfo(float).eps)
EXACT_WORK = 4e7  # unknowns * bandwidth^2 of a banded Cholesky worth doing for the exact norm
ESTIMATE_SAFETY = 2.0  # D-norm 1/(1 - mu) to infinity-norm estimate
NORM_OF_OPERATOR = 2.0  # ||I - W||_inf <= 2 (weights sum to at most 1 per row)
FLOOR_SAFETY = 4.0  # on the random-sign estimate of the rounding floor (see rounding_floor)
LANCZOS_STEPS = 120
# SOR-type sweeps, which converge for every omega in (0, 2) on a symmetric positive definite system
# (Ostrowski-Reich; the stopping rule then never calls growing updates divergence)
CONVERGENT_METHODS = ("gauss-seidel", "sor", "red-black-sor", "symmetric-sor")  # most Lanczos steps spent when nothing else gives the radius (multigrid, large grids)


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


def inverse_norm(run) -> tuple[float, str]:
    """``||(I - W)^-1||_inf`` for a run's operator (cached on it) and how it was found."""
    op = run.operator
    if op.inverse_norm is not None:
        return op.inverse_norm
    exact = exact_inverse_norm(op) if hasattr(op, "cls") else None
    own = None
    if exact is None:
        # a stepper with a hierarchy of its own (multigrid) solves for the norm with it: a few cycles
        # in its own work vectors, where the Lanczos estimate below needs three field-sized ones
        solver = getattr(getattr(run, "_stepper", None), "inverse_norm", None)
        own = solver() if callable(solver) else None
    if exact is not None:
        found = (exact, "exact")
    elif own is not None:
        found = (own, "solved for with the multigrid hierarchy")
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
    rule.inverse_norm = lambda: inverse_norm(run)
    rule.floor_cells = int(op.unknowns)
    rule.convergent_by_theory = run.method in CONVERGENT_METHODS


def _label(case) -> str:
    return str(case.path) if getattr(case, "path", None) is not None else str(getattr(case, "name", "case"))
