"""The solve worker's loop and the events it posts, without Textual.

Threads. The event loop only formats and draws. Each solve runs in one
worker thread that owns its :class:`relaxtui.solver.driver.Run` and the live
field. :func:`solve_loop` calls ``run.step(max_seconds=STEP_SECONDS)``, then
posts an immutable :class:`Progressed` event (progress snapshot and the new
history rows, copies); at most ``1 / FRAME_INTERVAL`` times a second (and on
request, when the user pans, zooms, moves the probe or changes the field view)
it samples the part of the field on screen into a small
:class:`~relaxtui.tui.sampling.Frame` and posts that too. The UI thread asks
for things only through a :class:`~relaxtui.tui.session.SolveControl`; a
finished run's field, report and history belong to the UI thread from then on.

``post`` is any callable taking one event (the app wraps it in a Textual
message; the tests collect the events in a list).
"""

from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from relaxtui.errors import RelaxError
from relaxtui.output.text import group
from relaxtui.tui.sampling import Frame, SamplingPlan
from relaxtui.tui.session import HistoryTail, tail

STEP_SECONDS = 0.2  # one run.step() call of the worker
FRAME_INTERVAL = 0.5  # seconds between field snapshots while running
PAUSE_POLL = 0.05  # how often a paused worker looks for requests
PREPARE_INTERVAL = 0.1  # seconds between posts of the preparation's progress


# -- events (immutable; the UI thread owns them once posted) ---------------------------


@dataclass(frozen=True, eq=False)
class RunEvent:
    run_id: int


@dataclass(frozen=True, eq=False)
class Preparing(RunEvent):
    text: str  # what the run's preparation is doing and how far (the driver's words)


@dataclass(frozen=True, eq=False)
class Prepared(RunEvent):
    progress: object
    seconds: float
    mu: float | None  # the Jacobi radius estimate the run uses (None when the method needs none)
    theory: float | None  # the method's theoretical factor at the run's ω for that radius


@dataclass(frozen=True, eq=False)
class Progressed(RunEvent):
    progress: object
    tail: HistoryTail
    frame: Frame | None  # a new snapshot of the field, or None
    mu: float | None = None  # the radius estimate now (SOR refines it from the observed factor)
    theory: float | None = None  # the theoretical factor at the current ω and radius


@dataclass(frozen=True, eq=False)
class FrameReady(RunEvent):
    frame: Frame


@dataclass(frozen=True, eq=False)
class Finished(RunEvent):
    result: object  # the SolveResult
    run: object  # the finished Run (its working array serves "continue")
    update: np.ndarray | None  # the last per-sweep update field (rows, cols), when the update view was on


@dataclass(frozen=True, eq=False)
class Failed(RunEvent):
    text: str


@dataclass(frozen=True, eq=False)
class OmegaApplied(RunEvent):
    text: str
    ok: bool


def theory_factor(run) -> float | None:
    """The method's theoretical factor at the run's ω for its Jacobi radius estimate, or None."""
    info = getattr(run, "method_info", None)
    mu = getattr(run, "mu", None)
    if info is None or info.factor is None or mu is None:
        return None
    try:
        return float(info.factor(mu, run.omega))
    except (ValueError, ZeroDivisionError):
        return None


class Snapshots:
    """Frames of a run's field in each view: the solution, the residual of each
    cell, and the latest update per sweep (the change between two snapshots,
    divided by the sweeps between them: in the asymptotic regime it has the
    shape of the remaining error)."""

    def __init__(self, layout, run_id: int) -> None:
        self.layout = layout
        self.run_id = run_id
        self.plan: SamplingPlan | None = None
        self._previous: tuple[int, np.ndarray] | None = None  # (sweeps, full field copy) for the update view
        self.update: np.ndarray | None = None  # the last computed update field

    def _plan(self, vp) -> SamplingPlan:
        if self.plan is None or self.plan.viewport.plan_key != vp.plan_key:
            self.plan = SamplingPlan(self.layout, vp)
        return self.plan

    def values(self, run, mode: str, sweeps: int) -> np.ndarray | None:
        """The (rows, cols) array the view shows (a view of the live field for the solution)."""
        if mode == "residual":
            return run.operator.residual_field(run.field)
        if mode == "update":
            now = run.view()
            prev = self._previous
            if prev is None or prev[0] != sweeps:
                if prev is not None and prev[0] < sweeps:
                    self.update = (now - prev[1]) / (sweeps - prev[0])
                self._previous = (sweeps, np.array(now, copy=True))
            return self.update
        return run.view()

    def frame(self, run, control, sweeps: int, state: str = "") -> Frame | None:
        vp, _ = control.view()
        if vp is None:
            return None
        mode = control.mode
        values = self.values(run, mode, sweeps)
        plan = self._plan(vp)
        label = f"run {self.run_id} · sweep {group(sweeps)}"
        if values is None:
            values = np.full(self.layout.shape, np.nan)
            label += " · the update shows after the next chunk"
        return plan.frame(values, cursor=vp.cursor, label=label, viewport=vp, mode=mode, sweeps=sweeps)


def solve_loop(run_id: int, run, control, layout, post, cancelled=lambda: False) -> None:
    """Prepare and advance ``run`` until it ends, posting events; see the module docstring.

    ``control.ended`` is set when the loop returns, however it returns (a stop signal's save
    waits for it before it reads the run)."""
    try:
        _solve_loop(run_id, run, control, layout, post, cancelled)
    finally:
        control.ended.set()


def _solve_loop(run_id: int, run, control, layout, post, cancelled) -> None:
    t0 = time.perf_counter()
    last = [-math.inf, ""]

    def preparing(text: str) -> None:
        # every new stage at once, the steps within a stage at most every PREPARE_INTERVAL
        now = time.perf_counter()
        stage = text.split(":", 1)[0]
        if stage != last[1] or now - last[0] >= PREPARE_INTERVAL:
            last[0], last[1] = now, stage
            post(Preparing(run_id, text))

    if getattr(run, "on_prepare", None) is None:
        run.on_prepare = preparing
    try:
        run.prepare()
    except RelaxError as exc:
        post(Failed(run_id, str(exc)))
        return
    post(Prepared(run_id, run.progress, time.perf_counter() - t0, getattr(run, "mu", None), theory_factor(run)))
    snaps = Snapshots(layout, run_id)
    sent = 0
    last_frame = -math.inf
    serial_done = -1
    frame_sweeps = -1  # the sweep of the latest frame posted

    def snapshot() -> Frame | None:
        nonlocal serial_done, frame_sweeps
        serial_done = control.view()[1]
        frame_sweeps = run.progress.sweeps
        return snaps.frame(run, control, run.progress.sweeps)

    frame = snapshot()
    if frame is not None:
        post(FrameReady(run_id, frame))
    while not run.done:
        if cancelled() or control.stopping:
            run.cancel()
        for omega in control.take_omegas():
            try:
                run.set_omega(omega)
                post(OmegaApplied(run_id, f"run #{run_id}: ω {run.omega:.4f} from sweep {group(run.progress.sweeps)} ({run.omega_note})", True))
            except RelaxError as exc:
                post(OmegaApplied(run_id, str(exc), False))
        one = False
        if control.paused and not control.stopping and not cancelled():
            one = control.take_step()
            if not one:
                # a new view, or the field moved on since the last frame: the paused field, now
                if control.view()[1] != serial_done or frame_sweeps != run.progress.sweeps:
                    frame = snapshot()
                    if frame is not None:
                        post(FrameReady(run_id, frame))
                control.wake.wait(PAUSE_POLL)
                control.wake.clear()
                continue
        progress = run.step(0.0 if one else STEP_SECONDS)
        chunk = tail(run.history, sent)
        sent += chunk.sweep.size
        frame = None
        now = time.perf_counter()
        if run.done or one or now - last_frame >= FRAME_INTERVAL or control.view()[1] != serial_done:
            frame = snapshot()
            last_frame = now
        post(Progressed(run_id, progress, chunk, frame, getattr(run, "mu", None), theory_factor(run)))
    if control.quitting or cancelled():
        return
    result = run.result()
    control.result = result  # before the post: a stop signal's save that comes now takes this one
    post(Finished(run_id, result, run, snaps.update))


# -- loading and exporting ---------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Loaded:
    case: object
    operator: object
    layout: object
    initial: np.ndarray
    seconds: float


@dataclass(frozen=True, eq=False)
class LoadFailed:
    text: str


@dataclass(frozen=True, eq=False)
class Exported:
    paths: list | None
    text: str = ""
    run_id: int | None = None


def load_case(path, post) -> None:
    """Load the case, assemble its operator and the cell layout; post :class:`Loaded` or :class:`LoadFailed`."""
    t0 = time.perf_counter()
    try:
        from relaxtui.case import load_case as load
        from relaxtui.solver.assembled import Operator
        from relaxtui.tui.sampling import CellLayout

        case = load(path)
        operator = Operator(case)
        layout = CellLayout.from_case(case)
        initial = operator.finish(operator.new_field())
    except RelaxError as exc:
        post(LoadFailed(str(exc)))
        return
    post(Loaded(case, operator, layout, initial, time.perf_counter() - t0))


def export(result, paths: dict, post, run_id: int | None = None) -> None:
    """Write a finished run's field, report and history; post :class:`Exported`."""
    from relaxtui.solver.driver import write_outputs

    try:
        written = write_outputs(result, out=paths.get("out"), report=paths.get("report"), history=paths.get("history"))
    except (RelaxError, OSError) as exc:
        post(Exported(None, str(exc), run_id))
        return
    post(Exported(written, "", run_id))


def default_names(case_name: str, run_id) -> dict[str, str]:
    """The export's default file names of run ``run_id`` (``<case>.run<id>.field.npy``, ...)."""
    base = f"{case_name}.run{run_id}"
    return {"out": f"{base}.field.npy", "report": f"{base}.report.json", "history": f"{base}.history.csv"}


# -- a stop signal's save ------------------------------------------------------------------------


@dataclass(frozen=True)
class Saved:
    """What a stop signal's save did with one run: the files written, or why there are none."""

    run_id: int
    status: str
    paths: tuple = ()
    problem: str = ""


def free_names(case_name: str, run_id: int, folder=".") -> dict[str, Path]:
    """The export's default names of a run in ``folder``; when a file of that name is already there
    (an earlier session's export), ``<case>.run<id>-2...``, ``-3``, ...: an unattended save never
    replaces a file."""
    folder = Path(folder)
    k = 1
    while True:
        names = default_names(case_name, run_id if k == 1 else f"{run_id}-{k}")
        paths = {key: folder / name for key, name in names.items()}
        if not any(os.path.lexists(p) for p in paths.values()):
            return paths
        k += 1


def save_on_signal(session, signals, folder=".") -> tuple[list[Saved], int]:
    """Write what a stop signal would otherwise lose; returns what was saved and the exit code.

    ``signals`` is the stop-signal state of :func:`relaxtui.commands.solve._stop_signals_to` (its
    ``note`` names the signal in a cancelled report's message, as ``relaxtui solve`` does). The
    session is closed to new runs; the active run is stopped at its worker's next chunk boundary
    and written first (its report: status ``cancelled``, "... (stopped by SIGHUP)"; a run that
    reached its end in that chunk keeps its status), then every finished run whose results were
    never exported. Each goes to the export's default names in ``folder`` (:func:`free_names`),
    as one output set through relaxtui.output.atomic. A run still preparing has swept nothing and
    is not waited for; a run whose field was released to save memory cannot be written whole and
    is skipped (the export refuses it too). The exit code is ``relaxtui solve``'s for the status
    of the session's latest run (0 converged, 130 cancelled, 1 any other end); 130 with no run.
    Called from a thread of its own: it never touches the screen.
    """
    from relaxtui.commands.solve import EXIT_INTERRUPTED, exit_code
    from relaxtui.solver.driver import write_outputs

    closing = session.close()
    jobs = []  # (run id, result or None, status, why nothing is written)
    latest_status = closing.latest.status if closing.latest is not None else None
    if closing.active is not None:
        rec, control = closing.active, closing.control
        control.stop(quitting=True)  # thread-safe: the worker cancels the run at its next chunk boundary
        if closing.active_status == "preparing":
            jobs.append((rec.id, None, "cancelled", "stopped while preparing: nothing swept yet, nothing to write"))
            latest_status = "cancelled"
        else:
            control.ended.wait()
            try:
                result = control.result if control.result is not None else control.run.result()
                if closing.active_status != "stopping":  # else the user's x stopped it, not the signal
                    signals.note(result.report)
                latest_status = result.report["status"]
                jobs.append((rec.id, result, latest_status, ""))
            except Exception as exc:  # a run whose worker died: say so, save the others
                jobs.append((rec.id, None, "failed", f"its results could not be built: {exc}"))
                latest_status = "failed"
    for rec in closing.finished:
        result = rec.result
        if result.field_shape is None:  # released (made on access otherwise: not here, the writing streams it)
            jobs.append((rec.id, None, rec.status, "field released to save memory: not written"))
        else:
            jobs.append((rec.id, result, rec.status, ""))
    saved = []
    for run_id, result, status, problem in jobs:
        if result is None:
            saved.append(Saved(run_id, status, (), problem))
            continue
        try:
            paths = free_names(result.case.name, run_id, folder)
            written = write_outputs(result, out=paths["out"], report=paths["report"], history=paths["history"])
            saved.append(Saved(run_id, status, tuple(written)))
        except (RelaxError, OSError) as exc:
            saved.append(Saved(run_id, status, (), f"not written: {exc}"))
    code = EXIT_INTERRUPTED if latest_status is None else exit_code(latest_status)
    return saved, code


def boundary_range(case, initial: np.ndarray) -> tuple[float, float] | None:
    """The values the solution's scale covers when held values and ambients are included."""
    values = [r.value for r in case.regions if r.value is not None]
    values += [r.ambient for r in case.regions if r.ambient is not None]
    finite = initial[np.isfinite(initial)]
    if finite.size:
        values += [float(finite.min()), float(finite.max())]
    if not values:
        return None
    return (float(min(values)), float(max(values)))
