"""The Jacobi spectral radius of the case's own operator, by Lanczos.

μ = ρ(J) is estimated with the Lanczos method on D^{1/2} J D^{-1/2} (symmetric,
similar to J) of the case's own operator, masks, materials and boundary faces
included, not from the rectangle formula cos(πh). Lanczos values lie inside
the spectrum, so the estimate errs low; the driver corrects it from the factor
SOR actually shows (:func:`relaxtui.solver.young.mu_from_sor_factor`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from relaxtui.solver.young import sor_sweeps as _sor_sweeps


@dataclass(frozen=True)
class RadiusEstimate:
    mu: float  # estimated Jacobi spectral radius
    steps: int  # Lanczos steps (operator applications) used
    settled: bool  # whether the estimate stopped moving before the step limit


class RitzRule:
    """The stopping rule of a Lanczos estimate, shared by one process's :class:`Lanczos` and the
    distributed one (:class:`relaxtui.parallel.group.DistributedLanczos`).

    The options are those of :class:`Lanczos`; the state is ``steps``, ``mu``, ``settled``,
    ``done`` and the (max_steps,) tridiagonal coefficients ``alphas`` and ``betas``.
    """

    def __init__(self, min_steps, max_steps, budget, rtol, method_sweeps):
        self.min_steps, self.max_steps, self.budget, self.rtol = int(min_steps), int(max_steps), float(budget), float(rtol)
        self.method_sweeps = method_sweeps
        self.steps = 0
        self.mu = 0.0
        self.settled = False
        self.done = False
        self._history: list[float] = []
        self.alphas = np.zeros(self.max_steps)
        self.betas = np.zeros(self.max_steps)

    def record_step(self, alpha: float, beta_new: float) -> None:
        """Take one step's coefficients: update ``mu`` and decide ``settled`` / ``done``."""
        from relaxtui.kernels import spectral

        self.steps += 1
        steps = self.steps
        self.alphas[steps - 1] = alpha
        top = float(spectral.tridiagonal_extreme(self.alphas, self.betas, steps))
        self._history.append(top)
        self.mu = min(max(top, 0.0), 1.0 - 1e-16)
        back = max(20, steps // 4)  # Ritz values can stall for a while, then move again
        if len(self._history) > back:
            old, now = 1.0 - self._history[-1 - back], 1.0 - top
            if now > 0 and abs(old - now) <= self.rtol * now:
                self.settled = self.done = True
            elif steps >= max(self.min_steps, self.budget * self.method_sweeps(top)):
                self.done = True
        if beta_new <= 1e-14:
            self.settled = self.done = True
        if steps >= self.max_steps:
            self.done = True
        if not self.done:
            self.betas[steps - 1] = beta_new

    def estimate(self) -> RadiusEstimate:
        return RadiusEstimate(self.mu, self.steps, self.settled)


class Lanczos(RitzRule):
    """A resumable Lanczos estimate of ρ(J): :meth:`advance` runs steps until the estimate
    settles, the step limit is hit, a step budget is spent or ``stop`` is set.

    Parameters
    ----------
    apply : callable(x, out)
        ``out = J x`` for the homogeneous Jacobi iteration matrix, on arrays of
        the shape of ``cls`` (0 outside the unknowns).
    cls, diag : ndarray
        The operator's class per cell (0: not an unknown) and the diagonal per class.
    min_steps, max_steps, budget, method_sweeps
        Steps (operator applications, each costing about two sweeps) are
        spent until the estimate settles, but not beyond ``budget`` times the
        sweeps the method would need at the current estimate
        (``method_sweeps(mu)``, SOR at its optimum by default; at least
        ``min_steps``, at most ``max_steps``).
    rtol : float
        The estimate has *settled* when the gap 1 - μ changed by less than this
        fraction over the last max(20, steps/4) steps. An unsettled estimate errs low.

    Attributes ``steps``, ``mu`` (the latest top Ritz value), ``settled`` and
    ``done`` may be read from another thread while :meth:`advance` runs.
    """

    def __init__(self, apply, cls: np.ndarray, diag: np.ndarray, *, min_steps: int = 100, max_steps: int = 600,
                 budget: float = 0.6, rtol: float = 0.01, method_sweeps=_sor_sweeps):
        from relaxtui.kernels import spectral

        super().__init__(min_steps, max_steps, budget, rtol, method_sweeps)
        self._k = spectral
        self.apply, self.cls, self.diag = apply, cls, diag
        self.v = np.empty(cls.shape)
        norm = spectral.start_vector(cls, diag, self.v)
        if norm == 0.0:
            self.settled = self.done = True
            return
        # The constant vector overlaps strongly with the Perron vector (the
        # slowest, smooth mode), so the top Ritz value rises quickly.
        spectral.scale_into(self.v, 1.0 / norm, self.v)
        self.v_prev = np.zeros_like(self.v)
        self.w = np.empty_like(self.v)
        self.beta = 0.0

    def advance(self, max_new_steps: int | None = None, stop=None, on_step=None) -> bool:
        """Run steps; returns ``done`` (settled or out of steps). ``stop``: a threading.Event;
        ``on_step(lanczos)`` is called after each step."""
        k = self._k
        new = 0
        while not self.done:
            if stop is not None and stop.is_set():
                break
            if max_new_steps is not None and new >= max_new_steps:
                break
            self.apply(self.v, self.w)
            alpha = k.d_dot(self.w, self.v, self.cls, self.diag)
            beta_new = k.d_orthogonalise(self.w, self.v, alpha, self.v_prev, self.beta, self.cls, self.diag)
            new += 1
            self.record_step(alpha, beta_new)
            if not self.done:
                self.beta = beta_new
                self.v_prev, self.v = self.v, self.v_prev
                k.scale_into(self.w, 1.0 / beta_new, self.v)
            if on_step is not None:
                on_step(self)
        if self.done:
            self.v = self.v_prev = self.w = None  # the vectors are not needed any more
        return self.done


def jacobi_radius(apply, cls: np.ndarray, diag: np.ndarray, **options) -> RadiusEstimate:
    """Estimate ρ(J) with Lanczos on J in the D-inner product (J is self-adjoint there);
    the options are those of :class:`Lanczos`."""
    lanczos = Lanczos(apply, cls, diag, **options)
    lanczos.advance()
    return lanczos.estimate()


# --- one estimate per operator, shared by every run on it ------------------------------------------

import atexit  # noqa: E402
import weakref  # noqa: E402

_RUNNING: "weakref.WeakSet[RadiusJob]" = weakref.WeakSet()  # jobs that have started a background thread


@atexit.register
def _stop_background_jobs() -> None:
    """At exit, stop every background estimate after its current step (no kernel left running at shutdown)."""
    for job in list(_RUNNING):
        job.pause()


BACKGROUND_UNKNOWNS = 300_000  # above this many unknowns the estimate runs beside the sweeps, not before them
# above this many unknowns the estimate is the two-level one (relaxtui.solver.coarse: about half the memory of
# the fine Lanczos vectors and a fraction of its time); at or below, the fine Lanczos estimate
COARSE_UNKNOWNS = BACKGROUND_UNKNOWNS
CACHE_VERSION = 1


def coarse_unknowns() -> int:
    """Above this many unknowns the two-level estimate is used: :data:`COARSE_UNKNOWNS`, or the whole number in
    ``RELAXTUI_COARSE_UNKNOWNS`` (the tests take the two-level path on small grids with it, also under mpiexec)."""
    import os

    text = os.environ.get("RELAXTUI_COARSE_UNKNOWNS", "")
    return int(text) if text.strip().isdigit() else COARSE_UNKNOWNS


@dataclass(frozen=True)
class RadiusState:
    """What the estimate is doing, for a progress line (safe to hand to another thread)."""

    stage: str  # "not started", "running", "paused", "done", "failed"
    steps: int
    max_steps: int
    mu: float | None  # the estimate so far (None before the first step)
    settled: bool
    seconds: float
    source: str  # "lanczos", "cache", "observed factor"

    def describe(self) -> str:
        if self.stage == "done":
            how = "settled" if self.settled else "not settled"
            if self.source == "cache":
                return f"Jacobi radius {self.mu:.6f} (cached, {how})"
            return f"Jacobi radius {self.mu:.6f} from {self.steps} Lanczos steps ({self.seconds:.2f} s, {how})"
        if self.stage == "not started":
            return "Jacobi radius not estimated yet (it starts beside the sweeps)"
        if self.stage == "failed":
            return f"the Jacobi radius estimate failed ({self.source}); it is not tried again in this process"
        so_far = "" if self.mu is None else f", {self.mu:.6f} so far"
        return f"estimating the Jacobi radius: {self.steps}/{self.max_steps} Lanczos steps{so_far}"


class RadiusJob:
    """The Jacobi radius of one operator: estimated once, reused by every later run on it.

    The operator owns one (``Operator.radius_job()``). A run either advances
    it in its own thread (:meth:`run`, small grids: quick and reproducible) or
    starts it in a background thread (:meth:`start`) and sweeps meanwhile,
    reading :meth:`result` between chunks; :meth:`pause` stops the thread and
    keeps the Lanczos state, so a later run resumes where it stopped. The final
    estimate may be kept on disk (:meth:`load`, :meth:`save`) keyed by a hash of
    the operator.
    """

    def __init__(self, operator):
        import threading

        self.operator = operator
        self._lock = threading.Lock()
        self._lanczos: Lanczos | None = None
        self._final: RadiusEstimate | None = None
        self._source = "lanczos"
        self._thread = None
        self._stop = threading.Event()
        self._seconds = 0.0
        self._budget_key = None
        self._failure: str | None = None  # why the background estimate died (it is not started again)

    # -- state ------------------------------------------------------------------------------
    def result(self) -> RadiusEstimate | None:
        """The final estimate, or None while it is not finished."""
        return self._final

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    def state(self) -> RadiusState:
        lz = self._lanczos
        final = self._final
        if final is not None:
            return RadiusState("done", final.steps, final.steps, final.mu, final.settled, self._seconds, self._source)
        if self._failure is not None:
            return RadiusState("failed", 0, 0, None, False, self._seconds, self._failure)
        if lz is None:
            return RadiusState("not started", 0, 0, None, False, 0.0, "lanczos")
        return RadiusState("running" if self.running else "paused", lz.steps, lz.max_steps,
                           lz.mu if lz.steps else None, lz.settled, self._seconds, "lanczos")

    # -- computing --------------------------------------------------------------------------
    def _ensure(self, method_sweeps, redo_unsettled: bool) -> bool:
        """Make the Lanczos process if needed; False when the final estimate already serves."""
        if self._final is not None:
            if self._final.settled or not redo_unsettled or self._source != "lanczos":
                return False
            # an unsettled estimate made for SOR is redone for the slow methods, whose longer solves afford it
            self._final = None
            self._lanczos = None
        if self._lanczos is None:
            op = self.operator
            if op.unknowns > coarse_unknowns():
                from relaxtui.solver.coarse import CoarseLanczos

                self._lanczos = CoarseLanczos(op.cls, op.table, op.diag, method_sweeps=method_sweeps)
            else:
                self._lanczos = Lanczos(op.jacobi_apply, op.cls, op.diag, method_sweeps=method_sweeps)
        return True

    def _finish_if_done(self) -> None:
        lz = self._lanczos
        if lz is not None and lz.done and self._final is None:
            self._final = lz.estimate()
            self._source = "lanczos"
            self._lanczos = None  # its vectors (fine: 24 B/cell, two-level: 12) are not needed any more

    def run(self, method_sweeps=_sor_sweeps, *, redo_unsettled: bool = False, max_seconds: float | None = None,
            on_step=None) -> RadiusEstimate | None:
        """Advance in this thread until done (or ``max_seconds``); returns the final estimate or None."""
        import time

        self.pause()
        with self._lock:
            if not self._ensure(method_sweeps, redo_unsettled):
                return self._final
            t0 = time.perf_counter()
            lz = self._lanczos
            if max_seconds is None:
                lz.advance(on_step=on_step)
            else:
                end = t0 + max_seconds
                while not lz.done and time.perf_counter() < end:
                    lz.advance(max_new_steps=1, on_step=on_step)
            self._seconds += time.perf_counter() - t0
            self._finish_if_done()
            return self._final

    def start(self, method_sweeps=_sor_sweeps, *, redo_unsettled: bool = False, threads: int = 1) -> None:
        """Advance in a background thread (``threads`` numba threads for its kernels) until done or paused."""
        import threading

        if self.running or self._failure is not None or self._final is not None and (self._final.settled or not redo_unsettled):
            return
        self._stop.clear()

        def work():
            import time

            import numba

            numba.set_num_threads(max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS)))  # this thread only
            with self._lock:
                t0 = time.perf_counter()
                try:
                    if self._ensure(method_sweeps, redo_unsettled):  # the start vector too is made here
                        self._lanczos.advance(stop=self._stop)
                except Exception as exc:  # noqa: BLE001 - a failed estimate must not end (or flood) the run
                    # the run goes on with the observed factor; the report's omega_note names the failure,
                    # and the job is not restarted chunk after chunk (each start would fail the same way)
                    self._failure = f"{type(exc).__name__}: {exc}"
                    self._lanczos = None
                finally:
                    self._seconds += time.perf_counter() - t0
                self._finish_if_done()

        self._thread = threading.Thread(target=work, name="relaxtui-radius", daemon=True)
        _RUNNING.add(self)
        self._thread.start()

    def affordable(self, remaining_seconds: float, sweep_seconds: float | None) -> bool:
        """Whether the estimate may go on when the run has about ``remaining_seconds`` left.

        Here it runs in its own thread beside the sweeps: always (the driver's own
        rules decide when to start it). A job that takes turns with the sweeps
        (:class:`relaxtui.parallel.group.DistributedRadiusJob`) says no when it
        could not finish before the run ends."""
        return True

    def pause(self) -> None:
        """Stop the background thread after its current step (the Lanczos state is kept)."""
        thread = self._thread
        if thread is not None:
            self._stop.set()
            thread.join()
            self._thread = None

    def discard(self) -> None:
        """Stop the background thread and drop an unfinished estimate's state (its vectors are freed; a
        later run starts the estimate again). For a process that will not run on this operator again."""
        self.pause()
        with self._lock:
            if self._final is None:
                self._lanczos = None

    def wait(self, timeout: float | None = None) -> RadiusEstimate | None:
        """Wait for the background thread to finish (without stopping it); the final estimate or None."""
        thread = self._thread
        if thread is not None:
            thread.join(timeout)
        return self._final

    def raise_to(self, mu: float) -> None:
        """A larger radius implied by an observed factor (Lanczos errs low): the new final estimate, unsettled."""
        self.pause()
        with self._lock:
            steps = self._final.steps if self._final is not None else (self._lanczos.steps if self._lanczos else 0)
            self._final = RadiusEstimate(float(mu), steps, False)
            self._source = "observed factor"
            self._lanczos = None

    # -- on disk ----------------------------------------------------------------------------
    def load(self, path) -> bool:
        """Take a final estimate from a cache file written by :meth:`save` for this operator.

        Anything unreadable, of another version or another operator is ignored (False)."""
        import json
        import math as _math

        try:
            with open(path, encoding="utf-8") as f:
                data = json.load(f)
            if not isinstance(data, dict) or data.get("version") != CACHE_VERSION or data.get("operator") != self.operator.fingerprint():
                return False
            mu, steps, settled = data["mu"], data["steps"], data["settled"]
            if isinstance(mu, bool) or not isinstance(mu, (int, float)) or not (_math.isfinite(mu) and 0.0 <= mu < 1.0):
                return False
            if isinstance(steps, bool) or not isinstance(steps, int) or steps < 0 or not isinstance(settled, bool):
                return False
        except (OSError, ValueError, KeyError, TypeError, UnicodeDecodeError, RecursionError):
            return False
        if not settled:
            return False  # an unsettled estimate is worth redoing (in the background)
        self.pause()
        with self._lock:
            self._final = RadiusEstimate(float(mu), steps, True)
            self._source = "cache"
            self._lanczos = None
        return True

    def save(self, path) -> bool:
        """Write the final Lanczos estimate (settled or not) atomically; False when there is none or on error."""
        final = self._final
        if final is None or self._source != "lanczos":
            return False
        from relaxtui.errors import RelaxError
        from relaxtui.output.atomic import write_json

        data = {"version": CACHE_VERSION, "operator": self.operator.fingerprint(), "mu": final.mu, "steps": final.steps,
                "settled": final.settled, "seconds": round(self._seconds, 3)}
        try:
            write_json(path, data, "radius cache")
        except (OSError, RelaxError):
            return False
        return True


def cache_path(folder, operator):
    """Where the radius of ``operator`` is cached in ``folder`` (the outputs' folder)."""
    from pathlib import Path

    return Path(folder) / f".relaxtui-radius-{operator.fingerprint()[:16]}.json"
