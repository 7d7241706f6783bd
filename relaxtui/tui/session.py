"""The session model of the terminal UI: its runs, their state and the solve control.

Nothing here imports Textual: the app routes keys and worker events to a
:class:`Session`, and the tests drive a session directly.

* :class:`SolveControl` -- the UI thread's requests to the solve worker
  (pause, one step, stop, ω, viewport, field view); every method is thread-safe;
* :class:`HistoryTail` -- the history rows a worker event carries (read-only copies);
* :class:`RunRecord` -- one run as the UI thread sees it. Its ``status`` is the
  one source of truth for the run's state: ``preparing``, ``running``,
  ``paused``, ``stopping``, ``finishing`` (the run has ended, its report is being
  built) and then the run's final status (``converged``, ``cancelled``, ...) or
  ``failed``;
* :class:`Session` -- the runs of one case, which one is active and which one is
  shown, and the transitions between states. A stop signal's save
  (:func:`relaxtui.tui.worker.save_on_signal`) runs in a thread of its own: it
  takes its picture of the session with :meth:`Session.close` under the
  session's lock, which the transitions that change what it reads hold too.
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass

import numpy as np

from relaxtui.output.text import group
from relaxtui.tui.history import make_series

FIELD_BUDGET = 1 << 30  # bytes of finished fields kept for the runs table (older ones are released)
LIVE = ("preparing", "running", "paused", "stopping")  # states of a run that can still sweep
VIEWS = ("solution", "residual", "update")  # what the field panel shows


class SolveControl:
    """Requests from the UI thread to the solve worker (every method is thread-safe)."""

    def __init__(self, viewport=None, paused: bool = False, view: str = "solution") -> None:
        self._lock = threading.Lock()
        self.wake = threading.Event()
        self._paused = paused
        self._steps = 0
        self._omegas: list = []
        self._viewport = viewport
        self._mode = view
        self._serial = 0
        self.stopping = False
        self.quitting = False
        self.run = None  # the Run, for cancel() (thread-safe) from the UI thread
        self.ended = threading.Event()  # set by the worker when its loop has returned, however it ended
        self.result = None  # the SolveResult the worker built (set before it posts Finished)

    def _poke(self) -> None:
        self.wake.set()

    @property
    def paused(self) -> bool:
        return self._paused

    def pause(self) -> None:
        with self._lock:
            self._paused = True
        self._poke()

    def resume(self) -> None:
        with self._lock:
            self._paused = False
        self._poke()

    def step_once(self) -> None:
        with self._lock:
            self._steps += 1
        self._poke()

    def stop(self, quitting: bool = False) -> None:
        with self._lock:
            self.stopping = True
            self.quitting = self.quitting or quitting
        if self.run is not None:
            self.run.cancel()
        self._poke()

    def request_omega(self, omega) -> None:
        with self._lock:
            self._omegas.append(omega)
        self._poke()

    def set_view(self, viewport=None, mode: str | None = None) -> None:
        """A new viewport and/or field view: the worker answers with a new frame."""
        with self._lock:
            if viewport is not None:
                self._viewport = viewport
            if mode is not None:
                self._mode = mode
            self._serial += 1
        self._poke()

    def take_omegas(self) -> list:
        with self._lock:
            omegas, self._omegas = self._omegas, []
        return omegas

    def take_step(self) -> bool:
        with self._lock:
            if self._steps:
                self._steps -= 1
                return True
        return False

    def view(self) -> tuple:
        """(viewport, serial) of the latest view request."""
        with self._lock:
            return self._viewport, self._serial

    @property
    def mode(self) -> str:
        with self._lock:
            return self._mode


@dataclass(frozen=True, eq=False)
class HistoryTail:
    """New history rows since the last post (read-only copies)."""

    sweep: np.ndarray
    residual: np.ndarray
    error: np.ndarray
    omega: np.ndarray


def tail(history, start: int) -> HistoryTail:
    """Read-only copies of ``history``'s rows from ``start`` on."""
    n = len(history)
    arrays = []
    for a in (history.sweep, history.residual, history.estimated_error, history.omega):
        b = np.array(a[start:n], dtype=np.float64)
        b.setflags(write=False)
        arrays.append(b)
    return HistoryTail(*arrays)


@dataclass(frozen=True)
class ToGo:
    """What is left of a run: sweeps and seconds until the first of its limits, and which one."""

    sweeps: float | None
    seconds: float | None
    by: str  # "tolerance", "sweep limit", "time limit" or "" (nothing known)
    forecast: bool  # the stopping rule has a forecast for the tolerance (else the figures are an upper bound)


def to_go(progress, max_sweeps: int | None, time_limit: float | None) -> ToGo:
    """Sweeps and seconds until the earliest of: the tolerance (the stopping rule's
    forecast), the sweep limit and the time limit."""
    if progress is None:
        return ToGo(None, None, "", False)
    per_sweep = progress.seconds / progress.sweeps if progress.sweeps > 0 and progress.seconds > 0 else None
    options = []
    forecast = progress.eta_sweeps is not None and math.isfinite(progress.eta_sweeps)
    if forecast:
        eta = float(progress.eta_sweeps)
        secs = progress.eta_seconds if progress.eta_seconds is not None else (None if per_sweep is None else eta * per_sweep)
        options.append((eta, secs, "tolerance"))
    if max_sweeps:
        left = float(max(max_sweeps - progress.sweeps, 0))
        options.append((left, None if per_sweep is None else left * per_sweep, "sweep limit"))
    if time_limit:
        left_s = max(float(time_limit) - progress.seconds, 0.0)
        options.append((None if per_sweep is None else left_s / per_sweep, left_s, "time limit"))
    if not options:
        return ToGo(None, None, "", False)
    if all(o[0] is not None for o in options):
        best = min(options, key=lambda o: o[0])
    elif all(o[1] is not None for o in options):
        best = min(options, key=lambda o: o[1])
    else:
        best = min((o for o in options if o[0] is not None), key=lambda o: o[0])
    return ToGo(best[0], best[1], best[2], forecast)


def chunk_factors(sweeps: np.ndarray, residual: np.ndarray, min_span: int = 4) -> tuple[np.ndarray, np.ndarray]:
    """The measured convergence factor per chunk: ``(r_end / r_start) ** (1 / sweeps)``.

    ``sweeps`` and ``residual`` are the history of one run cut at the chunk
    boundaries the caller chose (here: one point per worker post). Returns the
    end sweep of each chunk and its factor; chunks shorter than ``min_span``
    sweeps or with a non-positive residual are left out.
    """
    s = np.asarray(sweeps, dtype=np.float64)
    r = np.asarray(residual, dtype=np.float64)
    if s.size < 2:
        return np.zeros(0), np.zeros(0)
    ds = np.diff(s)
    ok = (ds >= min_span) & (r[1:] > 0) & (r[:-1] > 0) & np.isfinite(r[1:]) & np.isfinite(r[:-1])
    with np.errstate(divide="ignore", invalid="ignore"):
        f = np.exp(np.log(r[1:] / r[:-1]) / np.where(ds > 0, ds, 1.0))
    return s[1:][ok], f[ok]


class RunRecord:
    """The UI thread's bookkeeping of one run of the session."""

    def __init__(self, run_id: int, run, start: str, omega_auto: bool) -> None:
        self.id = run_id
        self.method = run.method
        self.tolerance = run.tolerance
        self.max_sweeps = getattr(run, "max_sweeps", None)
        self.time_limit = getattr(run, "time_limit", None)
        self.omega_auto = omega_auto
        self.start = start
        self.status = "preparing"
        self.progress = None
        self.chunks: list[HistoryTail] = []
        self.chunk_ends: list[tuple[int, float]] = []  # (sweep, residual) at the end of each post
        self.omega_changes: list[int] = [0]
        self._last_omega: float | None = None
        self.result = None  # SolveResult once finished
        self.exported = False  # written by the export (e) at least once: a stop signal's save skips it
        self.run = None  # the finished Run (kept for the latest run only: "continue" reuses its working array)
        self.frame = None
        self.frames: dict[str, object] = {}  # the latest frame per field view
        self.problem: str | None = None
        self.source: "RunRecord | None" = None  # the run it continues from
        self.rate: float | None = None
        self.preparing = ""  # what the preparation is doing now, and how far (the driver's words)
        self.mu: float | None = None  # the run's Jacobi radius estimate, once prepared
        self.theory: float | None = None  # the method's theoretical factor at the run's ω
        self._series = None
        self._series_key = None

    @property
    def live(self) -> bool:
        return self.status in LIVE

    @property
    def final(self) -> bool:
        """The run has ended (its report may still be in the making)."""
        return not self.live

    def add(self, progress, chunk: HistoryTail) -> None:
        if self.progress is not None and progress.seconds > self.progress.seconds:
            self.rate = (progress.sweeps - self.progress.sweeps) / (progress.seconds - self.progress.seconds)
        self.progress = progress
        if chunk.sweep.size:
            self.chunks.append(chunk)
            self.chunk_ends.append((int(chunk.sweep[-1]), float(chunk.residual[-1])))
            omega = chunk.omega
            prev = np.concatenate([[omega[0] if self._last_omega is None else self._last_omega], omega[:-1]])
            for k in np.nonzero(omega != prev)[0]:
                self.omega_changes.append(int(chunk.sweep[k]) - 1)
            self._last_omega = float(omega[-1])

    def factors(self) -> tuple[np.ndarray, np.ndarray]:
        """Measured factor per chunk (see :func:`chunk_factors`)."""
        if not self.chunk_ends:
            return np.zeros(0), np.zeros(0)
        first = self.chunks[0]
        s = [float(first.sweep[0])] + [e[0] for e in self.chunk_ends]
        r = [float(first.residual[0])] + [e[1] for e in self.chunk_ends]
        return chunk_factors(np.array(s), np.array(r))

    def series(self):
        """The history as an immutable, decimated plot series (cached)."""
        key = (len(self.chunks), self.result is not None)
        if self._series is not None and self._series_key == key:
            return self._series
        if self.result is not None:
            h = self.result.history
            sweeps, res, err = h.sweep, h.residual, h.estimated_error
        elif self.chunks:
            sweeps = np.concatenate([c.sweep for c in self.chunks])
            res = np.concatenate([c.residual for c in self.chunks])
            err = np.concatenate([c.error for c in self.chunks])
        else:
            sweeps = res = err = np.zeros(0)
        label = f"#{self.id} ω {self.progress.omega:.3g}" if self.progress is not None else f"#{self.id}"
        self._series = make_series(self.id, label, sweeps, res, err, self.tolerance, self.omega_changes)
        self._series_key = key
        return self._series

    def to_go(self) -> ToGo:
        p = self.progress
        return to_go(p, self.max_sweeps, self.time_limit)

    def sweeps_text(self) -> str:
        return group(self.progress.sweeps if self.progress is not None else 0)

    @property
    def field_bytes(self) -> int:
        f = None if self.result is None else self.result.field
        return 0 if f is None else int(f.nbytes)


@dataclass(frozen=True)
class Closing:
    """What :meth:`Session.close` found: the active run (its state then, its control) and the
    finished runs whose results were never exported, oldest first; ``latest`` is the session's last run."""

    active: RunRecord | None
    active_status: str
    control: SolveControl | None
    finished: list
    latest: RunRecord | None


class Session:
    """The runs of one case: which one sweeps (``active``), which one is shown (``selected``)."""

    def __init__(self, field_budget: int = FIELD_BUDGET) -> None:
        self.records: list[RunRecord] = []
        self.active: RunRecord | None = None
        self.control: SolveControl | None = None
        self.selected: int | None = None
        self.field_budget = field_budget
        # held by the transitions a stop signal's save reads (begin, finished, failed, exported) and by
        # close(), which that save calls from its own thread
        self.lock = threading.Lock()
        self.closing = False  # a stop signal is saving the runs: no new run may start

    # -- looking up -------------------------------------------------------------
    def record(self, run_id: int | None) -> RunRecord | None:
        if run_id is None:
            return None
        return self.records[run_id - 1] if 0 < run_id <= len(self.records) else None

    def shown(self) -> RunRecord | None:
        return self.record(self.selected)

    def state(self) -> str:
        """``ready`` or the active run's state (the one source of truth for the banner and strip)."""
        return "ready" if self.active is None else self.active.status

    def in_progress(self) -> bool:
        """A run has sweeps that quitting would lose: running or paused (a preparation
        or a run that is stopping or building its report loses nothing worth a question)."""
        return self.active is not None and self.active.status in ("running", "paused")

    # -- transitions --------------------------------------------------------------
    def begin(self, run, start: str, omega_auto: bool, *, viewport=None, paused=False, one_step=False,
              source: RunRecord | None = None, view: str = "solution") -> RunRecord:
        if self.active is not None:
            raise RuntimeError("a run is already active")
        with self.lock:
            rec = RunRecord(len(self.records) + 1, run, start, omega_auto)
            rec.source = source
            self.records.append(rec)
            control = SolveControl(viewport, paused=paused, view=view)
            if one_step:
                control.step_once()
            control.run = run
            self.active, self.control = rec, control
            self.selected = rec.id
            if self.closing:  # begun as a stop signal's save took its picture: it ends before it sweeps
                control.stop(quitting=True)
                rec.status = "stopping"
        return rec

    def preparing(self, run_id: int, text: str) -> RunRecord | None:
        rec = self.record(run_id)
        if rec is not None and rec.status == "preparing":
            rec.preparing = text
        return rec

    def prepared(self, run_id: int, progress, mu=None, theory=None) -> RunRecord | None:
        rec = self.record(run_id)
        if rec is None:
            return None
        rec.progress = progress
        rec.mu, rec.theory = mu, theory
        rec.preparing = ""
        if rec is self.active and rec.status == "preparing":
            rec.status = "paused" if self.control.paused else "running"
        return rec

    def progressed(self, run_id: int, progress, chunk: HistoryTail, frame=None, mu=None, theory=None) -> RunRecord | None:
        rec = self.record(run_id)
        if rec is None:
            return None
        rec.add(progress, chunk)
        if mu is not None:
            rec.mu, rec.theory = mu, theory
        if frame is not None:
            self.keep_frame(rec, frame)
        if rec is self.active and rec.live:
            if progress.status is not None:
                rec.status = "finishing"  # swept its last sweep: only the report is left to build
            elif rec.status != "stopping":
                rec.status = "paused" if self.control.paused else "running"
        return rec

    def keep_frame(self, rec: RunRecord, frame) -> None:
        mode = getattr(frame, "mode", "solution")
        rec.frames[mode] = frame
        if mode == "solution":
            rec.frame = frame

    def finished(self, run_id: int, result, run) -> RunRecord | None:
        rec = self.record(run_id)
        if rec is None:
            return None
        with self.lock:
            rec.result = result
            rec.run = run
            rec.progress = run.progress
            rec.status = result.report.get("status") or run.status
            for other in self.records:
                if other is not rec:
                    other.run = None  # only the latest run keeps its working array
            self.release_fields()
            if rec is self.active:
                self.active, self.control = None, None
        return rec

    def failed(self, run_id: int, text: str) -> RunRecord | None:
        rec = self.record(run_id)
        if rec is None:
            return None
        with self.lock:
            rec.status = "failed"
            rec.problem = text
            if rec is self.active:
                self.active, self.control = None, None
        return rec

    def mark_exported(self, run_id: int | None) -> None:
        """The export wrote run ``run_id``'s files: a stop signal's save leaves it alone."""
        rec = self.record(run_id)
        if rec is not None:
            with self.lock:
                rec.exported = True

    def close(self) -> "Closing":
        """Refuse new runs from now on and say what a stop signal's save has to write (thread-safe)."""
        with self.lock:
            self.closing = True
            active = self.active
            return Closing(
                active=active,
                active_status="" if active is None else active.status,
                control=None if active is None else self.control,
                finished=[r for r in self.records if r is not active and r.result is not None and not r.exported],
                latest=self.records[-1] if self.records else None,
            )

    def toggle_pause(self) -> str:
        """Pause or resume the active run; returns its state afterwards."""
        rec, control = self.active, self.control
        if control.paused:
            control.resume()
        else:
            control.pause()
        if rec.status in ("running", "paused"):
            rec.status = "paused" if control.paused else "running"
        return rec.status

    def step(self) -> None:
        """One chunk of the active run (pausing it first)."""
        rec, control = self.active, self.control
        if not control.paused:
            control.pause()
            if rec.status == "running":
                rec.status = "paused"
        control.step_once()

    def stop(self, quitting: bool = False) -> None:
        if self.control is not None:
            self.control.stop(quitting=quitting)
        if self.active is not None and self.active.live:
            self.active.status = "stopping"

    def release_fields(self) -> None:
        """Keep finished fields within the budget (never the shown or the latest run's)."""
        total = sum(r.field_bytes for r in self.records)
        for r in self.records[:-1]:
            if total <= self.field_budget:
                break
            if r.id != self.selected and r.field_bytes:
                total -= r.field_bytes
                r.result.field = None
                r.problem = "field released to save memory (report and history kept)"
