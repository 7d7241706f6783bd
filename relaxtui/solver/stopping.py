"""The stopping rule: when is the field at equilibrium to the user's tolerance?

A pure module (numpy only, no numba, no screen). It is fed the history of a
stationary iteration, one record per sweep (the largest update
``max |u_k - u_{k-1}|`` and the largest residual of the sweep), and decides.

The estimate
------------
For a linear stationary iteration ``e_{k+1} = M e_k`` whose slowest mode decays
by the factor ``rho`` per sweep, the update of sweep ``k + 1`` is
``(M - I) e_k``; on that mode ``|e_k| = |Δ_{k+1}| / (1 - rho)`` and hence

    |e_k| ≈ Δ_k · rho / (1 - rho)        (the geometric tail of the updates)

(e.g. Hageman & Young, *Applied Iterative Methods*, 1981, ch. 5, on stopping
tests for SOR; common practice). A small update is therefore *not*
convergence: with rho = 0.9999 the error is ten thousand times the update.

Three things make the naive test dishonest, and the rule guards each:

* **Early decay is faster than the asymptotic one.** Rough error components
  dominate the updates (an update multiplies each mode by ``1 - λ``, up to 2
  for rough modes but tiny for the smooth ones that carry the error), and they
  die first, so a short-window ratio of updates underestimates rho. The rule
  measures the decay rate over two consecutive windows and, while the rate is
  still slowing down, extrapolates it (a decay rate that falls from window to
  window is assumed to keep falling by as much again).
* **SOR is not monotone** (complex eigenvalues above the optimal ω, a Jordan
  block at it): the updates oscillate. Rates are measured on the running
  maximum of the updates over a short envelope, and the error bound uses that
  maximum, not the last update.
* **The rate estimate is uncertain.** The bound uses ``1 - rho`` shrunk by
  a safety factor and is multiplied by another, so the reported estimated
  error is an upper bound in practice; the tests check it against the exact
  discrete solution over many methods, ω, shapes and tolerances.

When the caller knows a theoretical factor for the method (Young's relations
from an estimated Jacobi spectral radius), it is used as a floor for rho.

Decisions (the contract's statuses): ``converged``, ``stalled`` (no new
smallest update for a long window, or the updates have reached the
floating-point floor while the bound is still above the tolerance),
``diverged`` (non-finite values or sustained growth), ``sweep-limit``,
``time-limit``, ``cancelled``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

CONVERGED = "converged"
STALLED = "stalled"
DIVERGED = "diverged"
SWEEP_LIMIT = "sweep-limit"
TIME_LIMIT = "time-limit"
CANCELLED = "cancelled"
STATUSES = (CONVERGED, STALLED, DIVERGED, SWEEP_LIMIT, TIME_LIMIT, CANCELLED)

# Tuning constants of the estimate (validated by tests/test_stopping*.py against
# exact discrete solutions; change them only with those tests).
MIN_WINDOW = 4  # shortest window (sweeps) a decay rate is measured over
WINDOW_FRACTION = 0.25  # a window is this fraction of the sweeps since the last restart
ENVELOPE = 8  # running maximum of the updates over this many sweeps
RATE_SAFETY = 1.5  # (1 - rho) is divided by this before use
ERROR_SAFETY = 2.0  # the geometric tail is multiplied by this
FLOOR_ULPS = 64.0  # updates below FLOOR_ULPS * eps * scale are rounding noise
# float32 fields (single precision): the updates' rounding noise measured at the fixed point is 0.3 to 6
# roundings of max |u| (Jacobi to SOR at omega 1.9, tests/cases.py's feature and model cases); float64's
# wide margin would stop slow methods far above what float32 resolves
FLOOR_ULPS_SINGLE = 16.0
STALL_MIN_WINDOW = 500  # sweeps without a new smallest update before "stalled"
CERTIFIED_STALL_WINDOW = 200  # least sweeps of updates all below the rounding floor that stall a certified run
GROWTH_LIMIT = 1e6  # sustained growth by this factor over the best update is divergence
_EPS = float(np.finfo(float).eps)
# Above this condition number a stalled run's reason calls the system near-singular (it costs float64
# six of its sixteen digits: common practice); below it, the tolerance is simply finer than the field's
# magnitude allows.
NEAR_SINGULAR_KAPPA = 1e6


@dataclass(frozen=True)
class Decision:
    status: str | None  # None: keep going
    estimated_error: float
    factor: float | None
    eta_sweeps: float | None  # sweeps still needed to reach the tolerance at the current factor


def _envelope_at(u: np.ndarray, idx: np.ndarray, envelope: int = ENVELOPE) -> np.ndarray:
    """Running maximum of ``u`` over the ``envelope`` entries ending at each index."""
    offsets = np.arange(-(envelope - 1), 1)
    cols = np.clip(idx[:, None] + offsets[None, :], 0, None)
    return u[cols].max(axis=1)


def estimates(updates: np.ndarray, ends=None, *, prior_factor: float | None = None, prior_gap: float | None = None,
              min_window: int = MIN_WINDOW, envelope: int = ENVELOPE):
    """Bound the remaining error after each sweep ``ends`` of one run segment.

    Parameters
    ----------
    updates : 1-D array
        Largest update of each sweep since the segment started (a new segment
        starts whenever the iteration itself changes, e.g. a new ω).
    ends : array of int, optional
        Sweep indices (0-based, into ``updates``) to estimate after; default
        the last one.
    prior_factor : float, optional
        A theoretical convergence factor for the method (from Young's relations
        and an estimate of the Jacobi radius). It replaces the extrapolation of
        a still-settling rate; a measured decay slower than it always wins.
    prior_gap : float, optional
        Theoretical |λ - 1| of the slowest *smooth* mode when the dominant
        eigenvalues are complex (SOR above its optimal ω: all have modulus
        ω - 1, but the smooth modes that carry the error rotate slowly, so the
        error is |Δ|/|λ - 1|, far below |Δ|/(1 - |λ|)). Used only while the
        measured factor agrees with ``prior_factor``.
    min_window, envelope : int, optional
        The shortest rate window and the running-maximum length (defaults
        MIN_WINDOW and ENVELOPE, made for relaxation sweeps). An iteration
        whose updates fall monotonically by a large factor per step (a
        multigrid cycle) may ask for shorter ones: it then needs fewer steps
        before the first estimate, and its bound is not inflated by the
        updates of steps long past.

    Returns
    -------
    error, factor, measured, mature : arrays (one entry per end)
        ``error`` is the bound on max |u - u_exact| in field units (inf where
        not yet estimable); ``factor`` the factor used for it (NaN where
        unknown); ``measured`` the raw decay factor of the recent window;
        ``mature`` whether the decay rate has settled enough to trust.
    """
    u = np.asarray(updates, dtype=np.float64)
    n = len(u)
    k = np.atleast_1d(np.asarray(n - 1 if ends is None else ends, dtype=np.int64))
    m = np.maximum(min_window, (WINDOW_FRACTION * (k + 1)).astype(np.int64))
    ok = k - 2 * m >= 0
    k0 = np.where(ok, k, 0)
    m0 = np.where(ok, m, 0)
    e_now = _envelope_at(u, k0, envelope)
    e_mid = _envelope_at(u, k0 - m0, envelope)
    e_old = _envelope_at(u, k0 - 2 * m0, envelope)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        r1 = (np.log(e_mid) - np.log(e_now)) / np.maximum(m0, 1)  # recent decay rate per sweep
        r2 = (np.log(e_old) - np.log(e_mid)) / np.maximum(m0, 1)  # the window before
        # still slowing down: assume the rate keeps falling by as much again
        rate = np.where(r2 > r1, np.maximum(2.0 * r1 - r2, r1 / 4.0), r1)
        rho = np.exp(-rate)
        measured = np.exp(-r1)
    if prior_factor is not None:
        # A theoretical factor is the asymptotic rate itself: no extrapolation is
        # needed, but a measured decay slower than it (a wrong prior, SOR's
        # transient near the optimum) always wins.
        rho = np.maximum(measured, prior_factor)
        with np.errstate(divide="ignore"):  # a factor of 0 (an exact step) is an infinite rate, not a warning
            rate = -np.log(rho)
    gap = 1.0 - rho
    if prior_gap is not None and prior_factor is not None and 0.0 < prior_factor < 1.0:
        with np.errstate(divide="ignore", invalid="ignore"):
            agrees = np.abs(r1 + math.log(prior_factor)) <= 0.1 * -math.log(prior_factor)
        complex_regime = agrees & (prior_gap > gap)
        # The factor is known exactly here (|λ| = ω - 1), and the bound is loose
        # by itself: rough modes, which carry little error, dominate the updates
        # and decay no faster than the smooth ones. No safety factors then
        # (measured looseness still 6x or more, tests/test_honesty.py).
        gap = np.where(complex_regime, prior_gap * RATE_SAFETY * ERROR_SAFETY, gap)
    gap = gap / RATE_SAFETY
    finite = ok & np.isfinite(e_now) & np.isfinite(r1) & np.isfinite(r2) & (rate > 0.0) & (gap > 0.0)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # over: updates near 1e308 (a huge start)
        # the tail of the updates from this sweep on, Δ/(1 - rho) (a little looser
        # than Δ·rho/(1 - rho)), with both safety factors applied
        error = np.where(finite, ERROR_SAFETY * e_now / np.where(finite, gap, 1.0), np.inf)
    error = np.where(ok & (e_now == 0.0), 0.0, error)
    mature = finite & ((r2 <= 1.25 * r1 + 1e-12) | (prior_factor is not None))
    factor = np.where(finite, rho, np.nan)
    return error, factor, np.where(ok, measured, np.nan), mature


@dataclass(frozen=True)
class Estimate:
    """What the rule knows after the latest sweep."""

    error: float  # bound on max |u - u_exact| in field units (inf when not yet estimable)
    factor: float | None  # convergence factor per sweep used for the bound
    measured: float | None  # raw decay factor of the recent window
    mature: bool  # whether the decay rate has settled enough to trust the bound


def estimate(updates: np.ndarray, *, prior_factor: float | None = None, prior_gap: float | None = None,
             min_window: int = MIN_WINDOW, envelope: int = ENVELOPE) -> Estimate:
    """The estimate after the last sweep of ``updates`` (see :func:`estimates`)."""
    if len(updates) == 0:
        return Estimate(math.inf, None, None, False)
    if not math.isfinite(float(updates[-1])):
        return Estimate(math.inf, None, None, False)
    e, f, meas, mature = estimates(updates, prior_factor=prior_factor, prior_gap=prior_gap,
                                   min_window=min_window, envelope=envelope)
    fac = None if math.isnan(f[0]) else float(f[0])
    return Estimate(float(e[0]), fac, None if math.isnan(meas[0]) else float(meas[0]), bool(mature[0]))


class StoppingRule:
    """Decides after each chunk of sweeps whether a run should stop.

    Parameters
    ----------
    tolerance : float
        Largest error the user accepts, in field units (> 0).
    max_sweeps : int
        Sweep limit of the run.
    time_limit : float or None
        Seconds of solving allowed.
    scale : float
        Magnitude of the field (largest |value| among boundary values and the
        initial field); sets the floating-point floor of the updates.
    min_window, envelope : int
        Shortest rate window and running-maximum length of the estimate (see
        :func:`estimates`); a stepper may ask for its own (``rule_options``).
    dtype : numpy float type
        The working field's storage (float64, or float32 for a single-precision
        run): its machine epsilon sets the rounding floor of the updates and of
        the attainable accuracy, and the messages name it.
    """

    def __init__(self, tolerance: float, max_sweeps: int, time_limit: float | None = None, scale: float = 1.0,
                 min_window: int = MIN_WINDOW, envelope: int = ENVELOPE, dtype=np.float64):
        if not tolerance > 0.0:
            raise ValueError("tolerance must be > 0")
        if int(min_window) < 1 or int(envelope) < 1:
            raise ValueError("min_window and envelope must be >= 1")
        self.min_window = int(min_window)
        self.envelope = int(envelope)
        self.tolerance = float(tolerance)
        self.max_sweeps = int(max_sweeps)
        self.time_limit = time_limit
        self.scale = max(abs(float(scale)), np.finfo(float).tiny)
        self.eps = float(np.finfo(dtype).eps)  # the field's unit roundoff (x 2)
        self.float_name = np.dtype(dtype).name  # "float64" or "float32", for the messages
        self.floor_ulps = FLOOR_ULPS if self.eps <= _EPS else FLOOR_ULPS_SINGLE
        self.prior_factor: float | None = None
        self.prior_gap: float | None = None
        self._settled_factor: float | None = None  # last factor measured while the rate had settled
        self._updates = np.empty(1024)
        self._n = 0
        self._segment = 0  # index where the current segment (same iteration) starts
        self._best = math.inf  # smallest update of the current segment
        self.last = Decision(None, math.inf, None, None)
        self.last_estimate = Estimate(math.inf, None, None, False)  # the raw estimate behind ``last``
        self._latest: Estimate | None = None
        self._chunk_errors = np.empty(0)
        self.stall_window = 0  # the caller's floor for the no-progress window (SOR's long transient)
        # Certificates (set by relaxtui.solver.conditioning.attach; None in pure use):
        # field_residual() -> max |residual| of the current field (field units);
        # inverse_norm() -> (||(I - W)^-1||_inf, how it was found).
        self.field_residual = None
        self.inverse_norm = None
        # field_magnitude() -> max |u| of the current field and the boundary values (the rounding floor's scale)
        self.field_magnitude = None
        # tighter_inverse_norm() -> a tighter (norm, how) when inverse_norm() gave a cheap upper bound, else None
        self.tighter_inverse_norm = None
        self.reason: str | None = None  # why the run stalled, when the rule knows better than "no progress"
        self.floor: float | None = None  # the attainable accuracy once known (field units)
        self.floor_cells = 1  # unknowns of the system (the rounding floor's random-sign estimate)
        # True when theory guarantees convergence (SOR-type sweeps with 0 < omega < 2 on the contract's
        # symmetric positive definite systems: the Ostrowski-Reich theorem, e.g. Saad, Iterative Methods
        # for Sparse Linear Systems, 2003, ch. 4, from memory): growing updates are then a transient
        # (non-normal SOR near omega = 2), not divergence; only non-finite or huge values are.
        self.convergent_by_theory = False
        # True when a converged estimate must also pass the residual certificate ||(I - W)^-1|| max |r| <= tolerance
        # (symmetric SOR, whose updates can understate the error: relaxtui.solver.conditioning.RESIDUAL_CERTIFIED_METHODS)
        self.residual_certified = False
        # residual_bound(inv, r, sweeps, final) -> a sharper bound of the error than inv * r (each residual weighed by
        # where it lies: relaxtui.solver.multigrid.MultigridStepper.residual_bound), or None
        self.residual_bound = None

    def rescale(self, scale: float) -> None:
        """Raise the field's magnitude (sources can lift the field above its boundary values); the
        rounding floors follow. A single-precision run calls it as its updates near float32's floor."""
        if math.isfinite(scale):
            self.scale = max(self.scale, abs(float(scale)))

    # -- feeding ---------------------------------------------------------------
    def add(self, updates) -> None:
        """Append the largest update of each sweep just done."""
        updates = np.asarray(updates, dtype=np.float64)
        need = self._n + len(updates)
        if need > len(self._updates):
            grown = np.empty(max(need, 2 * len(self._updates)))
            grown[: self._n] = self._updates[: self._n]
            self._updates = grown
        self._updates[self._n : need] = updates
        self._n = need
        if len(updates):
            self._best = min(self._best, float(np.min(updates)))
        # one vectorised estimate per chunk: the history's per-sweep bounds and the latest one
        seg = self._updates[self._segment : self._n]
        k = min(len(updates), len(seg))
        if k:
            e, f, meas, mature = estimates(seg, np.arange(len(seg) - k, len(seg)),
                                           prior_factor=self.prior_factor, prior_gap=self.prior_gap,
                                           min_window=self.min_window, envelope=self.envelope)
            self._chunk_errors = e
            last_ok = math.isfinite(float(seg[-1]))
            self._latest = Estimate(float(e[-1]) if last_ok else math.inf,
                                    None if math.isnan(f[-1]) or not last_ok else float(f[-1]),
                                    None if math.isnan(meas[-1]) or not last_ok else float(meas[-1]),
                                    bool(mature[-1]) and last_ok)

    def restart(self, prior_factor: float | None = None, prior_gap: float | None = None, stall_window: int = 0) -> None:
        """The iteration changed (new ω, new method): measure rates afresh from here."""
        self._segment = self._n
        self._latest = None
        self.stall_window = int(stall_window)
        self.prior_factor = prior_factor
        self.prior_gap = prior_gap
        self._settled_factor = None
        self._best = math.inf

    @property
    def sweeps(self) -> int:
        return self._n

    @property
    def updates(self) -> np.ndarray:
        return self._updates[: self._n]

    # -- deciding --------------------------------------------------------------
    def recent_errors(self, count: int) -> np.ndarray:
        """The error bound after each of the sweeps of the last :meth:`add` (for the history)."""
        return self._chunk_errors[-count:] if count > 0 else np.empty(0)

    def estimate(self) -> Estimate:
        """The estimate after the latest sweep (computed once per :meth:`add`)."""
        if self._latest is None:
            return estimate(self._updates[self._segment : self._n], prior_factor=self.prior_factor, prior_gap=self.prior_gap,
                            min_window=self.min_window, envelope=self.envelope)
        return self._latest

    def decide(self, seconds: float = 0.0, cancelled: bool = False) -> Decision:
        """The decision after the sweeps fed so far (``seconds`` of solving)."""
        est = self.last_estimate = self.estimate()
        self.reason = None
        recent = self._updates[max(self._segment, self._n - self.min_window) : self._n]
        frozen = self._n - self._segment >= self.min_window and not np.any(recent)
        if not math.isfinite(est.error) and frozen:
            # the field no longer changes at all before the rate is estimable (a direct solve repeated):
            # a fixed point of the iteration if its residual says so (see _certify)
            est = self.last_estimate = Estimate(self.floor_ulps * self.eps * self.scale, est.factor, est.measured, True)
        if est.mature and est.factor is not None:
            self._settled_factor = est.factor
        elif self.at_floor() and self._settled_factor is not None:
            # Updates are rounding noise now, so their ratios say nothing; the
            # factor measured before the floor still bounds what is left.
            recent = float(self._updates[max(self._segment, self._n - self.envelope) : self._n].max())
            gap = (1.0 - self._settled_factor) / RATE_SAFETY
            est = Estimate(ERROR_SAFETY * recent / gap, self._settled_factor, None, True)
        eta = None
        if est.factor is not None and 0.0 < est.factor < 1.0 and math.isfinite(est.error):
            eta = max(0.0, math.log(self.tolerance / est.error) / math.log(est.factor)) if est.error > self.tolerance else 0.0
        status = self._status(est, seconds, cancelled)
        if status == DIVERGED and self.inverse_norm is not None:
            status, est = self._growth_within_floor(est)
        if status in (CONVERGED, STALLED) and self.inverse_norm is not None:
            status, est = self._certify(status, est, frozen)
            if status is None:
                # a converged estimate the residual certificate refused (residual_certified): decide again on
                # the certified bound, which is above the tolerance (a stall, a limit, or keep going)
                status = self._status(est, seconds, cancelled)
                if status == STALLED:
                    status, est = self._certify(status, est, frozen)
        self.last = Decision(status, est.error, est.factor, eta)
        return self.last

    def _certify(self, status: str, est: Estimate, frozen: bool) -> tuple[str, Estimate]:
        """Check a stop against the residual certificate and float64's attainable accuracy.

        (relaxtui.solver.conditioning explains both.) A field the updates no
        longer move, or that sits at the rounding floor, is converged only if
        ``||(I - W)^-1|| * max |residual|`` is within the tolerance; a
        converged bound never claims less than the floor ``kappa * eps * max |u|``,
        and a floor above the tolerance makes the honest status ``stalled``.
        """
        if self.field_magnitude is not None:
            # the floor is the rounding of the field as it is now: sources lift a field far above its boundary
            # values (measured: an insulated k = 1e4 island with a source, held at 1.0 through k = 1e-4, rises to
            # 6e5; a floor from the boundary's 1.0 certified multigrid's rounding noise as converged, true error
            # 1.0 against a tolerance of 0.061)
            self.rescale(self.field_magnitude())
        inv, how = self.inverse_norm()
        status_out, est_out = self._certify_with(inv, how, status, est, frozen)
        if status_out != CONVERGED and self.tighter_inverse_norm is not None:
            tighter = self.tighter_inverse_norm()  # the first norm was a cheap upper bound: try the closer one
            if tighter is not None:
                self.reason = None
                status_out, est_out = self._certify_with(*tighter, status, est, frozen)
        return status_out, est_out

    def _certify_with(self, inv: float, how: str, status: str, est: Estimate, frozen: bool) -> tuple[str, Estimate]:
        from relaxtui.solver.conditioning import rounding_floor

        floor = self.floor = rounding_floor(inv, self.scale, self.floor_cells, self.eps)
        updates_silent = frozen or est.error == 0.0 or (status == STALLED and self.at_floor())
        if updates_silent and self.field_residual is not None:
            r = float(self.field_residual())
            bound = self._residual_bound(inv, r, floor)
            if bound <= self.tolerance:
                return CONVERGED, Estimate(bound, est.factor, est.measured, True)
            if floor > self.tolerance:
                self.reason = self._floor_reason(inv, how, floor)
            elif r <= self.floor_ulps * self.eps * self.scale:
                kappa = f"{2.0 * inv:.3g}" if math.isfinite(inv) else "infinite"
                self.reason = (f"the residual {r:.3g} is at {self.float_name}'s rounding floor, but with the system's condition "
                               f"number about {kappa} (norm of the inverse {how}) that certifies only an error "
                               f"below {bound:.3g} > {self.tolerance:.3g}")
            elif frozen or est.error == 0.0:
                self.reason = (f"the updates vanished (every change of the field rounds to nothing in {self.float_name}: "
                               f"omega or a conductivity is too small) while the largest residual is {r:.3g}, "
                               f"so the error may be up to {bound:.3g}")
            else:
                self.reason = (f"the updates are at {self.float_name}'s rounding floor while the residual bound "
                               f"{bound:.3g} > {self.tolerance:.3g} (the tolerance is below what this grid resolves)")
            return STALLED, Estimate(bound, est.factor, est.measured, est.mature)
        if status == STALLED and self.residual_certified and self.field_residual is not None:
            # the updates' estimate is not trusted here (residual_certified), so a stall is judged on the
            # residual bound: converged where it certifies the tolerance with a norm of the inverse that is
            # a bound (not the Lanczos estimate, which lies below the norm), else stalled with the bound
            from relaxtui.solver.conditioning import TRUSTED_NORMS

            r = float(self.field_residual())
            bound = self._residual_bound(inv, r, floor, final=True)
            if bound <= self.tolerance and how in TRUSTED_NORMS:
                return CONVERGED, Estimate(bound, est.factor, est.measured, True)
            if math.isfinite(bound):
                if floor > self.tolerance:
                    self.reason = self._floor_reason(inv, how, floor)
                else:
                    why = (f"the updates are below {self.float_name}'s attainable accuracy {floor:.3g}"
                           if self._updates_are_noise() else "no progress over a long window")
                    self.reason = (f"{why}; the residual (largest {r:.3g}, norm of the inverse "
                                   f"{inv:.3g}, {how}) certifies only an error below {bound:.3g} > {self.tolerance:.3g}")
                return STALLED, Estimate(bound, est.factor, est.measured, est.mature)
        if status == CONVERGED:
            error = max(est.error, floor)
            if floor > self.tolerance:
                self.reason = self._floor_reason(inv, how, floor)
                return STALLED, Estimate(error, est.factor, est.measured, est.mature)
            if self.residual_certified and self.field_residual is not None:
                r = float(self.field_residual())
                bound = self._residual_bound(inv, r, floor)
                if bound > self.tolerance:
                    # the updates say converged, the residual does not certify it: go on, and report the
                    # certified bound (the updates' estimate is known to understate the error here)
                    return None, Estimate(max(error, bound), est.factor, est.measured, est.mature)
                error = max(error, bound)  # the certified bound, not only the estimate known to understate
            return CONVERGED, Estimate(error, est.factor, est.measured, est.mature)
        return status, est

    def _residual_bound(self, inv: float, r: float, floor: float, final: bool = False) -> float:
        """The residual certificate: ``max(inv * r, floor)``, or the sharper weighted bound where the plain
        one misses the tolerance and the run offers one (:attr:`residual_bound`; ``final``: for the stop
        itself, computed whatever its rate limit says)."""
        plain = inv * r if math.isfinite(r) else math.inf
        if plain > self.tolerance and math.isfinite(plain) and self.residual_bound is not None:
            sharp = self.residual_bound(inv, r, self._n, final)
            if sharp is not None and math.isfinite(sharp):
                plain = min(plain, sharp)
        return max(plain, floor)

    def _growth_within_floor(self, est: Estimate) -> tuple[str, Estimate]:
        """A growth of the updates that stays within float64's rounding floor is not divergence.

        ``diverged`` promises a field growing without bound. Near the floor (a large conductivity
        contrast makes the condition number, and so ``kappa * eps * max |u|``, large) an iteration's
        updates wander up and down in rounding noise: measured, multigrid on 16 x 16 cells with a
        1e8 contrast rose 100-fold from its best update while its field stayed within 2e-6 of
        spsolve's answer (max |u| = 100). Updates all below the floor are that noise: ``stalled``,
        with the floor's reason (or, with a tolerance above the floor, the finding that no progress
        is left)."""
        n = self._n
        last = float(self._updates[n - 1]) if n else math.inf
        if not math.isfinite(last):
            return DIVERGED, est
        if self.field_magnitude is not None:
            self.rescale(self.field_magnitude())
        from relaxtui.solver.conditioning import rounding_floor

        inv, how = self.inverse_norm()
        floor = rounding_floor(inv, self.scale, self.floor_cells, self.eps)
        recent = float(self._updates[max(self._segment, n - self.envelope) : n].max())
        if not (math.isfinite(floor) and recent <= floor):
            return DIVERGED, est
        self.floor = floor
        error = max(est.error, floor) if math.isfinite(est.error) else floor
        if floor > self.tolerance:
            self.reason = self._floor_reason(inv, how, floor)
        else:
            self.reason = (f"the updates rose again but stay below {self.float_name}'s rounding floor {floor:.3g} "
                           f"(condition number about {2.0 * inv:.3g}, norm of the inverse {how}): rounding noise, "
                           f"no further progress, the error may be up to {floor:.3g}")
        return STALLED, Estimate(error, est.factor, est.measured, est.mature)

    def _floor_reason(self, inv: float, how: str, floor: float) -> str:
        kappa = f"{2.0 * inv:.3g}" if math.isfinite(inv) else "infinite (singular to float64)"
        if self.eps > _EPS:
            why = "(a float32 field keeps about 7 digits: use double precision)"
        elif not math.isfinite(inv) or 2.0 * inv >= NEAR_SINGULAR_KAPPA:
            why = "(near-singular: the field is held only weakly by its fixed or convection faces)"
        else:  # a well-conditioned system: the tolerance is below float64's resolution of the field's values
            why = f"(the tolerance is finer than {self.float_name} resolves in values of size {self.scale:.3g})"
        return (f"{self.float_name} cannot certify the tolerance {self.tolerance:.3g} here: the system's condition number is "
                f"about {kappa} (norm of the inverse {how}), so rounding alone may leave an error of about "
                f"{floor:.3g} {why}")

    def _status(self, est: Estimate, seconds: float, cancelled: bool) -> str | None:
        n = self._n
        seg = self._updates[self._segment : n]
        if n and not math.isfinite(self._updates[n - 1]):
            return DIVERGED
        if len(seg) and est.mature and est.error <= self.tolerance:
            return CONVERGED
        if len(seg) and est.error == 0.0:
            return CONVERGED  # the field no longer changes at all: it is the discrete solution
        if self._diverging(seg):
            return DIVERGED
        if self._stalled(seg, est):
            return STALLED
        if cancelled:
            return CANCELLED
        if n >= self.max_sweeps:
            return SWEEP_LIMIT
        if self.time_limit is not None and seconds >= self.time_limit:
            return TIME_LIMIT
        return None

    def _diverging(self, seg: np.ndarray) -> bool:
        if len(seg) < 2 * self.min_window:
            return False
        last = seg[-1]
        if last > GROWTH_LIMIT * max(self.scale, self._best):
            return True
        if self.convergent_by_theory:
            return False
        # Sustained growth: the update envelope rose over each of the last two windows
        # and now exceeds the best update by a large factor.
        m = max(self.min_window, int(WINDOW_FRACTION * len(seg)))
        if len(seg) - 1 < 2 * m:
            return False
        k = len(seg) - 1
        e_now, e_mid, e_old = _envelope_at(seg, np.array([k, k - m, k - 2 * m]), self.envelope)
        return e_now > e_mid > e_old and e_now > 1e3 * self._best

    def at_floor(self) -> bool:
        """Whether the last updates are at the rounding floor of the field (float64, or float32 in single precision)."""
        if self._n - self._segment < self.min_window:
            return False
        floor = self.floor_ulps * self.eps * self.scale
        return float(self._updates[self._n - self.min_window : self._n].max()) <= floor

    def _updates_are_noise(self) -> bool:
        """Whether every update of the later half of the run (``CERTIFIED_STALL_WINDOW`` at least; the run
        twice that long) lies below the rounding floor of the field as it is now: the floor found at an
        earlier certificate may belong to a larger field (a huge start comes down)."""
        seg = self._updates[self._segment : self._n]
        if self.floor is None or len(seg) < 2 * CERTIFIED_STALL_WINDOW:
            return False
        top = float(seg[-max(CERTIFIED_STALL_WINDOW, len(seg) // 2) :].max())
        if not top <= self.floor:  # the earlier floor is at least the present one (the scale only grows)
            return False
        if self.field_magnitude is None or self.inverse_norm is None:
            return False
        from relaxtui.solver.conditioning import rounding_floor

        inv, _ = self.inverse_norm()
        return top <= rounding_floor(inv, float(self.field_magnitude()), self.floor_cells, self.eps)

    def _stalled(self, seg: np.ndarray, est: Estimate) -> bool:
        if len(seg) < 2 * self.min_window:
            return False
        if self.at_floor() and est.error > self.tolerance:
            return True  # rounding noise: no further progress is possible
        if self.residual_bound is not None and est.error > self.tolerance and self._updates_are_noise():
            # multigrid at conductivity jumps (its certificate is asked for): every update of the later half
            # of the run lies below float64's attainable accuracy, so the changes are rounding noise, far
            # above FLOOR_ULPS (measured: a 160 x 160 1:1e6 mix ran 24 000 iterations, 80 s, past its
            # residual's plateau before the window below, which doubles with each new smallest update of
            # the noise, gave up). Half the run, not a fixed window: the residual may still creep down
            # (4 of 72 scanned runs certified converged 50-240 steps after 200 such steps)
            return True
        window = max(STALL_MIN_WINDOW, (self._n - self._segment) // 2, self.stall_window)
        if est.factor is not None and 0.0 < est.factor < 1.0:
            # at the measured rate a 1 % improvement takes about 0.01/(1 - rho) sweeps
            window = max(window, int(5.0 / (1.0 - est.factor)))
        if len(seg) <= window:
            return False
        # no progress: the last `window` sweeps never beat the best before them by 1 %
        before = float(np.min(seg[: len(seg) - window]))
        return float(np.min(seg[len(seg) - window :])) >= 0.99 * before
