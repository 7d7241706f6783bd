"""Rank 0 leads, the other ranks follow: the distributed operator and the follower loop.

Rank 0 runs the ordinary driver (:class:`relaxtui.solver.driver.Run`) with a
:class:`DistributedOperator` in place of the single-process operator. Every
method of that operator the driver calls (``new_field``, ``sweep``,
``residual``, ``flows``, ``finish`` and the hooks ``field_scale``,
``estimate_radius`` and ``field_summary``) first broadcasts a short command, then does its own
strip's share of the collective work; the followers (:func:`follow`) wait
for the command without spinning and do theirs. So all decisions (chunk
sizes, ω, the stopping rule, time limit, interruption) are taken once, on
rank 0, from global quantities, and the ranks cannot disagree.

Validation (options, ranges, the initial field) happens on rank 0 *before*
a command is sent: a user error then leaves the followers idle, rank 0 tells
them to stop with the error's exit code, and the job ends with the ordinary
one-line message. An exception while the ranks are inside a collective
aborts the job (see :mod:`relaxtui.parallel.comm`).
"""

from __future__ import annotations

import functools
import inspect
from contextlib import contextmanager

import numpy as np

from relaxtui.errors import UsageError
from relaxtui.parallel.comm import quiet_wait
from relaxtui.parallel.strip import Strip, split_rows
from relaxtui.solver.radius import Lanczos, RadiusJob, RitzRule

DISTRIBUTED_METHODS = ("jacobi", "red-black-sor")  # relaxation sweeps by strips (the operator's ``sweep``)
STEPPED_METHODS = ("multigrid",)  # methods with a stepper of their own across ranks (relaxtui.parallel.multigrid)
(SETUP, NEW_FIELD, SWEEP, RESIDUAL, FLOWS, EXPORT, LANCZOS_BEGIN, LANCZOS_ADVANCE, SCALE, SUMMARY, STOP, MG_SETUP, MG_SWEEP,
 MG_RELEASE, CELLS) = range(1, 16)
MG_NORM = 40  # multigrid's norm of the inverse (numbered apart from the list above)
TAG_META, TAG_CLS, TAG_CODES, TAG_INITIAL, TAG_WIDE = 31, 32, 33, 34, 35
COARSE_BEGIN, COARSE_ADVANCE, COARSE_RELEASE = 41, 42, 43  # the two-level radius estimate (relaxtui.parallel.coarse)
MG_BOUND = 44  # multigrid's weighted residual bound (a command code of its own: tests/test_mpi.py checks they differ)
STOP_CHECK = 64  # the stop-signal agreement (relaxtui.parallel.stop), numbered apart from the commands above


def refusal(method: str) -> str:
    """Why ``method`` is not run across ranks, and what to use instead (one line)."""
    if method in ("gauss-seidel", "sor", "symmetric-sor"):
        return (f"{method} does not run across MPI ranks: its lexicographic order makes every row wait for the one "
                "above; use red-black-sor (the same equations in a parallel order) or jacobi under mpiexec, "
                f"or run {method} without mpiexec")
    return (f"{method} does not run across MPI ranks in this version; use multigrid, red-black-sor or jacobi under "
            f"mpiexec, or run {method} without mpiexec")


def sweep_arguments(omega, sweeps) -> tuple[float, int]:
    """ω and the sweep count of a sweep command, checked on rank 0 before the command is sent."""
    omega = float(omega)
    if not 0.0 < omega < 2.0:
        raise UsageError(f"omega must lie in (0, 2), got {omega}")
    if isinstance(sweeps, bool) or not isinstance(sweeps, (int, np.integer)) or sweeps < 0:
        raise UsageError(f"sweeps must be a whole number >= 0, got {sweeps!r}")
    return omega, int(sweeps)


class Group:
    """Rank 0's end of the command channel."""

    def __init__(self, comm):
        self.comm = comm
        self.busy = False  # inside a collective: an error now must abort the job
        self.stopped = False

    def send(self, code: int, *args: float) -> None:
        buf = np.zeros(4)
        buf[0] = code
        buf[1 : 1 + len(args)] = args
        self.comm.Ibcast(buf, root=0).Wait()

    @contextmanager
    def collective(self, code: int, *args: float):
        self.send(code, *args)
        self.busy = True
        yield
        self.busy = False

    def check_stop(self, writing: bool = False) -> int:
        """Agree with every rank on the stop signals (one collective command, :func:`relaxtui.parallel.stop.agree`);
        returns the agreed signal (0: none), which is then also in rank 0's handler state. ``writing``: the
        outputs are about to be written, every rank ignores further signals from now on. A repeated signal
        on any rank before the writing raises KeyboardInterrupt here (stop at once, without writing)."""
        from relaxtui.parallel import stop

        with self.collective(STOP_CHECK, float(writing)):
            signum, repeats = stop.agree(self.comm)
        if repeats and not writing:
            raise KeyboardInterrupt
        return signum

    def stop(self, exit_code: int) -> None:
        """Tell the followers to return ``exit_code`` (once; only while they are idle)."""
        if not self.stopped and not self.busy:
            self.stopped = True
            self.send(STOP, exit_code)


def _wait_command(comm) -> np.ndarray:
    buf = np.zeros(4)
    quiet_wait(comm.Ibcast(buf, root=0))
    return buf


def _band(op, bounds, a: int, b: int) -> tuple[int, int]:
    """Rows [S, T) of the multigrid set-up band of strip [a, b) (see relaxtui.parallel.multigrid.bands)."""
    from relaxtui.parallel import multigrid as pm

    return pm.bands(a, b, op.shape[0], pm.split_depth(bounds, op.shape, pm.gather_cells()), pm.MARGIN)


def _wide(op, bounds, a: int, b: int) -> tuple[np.ndarray, int, int]:
    """The class codes of the set-up band of strip [a, b), padded with rows of zeros (the band's own
    edges are outside it), and the band's rows (S, T)."""
    S, T = _band(op, bounds, a, b)
    wide = op.cls[S : T + 2].copy()
    wide[0] = 0
    wide[-1] = 0
    return wide, S, T


def _part(op, case, a: int, b: int, bounds, multigrid: bool) -> tuple[dict, np.ndarray, np.ndarray]:
    from relaxtui.parallel import multigrid as pm

    rows, cols = op.shape
    meta = {
        "a": a, "b": b, "rows": rows, "cols": cols, "cls_dtype": op.cls.dtype.str, "bounds": bounds,
        "per_cell": bool(getattr(getattr(op, "physics", None), "per_cell", False)),
        "wide": _band(op, bounds, a, b) if multigrid else None,
        "gather_cells": pm.gather_cells() if multigrid else None,  # rank 0's, so that all ranks split alike
        "up_codes": case.codes[a - 1].copy() if a > 0 else None,
        "dn_codes": case.codes[b].copy() if b < rows else None,
        "table": op.table, "diag": op.diag, "kind": op.kind, "value": op.value, "conductivity": op.conductivity,
        "fixed_conductivity": op.fixed_conductivity, "flux": op.flux, "coefficient": op.coefficient,
        "ambient": op.ambient, "boundary": op._boundary, "cell_size": op.cell_size, "regions": case.regions,
    }
    return meta, op.cls[a : b + 2], op.codes[a:b]


def _receive_part(comm) -> dict:
    meta = comm.recv(source=0, tag=TAG_META)
    n = meta["b"] - meta["a"]
    cls = np.empty((n + 2, meta["cols"] + 2), dtype=np.dtype(meta["cls_dtype"]))
    comm.Recv(cls, source=0, tag=TAG_CLS)
    codes = np.empty((n, meta["cols"]), dtype=np.uint8)
    comm.Recv(codes, source=0, tag=TAG_CODES)
    meta["cls"], meta["codes"] = cls, codes
    if meta["wide"] is not None:
        S, T = meta["wide"]
        wide = np.empty((T - S + 2, meta["cols"] + 2), dtype=cls.dtype)
        comm.Recv(wide, source=0, tag=TAG_WIDE)
        meta["wide"] = (wide, S, T)
    return meta


class _WouldCompile(Exception):
    """A kernel is not in numba's disk cache (raised instead of compiling it: see :func:`_load_only`)."""


@contextmanager
def _load_only():
    """While held, a kernel call that would compile (its signature is not in numba's disk cache) raises
    :class:`_WouldCompile` instead: numba announces a compile ("numba:compile" event) only after its cache
    lookup missed, and before it compiles."""
    from numba.core import event

    class Refuse(event.Listener):
        def on_start(self, ev):
            raise _WouldCompile(str(ev.data.get("dispatcher", "")) if isinstance(ev.data, dict) else "")

        def on_end(self, ev):
            pass

    with event.install_listener("numba:compile", Refuse()):
        yield


def warm_in_turn(comm, warm, pause: str = "operator-warm") -> None:
    """Every rank loads or compiles the kernels (``warm()``), so that a cold cache compiles them once: rank 0
    loads or compiles them; the other ranks meanwhile load what the cache already has, and stop at the first
    kernel that is not there (it would compile a second time, beside rank 0: with a cold cache every rank
    compiled, 16-19 s each for 4 ranks against 5 s for one process). Those wait (sleeping) until rank 0 is
    done and then load the rest from the cache. With a warm cache all ranks load at once (they loaded one
    after the other before, rank 0 waiting for the others' turn). A stop signal cuts it short: a rank that
    has one skips the rest of its kernels (:func:`relaxtui.parallel.stop.point` between them), and the
    agreements that replace the barriers then raise :class:`relaxtui.parallel.stop.Stopped` on every rank.
    ``pause``: rank 0's test pause point before it warms (RELAXTUI_TEST_PAUSE_AT, tests/test_signals.py)."""
    from relaxtui.output.atomic import pause_for_tests
    from relaxtui.parallel import stop

    def warm_unless_stopped():
        try:
            if comm.Get_rank() == 0:
                pause_for_tests(pause)
            stop.point()
            warm()
        except stop.Stopped:
            pass  # the agreement below stops every rank

    if comm.Get_rank() == 0:
        warm_unless_stopped()
        stop.agree(comm, raise_stopped=True)
    else:
        try:
            with _load_only():
                warm_unless_stopped()
            complete = True
        except _WouldCompile:
            complete = False
        stop.agree(comm, raise_stopped=True)  # rank 0 has loaded or compiled every kernel
        if not complete:
            warm_unless_stopped()  # the ones loaded already are not loaded again
    stop.agree(comm, raise_stopped=True)


class DistributedOperator:
    """The operator interface of :class:`relaxtui.solver.assembled.Operator`, over strips on all ranks.

    Built on rank 0 from a loaded case: assembles the case once (every check
    of the single-process operator runs, with its messages), cuts the rows
    into strips of about equal unknown count, sends every rank its strip of
    the class array and region picture, and keeps only its own strip. The
    working array the driver holds is rank 0's strip; :meth:`view` is that
    strip's rows, not the whole grid.
    """

    def __init__(self, case, group: Group, threads: int, multigrid: bool = False):
        from relaxtui.solver.assembled import Operator

        comm = group.comm
        ranks = comm.Get_size()
        from relaxtui.parallel.comm import alone

        with alone():  # the other ranks sleep while rank 0 assembles the whole grid's operator once
            op = Operator(case)
        rows, cols = op.shape
        if rows < ranks:
            raise UsageError(f"the grid has {rows} rows, fewer than the {ranks} MPI ranks: start at most {rows} ranks")
        if multigrid:
            from relaxtui.solver.multigrid import COARSEST_UNKNOWNS, DIRECT_UNKNOWNS

            if op.unknowns <= min(COARSEST_UNKNOWNS, DIRECT_UNKNOWNS) or rows < 2 * ranks:
                raise UsageError(f"multigrid across {ranks} MPI ranks needs at least {2 * ranks} rows and more than "
                                 f"{min(COARSEST_UNKNOWNS, DIRECT_UNKNOWNS)} unknowns (this grid: {rows} rows, "
                                 f"{op.unknowns} unknowns); run it without mpiexec")
        self.case = case
        self.group = group
        self.shape = op.shape
        self.unknowns = op.unknowns
        self.cells_streamed = op.cells_streamed
        self.classes = op.classes
        self.cell_size = op.cell_size
        self.depth = op.depth
        self.kind = op.kind
        self.interior = op.interior
        self.source = op.source
        self.region_cells = op.region_cells
        self.guess = op.default_guess()
        self._fingerprint = op.fingerprint()
        self._radius = None
        # per-class weights (small) for the stopping rule's checks, and the exact norm of the
        # inverse where it is cheap (relaxtui.solver.conditioning), while the whole operator is here
        from relaxtui.solver.conditioning import exact_inverse_norm

        self.table, self.diag = op.table, op.diag
        exact = exact_inverse_norm(op) if np.all(np.isfinite(op.table)) and np.all(np.isfinite(op.diag)) else None
        self.inverse_norm = (exact, "exact") if exact is not None else None
        self.threads = threads
        self.bounds = split_rows(np.count_nonzero(op.cls[1:-1], axis=1), ranks)
        if multigrid and min(b - a for a, b in self.bounds) < 2:
            self.bounds = split_rows(np.ones(rows), ranks)  # every strip needs two rows for the transfers' halo
        group.send(SETUP)
        group.busy = True
        for r in range(1, ranks):
            meta, cls, codes = _part(op, case, *self.bounds[r], self.bounds, multigrid)
            comm.send(meta, dest=r, tag=TAG_META)
            comm.Send(cls, dest=r, tag=TAG_CLS)
            comm.Send(codes, dest=r, tag=TAG_CODES)
            if multigrid:
                comm.Send(_wide(op, self.bounds, *self.bounds[r])[0], dest=r, tag=TAG_WIDE)
        meta, cls, codes = _part(op, case, *self.bounds[0], self.bounds, multigrid)
        meta["cls"], meta["codes"] = cls.copy(), codes
        if multigrid:
            meta["wide"] = _wide(op, self.bounds, *self.bounds[0])
        # rank 0 keeps its strip only (and the case's picture); with the v1.1 per-face physics (contacts,
        # orthotropy, maps, axisymmetry) also the whole operator, whose flows it reads from the gathered field
        self._whole = op if getattr(case, "per_face_physics", False) else None
        del op, cls
        self.strip = Strip(comm, meta, threads)
        from relaxtui.parallel import stop

        try:
            warm_in_turn(comm, self.strip.warm)
        except stop.Stopped:
            pass  # every rank stopped warming; the kernels a cancelled run still needs load when called
        group.busy = False

    # --- the working array ----------------------------------------------------------------

    @property
    def padded_shape(self) -> tuple[int, int]:
        return self.strip.u.shape

    def _check_field(self, u) -> None:
        if u is not self.strip.u:
            raise UsageError("the field must be the working array of this distributed operator (from new_field)")

    def view(self, u) -> np.ndarray:
        """Rank 0's own rows of the working array (the other strips live on the other ranks)."""
        self._check_field(u)
        return u[1:-1, 1:-1]

    def new_field(self, initial: np.ndarray | None = None) -> np.ndarray:
        """The working array, as :meth:`relaxtui.solver.assembled.Operator.new_field`, on every rank's strip."""
        from relaxtui.kernels import measure
        from relaxtui.solver.assembled import initial_values

        if initial is not None:
            initial = initial_values(initial, self.shape)
            row, col = measure.first_bad_initial(self.case.codes, self.kind, initial)
            if row >= 0:
                raise UsageError(f"the initial field is not finite at interior cell row {int(row)}, column {int(col)}")
        comm = self.group.comm
        with self.group.collective(NEW_FIELD, float(initial is not None), self.guess):
            if initial is not None:
                for r in range(1, comm.Get_size()):
                    a, b = self.bounds[r]
                    comm.Send(initial[a:b], dest=r, tag=TAG_INITIAL)
                a, b = self.bounds[0]
                self.strip.new_field(initial[a:b], self.guess)
            else:
                self.strip.new_field(None, self.guess)
        return self.strip.u

    # --- sweeps ----------------------------------------------------------------------------

    def sweep(self, u, method: str, omega: float, sweeps: int, updates: np.ndarray, residuals: np.ndarray) -> int:
        """As :meth:`relaxtui.solver.assembled.Operator.sweep` (Jacobi and red-black SOR), over all strips.

        Every rank runs all ``sweeps`` sweeps; the per-sweep largest update and
        residual are reduced once for the chunk. The count returned stops at
        the first sweep whose largest update is not finite (the field then
        holds the later sweeps too: a diverged field either way).
        """
        self._check_field(u)
        if method not in DISTRIBUTED_METHODS:
            raise UsageError(refusal(method))
        omega, sweeps = sweep_arguments(omega, sweeps)
        with self.group.collective(SWEEP, DISTRIBUTED_METHODS.index(method), omega, sweeps):
            upd_bits, res_bits = self.strip.sweep(method, omega, sweeps)
        upd = upd_bits.view(np.float64)
        updates[:sweeps] = upd
        residuals[:sweeps] = res_bits.view(np.float64) if method == "jacobi" else upd / omega
        bad = np.flatnonzero(~np.isfinite(upd))
        return int(bad[0]) + 1 if bad.size else sweeps

    def release(self) -> None:
        self.strip.tmp = None

    def make_stepper(self, method: str):
        """The stepper of a method that is not a relaxation sweep (multigrid), None for the others."""
        if method in STEPPED_METHODS:
            from relaxtui.parallel.multigrid import DistributedMultigrid

            return DistributedMultigrid(self)
        return None

    # --- measures ------------------------------------------------------------------------------

    def residual(self, u) -> float:
        self._check_field(u)
        with self.group.collective(RESIDUAL):
            return self.strip.residual()

    def field_scale(self, u) -> float:
        """Largest |u| over the interior and fixed cells of the whole grid (the driver's scale)."""
        from relaxtui.case.model import FIXED, INTERIOR

        self._check_field(u)
        with self.group.collective(SCALE):
            scale = self.strip.field_scale()
        cells = np.asarray(self.region_cells)[(self.kind == INTERIOR) | (self.kind == FIXED)]
        return scale if cells.sum() > 0 else 1.0  # no such cell anywhere: 1.0, as in the driver

    def flows(self, u) -> tuple[dict[str, float], float, float]:
        """As :meth:`relaxtui.solver.assembled.Operator.flows`, summed over the strips."""
        self._check_field(u)
        if self._whole is not None:  # v1.1 face conductances: the single-process flows, on the gathered field
            from relaxtui.case.model import INTERIOR

            whole, field = self._whole, self.finish(u)
            w = whole.new_field()
            inside = whole.kind[whole.codes] == INTERIOR  # the flows read the interior cells' values only
            whole.view(w)[inside] = field[inside]
            return whole.flows(w)
        with self.group.collective(FLOWS):
            per_region = self.strip.flows() * self.depth
        from relaxtui.solver.assembled import flow_balance, region_source_total

        return flow_balance(self.case.regions, per_region, region_source_total(self))

    def finish(self, u) -> np.ndarray:
        """The exported field of the whole grid, gathered on rank 0."""
        self._check_field(u)
        out = np.empty(self.shape)
        with self.group.collective(EXPORT):
            self.strip.export(out, self.bounds)
        return out

    def cells_at(self, u, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """The working field at the grid cells (rows, cols) (unpadded indices, any shape), read on their ranks."""
        self._check_field(u)
        with self.group.collective(CELLS):
            return self.strip.cells_at(np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64))

    def field_summary(self, u) -> tuple[dict, dict]:
        """The report's extremes and peak flux, computed by strips (see :meth:`Strip.summary`):
        ``({"min", "max", "min_at", "max_at"}, flux_max)`` with the keys of
        :func:`relaxtui.output.report.extremes` and :func:`relaxtui.output.flux.peak_flux`."""
        from relaxtui.output.report import extremes_and_peak

        self._check_field(u)
        if self._whole is not None:
            return None  # v1.1 per-face conductivities: the report reads the gathered field (as one process does)
        with self.group.collective(SUMMARY):
            low, high, peak = self.strip.summary(self.case.regions, self.cell_size)
        return extremes_and_peak(self.case, low, high, peak)

    def radius_job(self):
        """The Jacobi-radius job of this operator (see :class:`DistributedRadiusJob`), made on first use."""
        if self._radius is None:
            self._radius = DistributedRadiusJob(self)
        return self._radius

    def jacobi_radius(self, **options):
        """A Lanczos estimate of the Jacobi radius run to its end now (collective), as
        :func:`relaxtui.solver.radius.jacobi_radius` with the same options; not the run's shared job."""
        lz = DistributedLanczos(self, **options)
        lz.advance()
        return lz.estimate()

    def fingerprint(self) -> str:
        """The single-process operator's fingerprint (its radius cache files serve both)."""
        return self._fingerprint

    def memory_bytes(self, method: str) -> int:
        from relaxtui.parallel.memory import rank_bytes

        return rank_bytes(self.shape[0], self.shape[1], method, len(self.case.regions), self.group.comm.Get_size())[0]


@functools.cache
def _lanczos_defaults() -> dict:
    """The default options of the single-process :class:`relaxtui.solver.radius.Lanczos` (read from its signature)."""
    return {k: v.default for k, v in inspect.signature(Lanczos.__init__).parameters.items() if v.default is not v.empty}


class DistributedLanczos(RitzRule):
    """Rank 0's handle on a Lanczos estimate whose vectors are split across the ranks.

    The interface of :class:`relaxtui.solver.radius.Lanczos` (``advance``,
    ``estimate``, ``steps``, ``mu``, ``settled``, ``done``, ``max_steps``) and
    its stopping rule, step for step, with its default settings (read from its
    signature); every :meth:`advance` is one collective command, and rank 0
    decides after each step whether the ranks do another.
    """

    def __init__(self, operator: "DistributedOperator", method_sweeps=None, **options):
        p = {**_lanczos_defaults(), **options}
        super().__init__(p["min_steps"], p["max_steps"], p["budget"], p["rtol"],
                         method_sweeps if method_sweeps is not None else p["method_sweeps"])
        self.operator = operator
        with operator.group.collective(LANCZOS_BEGIN):
            norm = operator.strip.lanczos_begin()
        if norm == 0.0:
            self.settled = self.done = True

    def advance(self, max_new_steps: int | None = None, stop=None, on_step=None) -> bool:
        """Run steps on every rank; returns ``done``. As :meth:`relaxtui.solver.radius.Lanczos.advance`."""
        from relaxtui.output.atomic import pause_for_tests
        from relaxtui.parallel import stop as signals

        def more(new: int) -> bool:
            # a stop signal on rank 0 ends the steps at once (the decision is broadcast); the other ranks'
            # signals are agreed on at the next check (between chunks)
            return not (self.done or (stop is not None and stop.is_set()) or (max_new_steps is not None and new >= max_new_steps)
                        or signals.local())

        if not more(0):
            return self.done
        new = 0

        def decide(alpha: float, beta_new: float):
            nonlocal new
            new += 1
            self.record_step(alpha, beta_new)
            if self.steps == 1:
                pause_for_tests("lanczos")
            if on_step is not None:
                on_step(self)
            return more(new), self.done

        with self.operator.group.collective(LANCZOS_ADVANCE):
            self.operator.strip.lanczos_advance(decide)
        return self.done


class DistributedRadiusJob(RadiusJob):
    """The radius job of :class:`relaxtui.solver.radius.RadiusJob` on a distributed operator.

    Its Lanczos process is a :class:`DistributedLanczos`. Every step is
    collective and only rank 0's main thread talks to the other ranks, so
    nothing runs in a background thread: :meth:`start` marks the estimate as
    pending, and each :meth:`result` call (the driver asks between chunks)
    advances it for :attr:`SLICE` seconds. The estimate thus goes on
    beside the sweeps, interleaved with them, as the single-process job's
    thread does on a small machine. Loading and saving the cache file work as
    in one process (same fingerprint, same file).
    """

    # seconds of Lanczos steps per call between chunks of about 0.1 s: the estimate gets a third of
    # the time, as the single-process job's thread does on 2 cores beside a 2-thread sweep
    SLICE = 0.05

    # a Lanczos step (one operator application, two inner products, one halo exchange) costs about two
    # sweeps before it has been timed (measured at 4096², 2 ranks: 62 ms a step against 34 ms a red-black sweep)
    STEP_SWEEPS = 2.0

    def __init__(self, operator):
        super().__init__(operator)
        self._pending = False
        self._slice_steps = 0  # steps done in the slices (their seconds are in _seconds)

    @property
    def running(self) -> bool:
        return self._pending

    def pause(self) -> None:
        """Stop taking turns with the sweeps (the Lanczos state is kept; :meth:`start` resumes)."""
        self._pending = False

    def affordable(self, remaining_seconds: float, sweep_seconds: float | None) -> bool:
        """Whether the estimate can finish before the run ends, at its share of the time.

        Its slices take turns with the sweeps, so every second it runs is a second
        the sweeps wait: an estimate that cannot be ready by the end (its steps
        left, at most the step limit, at their measured cost, or
        :attr:`STEP_SWEEPS` sweeps each before that) would only make the run
        longer, and the stopping rule measures the factor alone either way."""
        if self._final is not None:
            return True
        lz = self._lanczos
        if lz is not None and lz.done:
            return True
        coarse = lz is not None and hasattr(lz, "work_left") or lz is None and self._coarse()
        if self._slice_steps > 0:
            step = self._seconds / self._slice_steps
        elif sweep_seconds is not None:
            if coarse:
                from relaxtui.parallel.coarse import STEP_SWEEPS
            else:
                STEP_SWEEPS = self.STEP_SWEEPS
            step = STEP_SWEEPS * sweep_seconds
        else:
            return True  # nothing timed yet: the driver's own delay decides
        if coarse:  # the two-level estimate: its coarse steps, their replay and the fine stage
            from relaxtui.parallel.coarse import FINE_STEPS_PER_SMOOTHING, coarse_defaults

            d = coarse_defaults()
            left = lz.work_left() if lz is not None else 2 * d["max_steps"] + FINE_STEPS_PER_SMOOTHING * d["smoothing"]
        else:
            max_steps = lz.max_steps if lz is not None else _lanczos_defaults()["max_steps"]
            left = max_steps - (lz.steps if lz is not None else 0)
        # a slice of SLICE seconds per chunk of about CHUNK_SECONDS: the estimate gets SLICE / CHUNK_SECONDS
        # of the sweeping time
        from relaxtui.solver.methods import CHUNK_SECONDS

        return left * step <= remaining_seconds * self.SLICE / CHUNK_SECONDS

    def _ensure(self, method_sweeps, redo_unsettled: bool) -> bool:
        if self._final is not None:
            if self._final.settled or not redo_unsettled or self._source != "lanczos":
                return False
            self._final = None  # an unsettled estimate made for SOR is redone for the slow methods
            self._lanczos = None
        if self._lanczos is None:
            self._lanczos = self._new_lanczos(method_sweeps)
        return True

    def _coarse(self) -> bool:
        """Whether this operator's estimate is the two-level one (as in one process, by its unknowns)."""
        from relaxtui.solver.radius import coarse_unknowns

        return self.operator is not None and self.operator.unknowns > coarse_unknowns()

    def _new_lanczos(self, method_sweeps):
        if self._coarse():
            from relaxtui.parallel.coarse import DistributedCoarseLanczos

            return DistributedCoarseLanczos(self.operator, method_sweeps)
        return DistributedLanczos(self.operator, method_sweeps)

    def run(self, *args, **kwargs):
        self._pending = False
        return super().run(*args, **kwargs)

    def discard(self) -> None:
        """As :meth:`RadiusJob.discard`; an unfinished two-level estimate frees its arrays on every rank
        (collective: called between commands, as the single-process solve does before its output)."""
        lz = self._lanczos
        super().discard()
        if lz is not None and self._lanczos is None and hasattr(lz, "release"):
            lz.release()

    def start(self, method_sweeps=None, *, redo_unsettled: bool = False, threads: int = 1) -> None:
        with self._lock:
            args = () if method_sweeps is None else (method_sweeps,)
            self._pending = self._ensure(*args, redo_unsettled)

    def result(self):
        if self._pending and self._final is None and self._lanczos is not None:
            import time

            t0 = time.perf_counter()
            lz = self._lanczos
            while not lz.done and time.perf_counter() - t0 < self.SLICE:
                lz.advance(max_new_steps=1)
                self._slice_steps += 1
            self._seconds += time.perf_counter() - t0
            self._finish_if_done()
            self._pending = self._final is None
        return self._final


def _start_numba() -> None:
    """Run one tiny kernel whose argument types no case changes (numba's first kernel in a process
    imports and sets up its compiler and thread layer, about 1 s): the ranks 1..P-1 do it while
    rank 0 reads the picture, instead of in their turn of :func:`warm_in_turn`, where rank 0 waits."""
    from relaxtui.kernels import blocks

    blocks.zero_fill(np.zeros((1, 1)), 1)


def follow(comm, threads: int) -> int:
    """The loop of ranks 1..P-1: do what rank 0 commands until it says stop; returns the exit code."""
    from relaxtui.parallel import stop

    strip = None
    _start_numba()
    while True:
        cmd = _wait_command(comm)
        code = int(cmd[0])
        if code == STOP:
            return int(cmd[1])
        if code == STOP_CHECK:
            if cmd[1]:
                stop.writing()
            stop.agree(comm)
        elif code == SETUP:
            strip = Strip(comm, _receive_part(comm), threads)
            try:
                warm_in_turn(comm, strip.warm)
            except stop.Stopped:
                pass  # as on rank 0 (DistributedOperator)
        elif code == NEW_FIELD:
            initial = None
            if cmd[1]:
                initial = np.empty((strip.n, strip.cols))
                comm.Recv(initial, source=0, tag=TAG_INITIAL)
            strip.new_field(initial, float(cmd[2]))
        elif code == SWEEP:
            strip.sweep(DISTRIBUTED_METHODS[int(cmd[1])], float(cmd[2]), int(cmd[3]))
        elif code == RESIDUAL:
            strip.residual()
        elif code == SCALE:
            strip.field_scale()
        elif code == FLOWS:
            strip.flows()
        elif code == EXPORT:
            strip.export(None, None)
        elif code == SUMMARY:
            strip.summary(strip.regions, strip.cell_size)
        elif code == LANCZOS_BEGIN:
            strip.lanczos_begin()
        elif code == LANCZOS_ADVANCE:
            strip.lanczos_advance()
        elif code == CELLS:
            strip.cells_at(None, None)
        elif code == COARSE_BEGIN:
            from relaxtui.parallel.coarse import begin

            begin(strip, int(cmd[1]))
        elif code == COARSE_ADVANCE:
            strip.coarse_radius.advance()
        elif code == COARSE_RELEASE:
            if strip.coarse_radius is not None:
                strip.coarse_radius.release()
        elif code == MG_SETUP:
            try:
                strip.multigrid_setup()
            except stop.Stopped:
                strip.mg = None  # as on rank 0 (DistributedMultigrid)
        elif code == MG_SWEEP:
            strip.mg.iterate(float(cmd[1]), int(cmd[2]))
        elif code == MG_RELEASE:
            strip.mg = None
        elif code == MG_NORM:
            strip.mg.inverse_norm(float(cmd[1]))
        elif code == MG_BOUND:
            strip.mg.residual_bound(float(cmd[2]), float(cmd[1]))
        else:  # pragma: no cover - rank 0 sends only the codes above
            raise RuntimeError(f"unknown command {code} from rank 0")

