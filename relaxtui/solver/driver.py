"""The solve driver: one run of a method on a case, chunk by chunk.

:class:`Run` owns the working field, the stopping rule and the history. It is
advanced by :meth:`Run.step`, which runs chunks of sweeps for about the time it
is given and returns an immutable :class:`Progress`; a UI worker thread calls
it in a loop (the kernels release the GIL, so the UI stays live), and
:func:`solve` loops over it for the headless command line and the Python API.

Chunks are sized from the measured sweep time so that the checks between
chunks cost under 2 % of the solve, and never longer than the stopping rule's
remaining-sweep estimate allows, so a run does not overshoot its tolerance by
much.
"""

from __future__ import annotations

import math
import threading
import time
from dataclasses import replace

import numpy as np

from relaxtui.case import model
from relaxtui.errors import UsageError
from relaxtui.solver import conditioning, stopping
from relaxtui.solver.history import History, _num  # noqa: F401 - re-exported
from relaxtui.solver.methods import CHUNK_SECONDS, MAX_CHUNK, get_method  # noqa: F401 - CHUNK_SECONDS re-exported
from relaxtui.solver.outcome import FieldExport, Progress, SolveResult, check_outputs, write_outputs  # noqa: F401 - re-exported

MAX_CHUNK_UNSETTLED = 64  # most sweeps in one chunk while the rule has no estimate yet
MAX_OMEGA_CORRECTIONS = 6  # re-estimates of auto omega from the observed factor per run
QUICK_RADIUS_STEPS = 30  # large grids with auto omega: Lanczos steps (beside the sweeps) before omega is set from them
BACKGROUND_DELAY_SECONDS = 1.0  # given omega on a large grid: seconds of sweeping before the estimate starts beside them
BACKGROUND_MIN_SECONDS = 5.0  # ... and only when the run may still go on this long (else it is not worth a core)
RADIUS_SHARE_OF_TIME_LIMIT = 0.25  # with a time limit, the estimate holds the run back for at most this share of it
NEAR_FLOOR_ULPS = 1e4  # single precision: updates below this many float32 roundings of the field's magnitude are
# near its floor (rounding noise of up to ~130 of them measured with SOR at omega 1.9): the rule's scale is then
# refreshed from the field, and the observed factor no longer corrects auto omega
RESCALE_GROWTH = 1.25  # ... refreshed again once the run has done this many times the sweeps of the last refresh


def resolve_options(case: model.Case, method=None, omega=None, tolerance=None, max_sweeps=None, time_limit=None,
                    precision=None):
    """The call's options over the case's [solver] defaults, checked (see :func:`relaxtui.options.resolve`);
    returns (Method, ω or "auto", tolerance, max sweeps, time limit)."""
    from relaxtui.options import resolve

    opts = resolve(dict(method=method, omega=omega, tolerance=tolerance, max_sweeps=max_sweeps, time_limit=time_limit,
                        precision=precision), case.solver)
    return get_method(opts.method), opts.omega, opts.tolerance, opts.max_sweeps, opts.time_limit


class Run:
    """One solve of a case with one method, advanced chunk by chunk.

    ``radius_cache``: a folder (the outputs' folder) where the Jacobi radius of
    the case's operator is cached between processes (see
    :mod:`relaxtui.solver.radius`); ``on_prepare(text)``: called while
    :meth:`prepare` works, with what it is doing and how far (also readable at
    any time, from any thread, as :attr:`preparing`). ``precision``: "double" or "single" (over the
    case's [solver] table): single keeps the working field in float32 for the relaxation methods;
    :attr:`precision` is what the run uses (multigrid and MPI strips stay in double, and
    :attr:`precision_note` says why).
    """

    def __init__(self, case, *, method=None, omega=None, tolerance=None, max_sweeps=None, time_limit=None,
                 initial=None, operator=None, field=None, radius_cache=None, on_prepare=None, precision=None):
        if not isinstance(case, model.Case):
            from relaxtui.case import load_case

            case = load_case(case)
        self.case = case
        from relaxtui.options import resolve

        opts = resolve(dict(method=method, omega=omega, tolerance=tolerance, max_sweeps=max_sweeps, time_limit=time_limit,
                            precision=precision), case.solver)
        self.options = opts
        self.method_info = get_method(opts.method)
        self._omega_request, self.tolerance, self.max_sweeps, self.time_limit = opts.omega, opts.tolerance, opts.max_sweeps, opts.time_limit
        self.method = self.method_info.name
        # the working field's storage: "single" (float32) for the relaxation sweeps of an assembled operator;
        # set again by prepare() (a method or operator without a float32 path runs in double, with a note)
        self.precision_request = opts.precision
        self.precision = opts.precision
        self.precision_note = ""
        self._rescaled_at = 0  # sweeps when the stopping rule's scale was last refreshed from the field (single)
        self.operator = operator
        self._initial = initial
        self._continue = field
        self._radius_cache = radius_cache
        self.on_prepare = on_prepare
        self.history = History()
        self.probe_log = None  # probe values after every chunk (case format v1.1 probes)
        if getattr(case, "probes", ()):
            from relaxtui.output.probes import ProbeLog

            self.probe_log = ProbeLog(case)
        self._cancel = threading.Event()
        self._prepared = False
        self._u = None
        self._stepper = None
        self.omega = 1.0 if self._omega_request == "auto" else float(self._omega_request)
        self.omega_note = "given" if not opts.note else f"auto ({opts.note})"
        self.omega_changes: list[tuple[int, float, str]] = []
        self.mu: float | None = None  # estimated Jacobi radius
        self._radius_note = ""
        self._radius_settled = False  # only a settled estimate guides the stopping rule
        self._radius_pending = False  # an estimate runs (or is to start) in the background
        self._radius_start = (0.0, False)  # (seconds of sweeping before it starts, redo an unsettled one)
        self._provisional = False  # auto ω waits for the first steps of a background estimate
        self._corrections = 0
        self._radius_failure = ""  # why the background estimate died, for the omega note
        self.seconds = 0.0
        self.prepare_seconds = 0.0
        self.status: str | None = None
        self.message = "not started"
        self.preparing = ""  # what prepare() is doing now ("" when idle), and how far
        self._chunk = 1
        self._sweep_seconds = None
        self._recent = (0, 0.0)  # sweeps and seconds of the last step() call
        self.rule: stopping.StoppingRule | None = None
        self.progress = self._progress()

    # -- set-up ----------------------------------------------------------------
    def _stage(self, text: str) -> None:
        self.preparing = text
        if self.on_prepare is not None:
            self.on_prepare(text)

    def prepare(self) -> None:
        """Assemble, load the kernels, choose ω. Idempotent; step() calls it."""
        if self._prepared:
            return
        t0 = self._t_prepare = time.perf_counter()
        if self.operator is None:
            self._stage("assembling the operator")
            from relaxtui.solver.assembled import Operator

            self.operator = Operator(self.case)
        op = self.operator
        dtype = self._field_dtype(op)
        if self._continue is not None:
            self._u = np.array(self._continue, dtype=dtype, copy=True)
            if self._u.shape != tuple(op.padded_shape):
                raise UsageError("the field to continue from belongs to another case")
        else:
            self._u = op.new_field(self._initial) if dtype == np.float64 else op.new_field(self._initial, precision="single")
        self._stage(f"loading the {self.method} kernels")
        self._stepper = self.method_info.make_stepper(op)
        self._upd = np.empty(MAX_CHUNK)
        self._res = np.empty(MAX_CHUNK)
        # compile (or load from cache) before the clock starts
        self._stepper.sweep(self._u, self.omega if self._omega_request != "auto" else 1.0, 0, self._upd, self._res)
        # a stepper may ask for its own rate window and envelope (multigrid: see relaxtui.solver.multigrid)
        self.rule = stopping.StoppingRule(self.tolerance, self.max_sweeps, self.time_limit, scale=self._scale(),
                                          dtype=self._u.dtype, **self._stepper.rule_options)
        conditioning.attach(self.rule, self)  # residual certificate and the field's attainable accuracy (float64 or float32)
        self._choose_omega(self._omega_request)
        self._prepared = True
        self.prepare_seconds = time.perf_counter() - t0
        self.preparing = ""
        self.message = "running"
        self.progress = self._progress()

    def _field_dtype(self, op):
        """float32 for a single-precision run of a relaxation sweep on an assembled operator, else float64
        (setting :attr:`precision` and :attr:`precision_note` to what the run really uses)."""
        if self.precision_request != "single":
            return np.float64
        if self.method_info.kernel is None:
            self.precision = "double"
            self.precision_note = (f"single precision applies to the relaxation methods; {self.method} keeps its "
                                   "field and levels in float64")
            return np.float64
        if not getattr(op, "single_precision", False):
            self.precision = "double"
            self.precision_note = "single precision is not available on this operator (MPI strips): the field is float64"
            return np.float64
        self.precision = "single"
        self.precision_note = ("field stored in float32; sweeps compute in float64 and round on store; residuals, "
                               "flows and the report accumulate in float64")
        return np.float32

    def _scale(self) -> float:
        """Largest |value| of the starting field's interior and fixed cells and of the boundary values."""
        return self._field_magnitude() or 1.0

    def _lower_scale(self) -> bool:
        """After a stall at the rounding floor: when the scale came from a start far larger than the field is now
        (an initial field in other units, 1e300 where the answer is 100), lower the rule's scale to the present
        field and boundary values and say True (the caller decides again).

        The rounding errors of the early sweeps were of the start's size, but each is damped by the sweeps after
        it like any other error; what is left at a fixed point is the rounding of the present field
        (conditioning.rounding_floor). The residual certificate does not depend on the scale."""
        if self.rule is None or not self._prepared:
            return False
        now = self._field_magnitude()
        if not (math.isfinite(now) and 0.0 < now and 2.0 * now < self.rule.scale):
            return False
        self.rule.scale = now
        return True

    def _field_magnitude(self) -> float:
        """Largest |value| of the working field's interior and fixed cells and of the boundary values (0 if all 0)."""
        if hasattr(self.operator, "field_scale"):  # an operator split across MPI ranks reduces it itself
            scale = self.operator.field_scale(self._u)
        else:
            # the working array holds 0 in every other cell, so its extremes are those of the
            # interior and fixed cells (two passes, no 16-byte-per-cell temporaries)
            hi, lo = float(self._u.max()), float(self._u.min())
            if math.isfinite(hi) and math.isfinite(lo) and (self.operator.unknowns or hi or lo):
                scale = max(hi, -lo)
            else:  # a working array with non-finite cells outside the domain: look at the domain only
                view = self.operator.view(self._u)
                kinds = self.case.kind_codes()[self.case.codes]
                vals = view[(kinds == model.INTERIOR) | (kinds == model.FIXED)]
                scale = float(np.max(np.abs(vals))) if vals.size else 1.0
        for r in self.case.regions:
            for v in (r.value, r.ambient):
                if v is not None:
                    scale = max(scale, abs(v))
        return scale

    # -- the Jacobi radius -------------------------------------------------------
    def _wants_radius(self, request) -> bool:
        """Auto ω from the radius, or Young's factor for the stopping rule."""
        m = self.method_info
        return (request == "auto" and m.needs_radius) or m.factor is not None

    def _method_sweeps(self, mu: float) -> float:
        m = self.method_info
        if m.factor is None:
            from relaxtui.solver.young import sor_sweeps

            return sor_sweeps(mu)
        return 9.2 / max(1.0 - m.factor(mu, m.auto(mu)), 1e-300)

    def _cache_file(self):
        from relaxtui.solver.radius import BACKGROUND_UNKNOWNS

        if self._radius_cache is None or self.operator.unknowns <= BACKGROUND_UNKNOWNS:
            return None  # small grids: recomputing is quicker than a file
        from relaxtui.solver.radius import cache_path

        return cache_path(self._radius_cache, self.operator)

    def _radius(self, request) -> None:
        """Get the estimate: at once on small grids; on large ones beside the sweeps (auto ω starts
        from the estimate so far and is set again as it grows). Sets ``mu`` (None while nothing is known)."""
        from relaxtui.solver import radius

        m = self.method_info
        job = self.operator.radius_job()
        if self._radius_pending:  # running beside the sweeps: take what it has so far
            state = job.state()
            if state.mu is not None and (self.mu is None or state.mu > self.mu):
                self.mu = state.mu
                self._radius_note = state.describe() + ", continued beside the sweeps"
            return
        if self.mu is not None:
            return
        cache = self._cache_file()
        if cache is not None and job.result() is None:
            job.load(cache)
        redo = not m.needs_radius  # an unsettled estimate made for SOR is redone for the slow methods

        def show(lz):
            self._stage(radius.RadiusState("running", lz.steps, lz.max_steps, lz.mu, lz.settled, 0.0, "lanczos").describe())

        budget = None  # seconds the estimate may hold the run back (None: until done)
        cut = ""
        if self.time_limit is not None:
            # the time limit covers the whole run: the set-up's estimate gets a share of it, then goes on beside the sweeps
            budget = max(0.0, RADIUS_SHARE_OF_TIME_LIMIT * self.time_limit - (time.perf_counter() - self._t_prepare))
            cut = f", cut to {budget:.2g} s by the time limit {self.time_limit:g} s"
        if self.operator.unknowns <= radius.BACKGROUND_UNKNOWNS:
            est = job.run(self._method_sweeps, redo_unsettled=redo, max_seconds=budget, on_step=show)
        else:
            est = job.result() if (job.result() is not None and (job.result().settled or not redo)) else None
        if est is None:
            # auto ω waits for it: at once; a given ω only refines the rule's floor: after a while, so that
            # short runs sweep at full speed (the estimate takes a core while it runs)
            self._provisional = request == "auto" and m.needs_radius  # ω from the first steps, before the final estimate
            self._radius_start = (0.0 if self._provisional else BACKGROUND_DELAY_SECONDS, redo)
            if self._radius_start[0] <= self.seconds:
                job.start(self._method_sweeps, redo_unsettled=redo)
            self._radius_pending = True
            state = job.state()
            self.mu = state.mu
            self._radius_settled = False
            self._radius_note = state.describe() + f"{cut}, continued beside the sweeps"
            return
        self._take_radius(est, job.state().describe())
        if cache is not None:
            job.save(cache)

    def _take_radius(self, est, note: str) -> None:
        self.mu, self._radius_settled, self._radius_note = est.mu, est.settled, note
        self._radius_pending = False

    def _poll_radius(self) -> None:
        """Between chunks: take a background estimate that has just finished."""
        job = self.operator.radius_job()
        est = job.result()
        if est is None and job.state().stage == "failed":
            # the estimate died (it is not restarted): ω and the rule go on from the factor the sweeps show,
            # starting at the trivial bound radius 0 (ω = 1) that the observed factor then raises
            self._radius_pending = self._provisional = self._radius_settled = False
            self._radius_failure = job.state().describe()
            self._radius_note = f"{self._radius_failure}; the observed factor sets omega"
            if self.mu is None:
                self.mu = 0.0
            if self._omega_request == "auto" and self.method_info.needs_radius:
                self.omega_note = ""
                self._choose_omega("auto")
            return
        if est is None:
            delay, redo = self._radius_start
            left = self._remaining_seconds()
            # auto ω waits for the estimate; a given ω only if it can finish (a job taking turns with the sweeps)
            fits = (self._omega_request == "auto" and self.method_info.needs_radius) or job.affordable(left, self._sweep_seconds)
            if not job.running and self.seconds >= delay and fits and (self._provisional or left >= BACKGROUND_MIN_SECONDS):
                job.start(self._method_sweeps, redo_unsettled=redo)
            elif job.running and not fits:
                job.pause()  # it would only hold the sweeps back: they go first
            state = job.state()
            if self._provisional and state.steps >= QUICK_RADIUS_STEPS and self._omega_request == "auto":
                self._provisional = False  # auto ω from the estimate so far (it errs low: ω below the optimum)
                if self.mu is None or (state.mu is not None and state.mu > self.mu):
                    self.omega_note = ""
                    self._choose_omega("auto")
            return
        cache = self._cache_file()
        if cache is not None:
            job.save(cache)
        old = self.mu
        sweeps = self.rule.sweeps
        self._take_radius(est, f"{job.state().describe()}, ready at sweep {sweeps}")
        m = self.method_info
        if self._omega_request == "auto" and m.needs_radius:
            if old is None or est.mu > old:
                self.omega_note = ""
                self._choose_omega("auto")
            else:
                self.mu = old  # the radius in use (raised from the observed factor) is the larger
        else:
            # given ω: the rule gets Young's factor as its floor from here on (more conservative, no restart)
            prior, gap = self._prior()
            self.rule.prior_factor, self.rule.prior_gap = prior, gap
            self.omega_note = f"given; {self._radius_note}"

    def _remaining_seconds(self) -> float:
        """How long the run may still go on: its sweep limit, the rule's prediction and the time limit."""
        if self._sweep_seconds is None:
            return math.inf
        left = self.max_sweeps - self.rule.sweeps
        eta = self.rule.last.eta_sweeps
        if eta is not None and math.isfinite(self.rule.last.estimated_error):
            left = min(left, eta)
        secs = left * self._sweep_seconds
        if self.time_limit is not None:
            secs = min(secs, self.time_limit - self.prepare_seconds - self.seconds)
        return secs

    def _prior(self):
        from relaxtui.solver.young import sor_smooth_gap

        m = self.method_info
        prior = gap = None
        if self.mu is not None and m.factor is not None and self._radius_settled:
            prior = m.factor(self.mu, self.omega)
            gap = sor_smooth_gap(self.mu, self.omega) if m.needs_radius else None
            if prior >= 1.0:
                prior = gap = None  # no convergence predicted (e.g. over-weighted Jacobi): measure only
        return prior, gap

    def _choose_omega(self, request) -> None:
        """Set ω (a number or "auto") and restart the stopping rule's measurement.

        The Jacobi radius is estimated for every method with a theoretical
        factor, also when ω is given: Young's relations then give the rule the
        method's asymptotic factor and, above the optimal ω, the smooth modes'
        |λ - 1| (see stopping.estimates). While the estimate is missing or
        unsettled the rule measures the factor alone (the conservative path).
        """
        m = self.method_info
        if self._wants_radius(request):
            self._radius(request)
        if request == "auto":
            if m.needs_radius:
                self.omega = m.auto(self.mu if self.mu is not None else 0.0)
                if not self.omega_note.startswith("auto: Jacobi radius raised"):
                    self.omega_note = f"auto: {self._radius_note}, omega = {m.auto_note}"
            else:
                self.omega = m.auto(self.mu)
                if not self.omega_note.startswith("auto ("):
                    self.omega_note = ("auto: 1 (the best weight for this method on a red-black-coupled grid)"
                                       if m.factor is not None else f"auto: {self.omega:g} (the method's default)")
        else:
            self.omega = float(request)
            self.omega_note = "given" if not self._radius_pending else f"given; {self._radius_note}"
        prior, gap = self._prior()
        # SOR near ω = 2 wanders for many sweeps before it settles: never call that a stall
        stall = int(20.0 / max(2.0 - self.omega, 1e-6)) if m.needs_radius else 0
        self.rule.restart(prior_factor=prior, prior_gap=gap, stall_window=stall)
        self.omega_changes.append((self.rule.sweeps, self.omega, self.omega_note))

    def set_omega(self, omega) -> None:
        """Change ω mid-run (a number in (0, 2) or "auto"); recorded in history and report."""
        from relaxtui.options import check_omega_for

        omega = check_omega_for(self.method, omega)
        self._omega_request = omega
        if self._prepared and not self.done:
            self._choose_omega(omega)
            self.progress = self._progress()
        elif not self._prepared:
            self.omega = 1.0 if omega == "auto" else float(omega)

    def cancel(self) -> None:
        """Ask the run to stop; the next step() ends it with status "cancelled"."""
        self._cancel.set()

    @property
    def done(self) -> bool:
        return self.status is not None

    @property
    def field(self) -> np.ndarray:
        if self._u is None:
            self.prepare()
        return self._u

    def view(self) -> np.ndarray:
        return self.operator.view(self.field)

    @property
    def stepper_info(self) -> dict | None:
        """What the method's stepper reports about itself (e.g. multigrid levels), or None."""
        return self._stepper.info if self._prepared else None

    @property
    def background(self) -> str:
        """What runs beside the sweeps ("" when nothing): the radius estimate and how far it is."""
        if not self._radius_pending or self.operator is None:
            return ""
        return self.operator.radius_job().state().describe()

    # -- stepping --------------------------------------------------------------
    def step(self, max_seconds: float = 0.25) -> Progress:
        """Run chunks for about ``max_seconds`` (at least one); returns the progress."""
        if self.done:
            return self.progress
        self.prepare()
        t_end = time.perf_counter() + max_seconds
        done_sweeps, done_seconds = 0, 0.0
        while True:
            if self._cancel.is_set():
                self._finish(stopping.CANCELLED)
                break
            if self._radius_pending:
                self._poll_radius()
            n = self._chunk_size()
            t0 = time.perf_counter()
            k = self._stepper.sweep(self._u, self.omega, n, self._upd, self._res)
            dt = time.perf_counter() - t0
            first = self.rule.sweeps
            if (self.precision == "single" and k and self._near_floor(float(self._upd[k - 1]))
                    and first + k >= RESCALE_GROWTH * self._rescaled_at):
                self._rescaled_at = first + k  # two passes over the field: not after every chunk
                self.rule.rescale(max(float(self._u.max()), -float(self._u.min())))
            self.rule.add(self._upd[:k])
            self.seconds += dt
            done_sweeps += k
            done_seconds += dt
            if k:
                self._sweep_seconds = dt / k
                sweeps = np.arange(first + 1, first + k + 1)
                secs = self.seconds - dt + dt * np.arange(1, k + 1) / k
                errs = self.rule.recent_errors(k)
                self.history.extend(sweeps, secs, self._res[:k], errs, np.full(k, self.omega))
                if self.probe_log is not None:
                    # an operator split across MPI ranks reads the probe cells on their ranks
                    cells = getattr(self.operator, "cells_at", None)
                    self.probe_log.record(self.rule.sweeps, self.seconds, self._u,
                                          None if cells is None else (lambda r, c: cells(self._u, r, c)))
            # the time limit covers the whole run, set-up included
            decision = self.rule.decide(self.prepare_seconds + self.seconds, cancelled=self._cancel.is_set())
            if decision.status == stopping.STALLED and self._lower_scale():
                decision = self.rule.decide(self.prepare_seconds + self.seconds, cancelled=self._cancel.is_set())
            if decision.status is None and k < n:
                decision = replace(decision, status=stopping.DIVERGED)
            if decision.status is None:
                self._maybe_correct_omega()
            if decision.status is not None:
                self._finish(decision.status)
                break
            if time.perf_counter() >= t_end:
                break
        self._recent = (done_sweeps, done_seconds)
        self.progress = self._progress()
        return self.progress

    def _chunk_size(self) -> int:
        multiple = self._stepper.chunk_multiple
        if self._sweep_seconds is None:
            n = multiple  # the first chunk times a sweep: as short as it can be
        else:
            n = int(CHUNK_SECONDS / max(self._sweep_seconds, 1e-9))
        d = self.rule.last
        cap = MAX_CHUNK_UNSETTLED
        if d.eta_sweeps is not None and math.isfinite(d.estimated_error):
            # half the predicted remainder, so the run cannot overshoot its tolerance by much
            cap = int(min(MAX_CHUNK, max(4, d.eta_sweeps / 2)))
        remaining = self.max_sweeps - self.rule.sweeps
        # a stepper whose every step gains a lot (a multigrid cycle) may cap its chunks
        n = max(1, min(n, cap, int(0.25 * self.rule.sweeps) + 16, remaining, self._stepper.max_chunk))
        return n - n % multiple if n >= multiple else n

    def _near_floor(self, update: float) -> bool:
        """Whether an update is within NEAR_FLOOR_ULPS roundings of the field (its type's epsilon) of nothing."""
        return update <= NEAR_FLOOR_ULPS * self.rule.eps * self.rule.scale

    def _maybe_correct_omega(self) -> None:
        """Auto ω: if SOR converges clearly slower than Young predicts, the radius was low."""
        m = self.method_info
        if (self._omega_request != "auto" or self.mu is None or self._corrections >= MAX_OMEGA_CORRECTIONS
                or m.invert is None or m.factor is None):
            return
        if self.precision == "single" and len(self.rule.updates) and self._near_floor(float(self.rule.updates[-1])):
            return  # float32's rounding noise slows the measured decay: it says nothing about the radius
        est = self.rule.last_estimate
        predicted = m.factor(self.mu, self.omega)
        meas = est.measured
        if not est.mature or meas is None or not 0.0 < meas < 1.0:
            return
        seg_len = self.rule.sweeps - self.omega_changes[-1][0]
        if seg_len < 10.0 / max(1.0 - predicted, 1e-12):
            return  # too early: near the optimum SOR decays like k·(ω-1)^k for a long while
        if (1.0 - meas) >= 0.5 * (1.0 - predicted):
            return
        mu_new = m.invert(meas, self.omega)
        if mu_new <= self.mu:
            return
        self._corrections += 1
        old = self.mu
        self.mu = mu_new
        self._radius_pending = False  # the observed factor outranks a Lanczos estimate still running (it errs low)
        self.operator.radius_job().raise_to(mu_new)
        self.omega_note = (f"auto: Jacobi radius raised {old:.6f} -> {mu_new:.6f} from the observed SOR factor "
                           f"{meas:.6f} (Young's relation), omega = 2/(1+sqrt(1-radius^2))")
        if self._radius_failure:
            self.omega_note += f" ({self._radius_failure})"
        self._choose_omega("auto")

    def _finish(self, status: str) -> None:
        self.status = status
        self.message = self._describe(status)
        if self._radius_pending:
            job = self.operator.radius_job()
            job.pause()  # the Lanczos state is kept: a later run on this operator resumes it
            self._radius_pending = False
            if job.result() is not None:
                cache = self._cache_file()
                if cache is not None:
                    job.save(cache)  # for the next run; this one ended without it
            state = job.state()
            how = "not started: a short run sweeps at full speed" if state.stage == "not started" else state.describe()
            note = f"the Jacobi radius estimate was not ready before the run ended ({how}); the stopping rule measured the factor alone"
            self.omega_note = f"given; {note}" if self._omega_request != "auto" else f"{self.omega_note}; {note}"
        self._stepper.release()  # a stepper's own buffers are not needed any more

    # -- reporting -------------------------------------------------------------
    def _describe(self, status: str | None) -> str:
        d = self.rule.last if self.rule else None
        unit = f" {self.case.unit}" if self.case.unit else ""
        tol = f"{self.tolerance:.3g}{unit}"
        err = "not yet estimable" if d is None or not math.isfinite(d.estimated_error) else f"{d.estimated_error:.2g}{unit}"
        n = _group(self.rule.sweeps if self.rule else 0)
        above = f"{err} > {tol}"
        if d is not None and math.isfinite(d.estimated_error) and d.estimated_error <= self.tolerance:
            # a run that stops unconverged with an estimate under the tolerance: the estimate was not trusted
            # (its decay rate had not settled, or the residual certificate refused it), so no ">" is claimed
            above = f"{err} (not certified; tolerance {tol})"
        if status == stopping.CONVERGED:
            return f"equilibrium reached: estimated error {err} <= {tol} after {n} sweeps"
        if status == stopping.STALLED:
            if self.rule.reason:
                return f"stalled after {n} sweeps: {self.rule.reason}"
            if self.rule.at_floor():
                return (f"stalled after {n} sweeps: the updates are at {self.rule.float_name}'s rounding floor while the "
                        f"estimated error {above} (the tolerance is below what this grid resolves)")
            return f"stalled after {n} sweeps: no progress over a long window, estimated error {above}"
        if status == stopping.DIVERGED:
            return f"diverged after {n} sweeps at omega {self.omega:.4g}: the field grows without bound"
        if status == stopping.SWEEP_LIMIT:
            return f"sweep limit {n} reached: estimated error {above}"
        if status == stopping.TIME_LIMIT:
            return f"time limit {self.time_limit:g} s reached after {n} sweeps: estimated error {above}"
        if status == stopping.CANCELLED:
            return f"cancelled after {n} sweeps: estimated error {err} (tolerance {tol})"
        if not self._prepared:
            return "preparing"
        eta = "" if d is None or d.eta_sweeps is None else f", about {_group(int(d.eta_sweeps))} sweeps to go"
        return f"running: estimated error {err}, tolerance {tol}{eta}"

    def _progress(self) -> Progress:
        d = self.rule.last if self.rule else stopping.Decision(None, math.inf, None, None)
        last_res = float(self.history.residual[-1]) if len(self.history) else math.nan
        sw, secs = self._recent
        cells = getattr(self.operator, "cells_streamed", 0) if self.operator is not None else 0
        mcells = cells * sw / secs / 1e6 if secs > 0 else 0.0
        eta_s = None
        if d.eta_sweeps is not None and self._sweep_seconds:
            eta_s = d.eta_sweeps * self._sweep_seconds
        return Progress(
            sweeps=self.rule.sweeps if self.rule else 0,
            seconds=self.seconds,
            residual=last_res,
            estimated_error=d.estimated_error,
            factor=d.factor,
            eta_sweeps=d.eta_sweeps,
            eta_seconds=eta_s,
            mcells_per_s=mcells,
            omega=self.omega,
            omega_note=self.omega_note,
            method=self.method,
            tolerance=self.tolerance,
            status=self.status,
            message=self.message if self.status else self._describe(None),
            background=self.background,
        )

    def result(self) -> SolveResult:
        """Finish the run (cancelled if still going) and build field, report and history."""
        self.prepare()
        if not self.done:
            self._finish(stopping.CANCELLED)
            self.progress = self._progress()
        from relaxtui.output.report import build_report

        if hasattr(self.operator, "export_rows"):
            # the exported field is made only if a caller asks for it: the report reads the working
            # array, the .npy is written from it in strips (no second full-size array)
            export = FieldExport(self.operator, self._u)
            report = build_report(self, export)
            return SolveResult(report=report, history=self.history.copy(), case=self.case, probes=self.probe_log,
                               export=export)
        field = self.operator.finish(self._u)  # an operator split across MPI ranks gathers it
        report = build_report(self, field)
        return SolveResult(field=field, report=report, history=self.history.copy(), case=self.case, probes=self.probe_log)


def _group(n: int) -> str:
    from relaxtui.output.text import group

    return group(n)


def solve(case, method=None, omega=None, tolerance=None, max_sweeps=None, time_limit=None,
          initial=None, on_progress=None, cancel_event=None, precision=None) -> SolveResult:
    """Solve a case to its tolerance.

    Parameters
    ----------
    case : Case or path
        A loaded case or the path of its TOML file.
    method, omega, tolerance, max_sweeps, time_limit
        Override the case's ``[solver]`` table (see :func:`resolve_options`).
    initial : ndarray, optional
        (rows, cols) float64 starting field; NaN allowed outside the domain.
    on_progress : callable(Progress), optional
        Called after every step (about four times a second).
    cancel_event : threading.Event, optional
        Set it from another thread to stop; the result then has status
        ``cancelled`` and the field reached so far.
    precision : "double" or "single", optional
        The working field's storage (over the case's ``[solver]`` table;
        default double). Single stores the field in float32 for the
        relaxation methods; the exported field is float64 either way.

    Returns
    -------
    SolveResult
        ``field`` (rows, cols) float64 with NaN outside the domain, ``report``
        (the contract's keys), ``history``.
    """
    run = Run(case, method=method, omega=omega, tolerance=tolerance, max_sweeps=max_sweeps,
              time_limit=time_limit, initial=initial, precision=precision)
    run.prepare()
    while not run.done:
        if cancel_event is not None and cancel_event.is_set():
            run.cancel()
        progress = run.step(0.25)
        if on_progress is not None:
            on_progress(progress)
    return run.result()
