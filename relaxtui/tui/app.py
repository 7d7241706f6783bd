"""The relaxtui terminal UI (``relaxtui open CASE.toml``).

Threads. The event loop only formats and draws. Loading the case (picture,
operator assembly) runs in a thread worker; each solve runs in the one
exclusive solve worker, which owns its :class:`relaxtui.solver.driver.Run` and the
live field. Its loop calls ``run.step(max_seconds=STEP_SECONDS)``, then posts
an immutable progress snapshot and the new history rows (copies); at most
``1 / FRAME_INTERVAL`` times a second (and on request, when the user pans,
zooms or moves the probe) it samples the part of the field on screen into a
small :class:`~relaxtui.tui.sampling.Frame` and posts that too. The UI thread
asks for things only through a :class:`SolveControl` (pause, one step, stop,
ω, viewport) and never touches the live run; a finished run's field, report
and history belong to the UI thread from then on.
"""

from __future__ import annotations

import functools
import math
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from textual import work
from textual.app import App, ComposeResult
from textual.binding import Binding
from textual.containers import Container, Horizontal, Vertical
from textual.css.query import NoMatches
from textual.message import Message
from textual.reactive import reactive
from textual.widgets import Footer, Input, Select
from textual.worker import get_current_worker

from relaxtui.case import model
from relaxtui.errors import RelaxError
from relaxtui.tui.banner import Banner
from relaxtui.tui.dialogs import ConfirmQuit, ExportScreen, HelpScreen
from relaxtui.tui.fieldview import FieldView
from relaxtui.tui.history import HistoryPanel, make_series
from relaxtui.tui.params import ParamsPanel, parse_omega
from relaxtui.tui.runs import RunRow, RunsPanel
from relaxtui.tui.sampling import CellLayout, Frame, SamplingPlan, Viewport
from relaxtui.tui.status import StatusStrip
from relaxtui.tui.timing import TimingPanel, group

STEP_SECONDS = 0.2  # one run.step() call of the worker
FRAME_INTERVAL = 0.5  # seconds between field snapshots while running
PLOT_INTERVAL = 1.0  # seconds between redraws of the history plot while running
TABLE_INTERVAL = 1.0  # seconds between updates of the running run's row in the runs table
PAUSE_POLL = 0.05  # how often a paused worker looks for requests
FIELD_BUDGET = 1 << 30  # bytes of finished fields kept for the runs table (older ones are released)
WIDE = (120, 34)  # columns and rows from which every panel is shown at once
PANELS = ("field", "history", "runs")


# -- worker <-> UI ---------------------------------------------------------------


class SolveControl:
    """Requests from the UI thread to the solve worker (every method is thread-safe)."""

    def __init__(self, viewport: Viewport | None, paused: bool = False) -> None:
        self._lock = threading.Lock()
        self.wake = threading.Event()
        self._paused = paused
        self._steps = 0
        self._omegas: list = []
        self._viewport = viewport
        self._serial = 0
        self.stopping = False
        self.quitting = False
        self.run = None  # the Run, for cancel() (thread-safe) from the UI thread

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

    def set_view(self, viewport: Viewport) -> None:
        with self._lock:
            self._viewport = viewport
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

    def view(self) -> tuple[Viewport | None, int]:
        with self._lock:
            return self._viewport, self._serial


@dataclass(frozen=True, eq=False)
class HistoryTail:
    """New history rows since the last post (read-only copies)."""

    sweep: np.ndarray
    residual: np.ndarray
    error: np.ndarray
    omega: np.ndarray


def _tail(history, start: int) -> HistoryTail:
    n = len(history)
    arrays = []
    for a in (history.sweep, history.residual, history.estimated_error, history.omega):
        b = np.array(a[start:n], dtype=np.float64)
        b.setflags(write=False)
        arrays.append(b)
    return HistoryTail(*arrays)


class RunRecord:
    """The UI thread's bookkeeping of one run of the session."""

    def __init__(self, run_id: int, run, start: str, omega_auto: bool) -> None:
        self.id = run_id
        self.method = run.method
        self.tolerance = run.tolerance
        self.omega_auto = omega_auto
        self.start = start
        self.status = "preparing"
        self.progress = None
        self.chunks: list[HistoryTail] = []
        self.omega_changes: list[int] = [0]
        self._last_omega: float | None = None
        self.result = None  # SolveResult once finished
        self.run = None  # the finished Run (kept for the latest run only: "continue" reuses its working array)
        self.frame: Frame | None = None
        self.problem: str | None = None
        self.source: "RunRecord | None" = None  # the run it continues from
        self.rate: float | None = None
        self._series = None
        self._series_key = None

    def add(self, progress, tail: HistoryTail) -> None:
        if self.progress is not None and progress.seconds > self.progress.seconds:
            self.rate = (progress.sweeps - self.progress.sweeps) / (progress.seconds - self.progress.seconds)
        self.progress = progress
        if tail.sweep.size:
            self.chunks.append(tail)
            omega = tail.omega
            prev = np.concatenate([[omega[0] if self._last_omega is None else self._last_omega], omega[:-1]])
            for k in np.nonzero(omega != prev)[0]:
                self.omega_changes.append(int(tail.sweep[k]) - 1)
            self._last_omega = float(omega[-1])

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

    def row(self) -> RunRow:
        p = self.progress
        return RunRow(
            run_id=self.id,
            method=self.method,
            omega=None if p is None or self.status == "preparing" else p.omega,
            omega_auto=self.omega_auto,
            tolerance=self.tolerance,
            sweeps=0 if p is None else p.sweeps,
            seconds=0.0 if p is None else p.seconds,
            status=self.status,
            factor=None if p is None else p.factor,
            start=self.start,
            message=self.problem or ("" if p is None else p.message),
        )

    @property
    def field_bytes(self) -> int:
        f = None if self.result is None else self.result.field
        return 0 if f is None else int(f.nbytes)


def _boundary_range(case, initial: np.ndarray) -> tuple[float, float] | None:
    values = [r.value for r in case.regions if r.value is not None]
    values += [r.ambient for r in case.regions if r.ambient is not None]
    finite = initial[np.isfinite(initial)]
    if finite.size:
        values += [float(finite.min()), float(finite.max())]
    if not values:
        return None
    return (float(min(values)), float(max(values)))


def _while_open(handler):
    """Run a handler only while the main screen is up: worker messages and timers that
    arrive before mounting or during shutdown (widgets already gone) are dropped."""

    @functools.wraps(handler)
    def wrapper(self, *args, **kwargs):
        if self._gone():
            return None
        try:
            return handler(self, *args, **kwargs)
        except NoMatches:
            if self._closing_down():
                return None
            raise

    return wrapper


# -- small widgets ----------------------------------------------------------------


# -- the app -------------------------------------------------------------------------


class RelaxApp(App):
    """Watch and tune steady-state field solves of one case."""

    CSS_PATH = Path(__file__).with_name("relaxtui.tcss")
    TITLE = "relaxtui"
    ENABLE_COMMAND_PALETTE = False

    BINDINGS = [
        Binding("s", "start", "Start"),
        Binding("c", "continue_run", "Continue"),
        Binding("space", "pause", "Pause/Go", key_display="space"),
        Binding("n", "step", "Step"),
        Binding("x", "stop", "Stop"),
        Binding("e", "export", "Export"),
        Binding("question_mark,f1", "help", "Help", key_display="?"),
        Binding("q", "quit", "Quit"),
        Binding("1", "panel('field')", "Field", show=False),
        Binding("2", "panel('history')", "History", show=False),
        Binding("3", "panel('runs')", "Runs", show=False),
        Binding("m", "focus_param('method')", "Method", show=False),
        Binding("o", "focus_param('omega')", "Omega", show=False),
        Binding("t", "focus_param('tolerance')", "Tolerance", show=False),
    ]

    phase = reactive("loading")

    # Messages from the workers (posted from their threads; thread-safe).
    class Loaded(Message):
        def __init__(self, case, operator, layout, initial, seconds) -> None:
            super().__init__()
            self.case, self.operator, self.layout, self.initial, self.seconds = case, operator, layout, initial, seconds

    class LoadFailed(Message):
        def __init__(self, text: str) -> None:
            super().__init__()
            self.text = text

    class RunPrepared(Message):
        def __init__(self, run_id: int, progress, seconds: float) -> None:
            super().__init__()
            self.run_id, self.progress, self.seconds = run_id, progress, seconds

    class RunProgress(Message):
        def __init__(self, run_id: int, progress, tail: HistoryTail, frame: Frame | None) -> None:
            super().__init__()
            self.run_id, self.progress, self.tail, self.frame = run_id, progress, tail, frame

    class RunFrame(Message):
        def __init__(self, run_id: int, frame: Frame) -> None:
            super().__init__()
            self.run_id, self.frame = run_id, frame

    class RunFinished(Message):
        def __init__(self, run_id: int, result, run) -> None:
            super().__init__()
            self.run_id, self.result, self.run = run_id, result, run

    class RunFailed(Message):
        def __init__(self, run_id: int, text: str) -> None:
            super().__init__()
            self.run_id, self.text = run_id, text

    class OmegaApplied(Message):
        def __init__(self, run_id: int, text: str, ok: bool) -> None:
            super().__init__()
            self.run_id, self.text, self.ok = run_id, text, ok

    class Exported(Message):
        def __init__(self, paths: list[Path] | None, text: str = "") -> None:
            super().__init__()
            self.paths, self.text = paths, text

    def __init__(self, case_path, *, method=None, omega=None, tolerance=None, max_sweeps=None, run=False) -> None:
        super().__init__()
        self.case_path = Path(case_path)
        self.cli = {"method": method, "omega": omega, "tolerance": tolerance, "max_sweeps": max_sweeps}
        self.autostart = bool(run)
        self.case = None
        self.operator = None
        self.layout: CellLayout | None = None
        self.initial_field: np.ndarray | None = None
        self.records: list[RunRecord] = []
        self.active: RunRecord | None = None
        self.control: SolveControl | None = None
        self.selected: int | None = None
        self.panel = "field"
        self.problem: str | None = None
        self._plans: dict = {}
        self._plot_dirty = True
        self._table_time = 0.0
        self.load_seconds: float | None = None
        self.last_export: list[Path] = []
        self._mounted = False
        self.main = None  # the main screen, once mounted
        self._exit_requested = False

    # -- building ----------------------------------------------------------------------
    def compose(self) -> ComposeResult:
        from relaxtui.solver.methods import METHODS
        from relaxtui.solver.methods import METHOD_NAMES

        methods = [m for m in METHOD_NAMES if m in METHODS]
        omega = self.cli["omega"]
        yield Banner(id="banner")
        with Horizontal(id="body"):
            with Container(id="deck", classes="-show-field"):
                yield FieldView(id="field", classes="deck-panel")
                yield HistoryPanel(id="history", classes="deck-panel")
                yield RunsPanel(id="runs", classes="deck-panel")
            with Vertical(id="side"):
                yield TimingPanel(id="timing")
                yield ParamsPanel(
                    methods,
                    method=self.cli["method"] or model.DEFAULT_METHOD,
                    omega="auto" if omega in (None, "auto") else f"{omega:g}",
                    tolerance=f"{self.cli['tolerance'] or model.DEFAULT_TOLERANCE:g}",
                    max_sweeps=str(self.cli["max_sweeps"] or model.DEFAULT_MAX_SWEEPS),
                    id="params",
                )
        yield StatusStrip(id="status")
        yield Footer()

    def on_mount(self) -> None:
        # Widgets are looked up on the main screen, also while a dialog is on top.
        self.main = self.screen
        self.main.query_one("#field").border_title = "Field"
        self.main.query_one("#history").border_title = "Residual history"
        self.main.query_one("#runs").border_title = "Runs"
        self.main.query_one("#timing").border_title = "Timing"
        self.main.query_one("#params").border_title = "Next run"
        self.main.query_one(FieldView).mono = self.no_color
        self._apply_layout()
        self._update_banner()
        self._update_status()
        self.main.query_one(HistoryPanel).show(None)
        self.main.query_one(FieldView).focus()
        self.set_interval(PLOT_INTERVAL, self._refresh_plot)
        self._mounted = True
        self._load()

    @_while_open
    def on_resize(self) -> None:
        self._apply_layout()

    def _gone(self) -> bool:
        """True before mounting and while shutting down (late worker messages are dropped)."""
        return self.main is None or not self.main.is_attached or self._closing_down()

    def _closing_down(self) -> bool:
        return self._exit_requested or not self.is_running

    def exit(self, *args, **kwargs) -> None:
        self._exit_requested = True
        super().exit(*args, **kwargs)

    def _apply_layout(self) -> None:
        wide = self.size.width >= WIDE[0] and self.size.height >= WIDE[1]
        self.main.set_class(wide, "-wide")
        self.main.set_class(not wide, "-compact")
        self.main.query_one(TimingPanel).note_lines = 8 if wide else 2

    @property
    def wide(self) -> bool:
        return self.main is not None and self.main.has_class("-wide")

    # -- loading -----------------------------------------------------------------------------
    @work(thread=True, exclusive=True, group="load", name="load case")
    def _load(self) -> None:
        t0 = time.perf_counter()
        try:
            from relaxtui.case import load_case

            case = load_case(self.case_path)
            from relaxtui.solver.operator import Operator

            operator = Operator(case)
            layout = CellLayout.from_case(case)
            initial = operator.finish(operator.new_field())
        except RelaxError as exc:
            self.post_message(self.LoadFailed(str(exc)))
            return
        self.post_message(self.Loaded(case, operator, layout, initial, time.perf_counter() - t0))

    @_while_open
    def on_relax_app_loaded(self, msg: Loaded) -> None:
        self.case, self.operator, self.layout, self.initial_field = msg.case, msg.operator, msg.layout, msg.initial
        self.load_seconds = msg.seconds
        case = self.case
        params = self.main.query_one(ParamsPanel)
        s = case.solver
        if self.cli["method"] is None and s.method:
            params.query_one("#param-method", Select).value = s.method
        if self.cli["omega"] is None and s.omega is not None:
            params.query_one("#param-omega", Input).value = "auto" if s.omega == "auto" else f"{s.omega:g}"
        if self.cli["tolerance"] is None and s.tolerance is not None:
            params.query_one("#param-tolerance", Input).value = f"{s.tolerance:g}"
        if self.cli["max_sweeps"] is None and s.max_sweeps is not None:
            params.query_one("#param-max-sweeps", Input).value = str(s.max_sweeps)
        params.set_unit(case.unit)
        self.main.query_one(TimingPanel).unit = case.unit
        self.phase = "ready"
        self.main.query_one(TimingPanel).show(None, note=f"case loaded in {msg.seconds:.2f} s; s starts a run")
        self.main.query_one(FieldView).set_case(case, case.unit, _boundary_range(case, self.initial_field))
        if self.autostart:
            self.action_start()

    @_while_open
    def on_relax_app_load_failed(self, msg: LoadFailed) -> None:
        self.phase = "load-failed"
        self.problem = msg.text
        self.main.query_one(FieldView).set_placeholder("the case could not be loaded (see below); q quits")
        self._update_status()

    # -- the field panel ---------------------------------------------------------------------
    @_while_open
    def on_field_view_view_changed(self, msg: FieldView.ViewChanged) -> None:
        rec = self._selected()
        if self.control is not None:
            self.control.set_view(msg.viewport)
        if rec is not None and rec is self.active and rec.frame is not None:
            return  # the worker answers with a frame from the live field
        self._show_owned_frame(msg.viewport)

    def _plan(self, vp: Viewport) -> SamplingPlan:
        plan = self._plans.get(vp.plan_key)
        if plan is None:
            plan = SamplingPlan(self.layout, vp)
            self._plans = {vp.plan_key: plan}
        return plan

    def _owned_field(self, rec: RunRecord | None):
        if rec is None:
            return self.initial_field, "initial guess"
        if rec.result is not None and rec.result.field is not None:
            return rec.result.field, f"run {rec.id} · {rec.status} · {group(rec.progress.sweeps)} sweeps"
        if rec.result is None and rec.frame is None:  # preparing: show where it starts from
            src = rec.source
            if src is None:
                return self.initial_field, f"run {rec.id} preparing · from the initial guess"
            if src.result is not None and src.result.field is not None:
                return src.result.field, f"run {rec.id} preparing · from run {src.id}"
        return None, ""

    def _show_owned_frame(self, vp: Viewport | None = None) -> None:
        view = self.main.query_one(FieldView)
        vp = vp or view.viewport
        if vp is None or self.layout is None:
            return
        rec = self._selected()
        field, label = self._owned_field(rec)
        if field is None:
            view.show_frame(rec.frame if rec is not None else None)
            return
        view.show_frame(self._plan(vp).frame(field, cursor=vp.cursor, label=label, viewport=vp))

    # -- starting runs ---------------------------------------------------------------------
    def _ready_for_run(self) -> bool:
        if self.phase == "loading":
            self._refuse("the case is still loading")
            return False
        if self.phase == "load-failed":
            self._refuse(f"the case could not be loaded: {self.problem}")
            return False
        if self.active is not None:
            self._refuse(f"run #{self.active.id} is in progress: space pauses or resumes it, x stops it")
            return False
        return True

    def _begin(self, start_from: RunRecord | None, paused: bool = False, one_step: bool = False) -> RunRecord | None:
        from relaxtui.solver.driver import Run

        if not self._ready_for_run():
            return None
        params = self.main.query_one(ParamsPanel)
        kwargs = {}
        start = "the initial guess"
        if start_from is not None:
            if start_from.run is not None:
                kwargs["field"] = start_from.run.field
            elif start_from.result is not None and start_from.result.field is not None:
                kwargs["initial"] = start_from.result.field
            else:
                self._refuse(f"run #{start_from.id} has no field to continue from")
                return None
            start = f"run #{start_from.id}"
        try:
            options = params.read()
            run = Run(self.case, operator=self.operator, **options, **kwargs)
        except RelaxError as exc:
            self._refuse(str(exc))
            return None
        self.problem = None
        rec = RunRecord(len(self.records) + 1, run, start, options["omega"] == "auto")
        rec.source = start_from
        self.records.append(rec)
        view = self.main.query_one(FieldView)
        control = SolveControl(view.viewport, paused=paused)
        if one_step:
            control.step_once()
        control.run = run
        self.active, self.control = rec, control
        self.phase = "preparing"
        self.main.query_one(RunsPanel).set_row(rec.row())
        self._select(rec.id)
        self._solve(rec.id, run, control)
        return rec

    def action_start(self) -> None:
        self._begin(None)

    def action_continue_run(self) -> None:
        src = self._selected() or (self.records[-1] if self.records else None)
        if src is None:
            if self._ready_for_run():
                self._refuse("no run to continue from yet: s starts one from the initial guess")
            return
        self._begin(src)

    # -- the solve worker ------------------------------------------------------------------
    @work(thread=True, exclusive=True, group="solve", name="solve")
    def _solve(self, run_id: int, run, control: SolveControl) -> None:
        worker = get_current_worker()
        post = self.post_message
        t0 = time.perf_counter()
        try:
            run.prepare()
        except RelaxError as exc:
            post(self.RunFailed(run_id, str(exc)))
            return
        post(self.RunPrepared(run_id, run.progress, time.perf_counter() - t0))
        plan: SamplingPlan | None = None
        sent = 0
        last_frame = -math.inf
        serial_done = -1

        def snapshot(progress) -> Frame | None:
            nonlocal plan, serial_done
            vp, serial = control.view()
            if vp is None:
                return None
            if plan is None or plan.viewport.plan_key != vp.plan_key:
                plan = SamplingPlan(self.layout, vp)
            serial_done = serial
            label = f"run {run_id} · sweep {group(progress.sweeps)}"
            return plan.frame(run.view(), cursor=vp.cursor, label=label, viewport=vp)

        post(self.RunFrame(run_id, snapshot(run.progress)))
        while not run.done:
            if worker.is_cancelled or control.stopping:
                run.cancel()
            for omega in control.take_omegas():
                try:
                    run.set_omega(omega)
                    post(self.OmegaApplied(run_id, f"run #{run_id}: ω {run.omega:.4f} from sweep {group(run.progress.sweeps)} ({run.omega_note})", True))
                except RelaxError as exc:
                    post(self.OmegaApplied(run_id, str(exc), False))
            one = False
            if control.paused and not control.stopping and not worker.is_cancelled:
                one = control.take_step()
                if not one:
                    if control.view()[1] != serial_done:
                        post(self.RunFrame(run_id, snapshot(run.progress)))
                    control.wake.wait(PAUSE_POLL)
                    control.wake.clear()
                    continue
            progress = run.step(0.0 if one else STEP_SECONDS)
            tail = _tail(run.history, sent)
            sent += tail.sweep.size
            frame = None
            now = time.perf_counter()
            if run.done or one or now - last_frame >= FRAME_INTERVAL or control.view()[1] != serial_done:
                frame = snapshot(progress)
                last_frame = now
            post(self.RunProgress(run_id, progress, tail, frame))
        if control.quitting or worker.is_cancelled:
            return
        result = run.result()
        post(self.RunFinished(run_id, result, run))

    def _record(self, run_id: int) -> RunRecord | None:
        return self.records[run_id - 1] if 0 < run_id <= len(self.records) else None

    @_while_open
    def on_relax_app_run_prepared(self, msg: RunPrepared) -> None:
        rec = self._record(msg.run_id)
        if rec is None:
            return
        rec.progress = msg.progress
        rec.status = "paused" if self.control is not None and self.control.paused else "running"
        if rec is self.active:
            self.phase = rec.status
        self._refresh_run(rec)

    @_while_open
    def on_relax_app_run_frame(self, msg: RunFrame) -> None:
        rec = self._record(msg.run_id)
        if rec is None or msg.frame is None:
            return
        rec.frame = msg.frame
        if rec.id == self.selected:
            self.main.query_one(FieldView).show_frame(msg.frame)

    @_while_open
    def on_relax_app_run_progress(self, msg: RunProgress) -> None:
        rec = self._record(msg.run_id)
        if rec is None:
            return
        rec.add(msg.progress, msg.tail)
        if msg.progress.status is None and rec is self.active:
            rec.status = "paused" if self.control.paused else "running"
        if msg.frame is not None:
            rec.frame = msg.frame
            if rec.id == self.selected:
                self.main.query_one(FieldView).show_frame(msg.frame)
        self._plot_dirty = True
        self._refresh_run(rec, live=True)

    @_while_open
    def on_relax_app_run_finished(self, msg: RunFinished) -> None:
        rec = self._record(msg.run_id)
        if rec is None:
            return
        rec.result = msg.result
        rec.run = msg.run
        rec.progress = msg.run.progress
        rec.status = msg.result.report.get("status") or msg.run.status
        for other in self.records:
            if other is not rec:
                other.run = None  # only the latest run keeps its working array
        self._release_fields()
        if rec is self.active:
            self.active, self.control = None, None
            self.phase = "ready"
        self._plot_dirty = True
        self._refresh_run(rec)
        if rec.id == self.selected:
            self._show_owned_frame()
        severity = "information" if rec.status == "converged" else "warning"
        self._tell(f"run #{rec.id} {rec.status} after {group(rec.progress.sweeps)} sweeps", title="finished", severity=severity, timeout=4)

    @_while_open
    def on_relax_app_run_failed(self, msg: RunFailed) -> None:
        rec = self._record(msg.run_id)
        if rec is None:
            return
        rec.status = "failed"
        rec.problem = msg.text
        if rec is self.active:
            self.active, self.control = None, None
            self.phase = "ready"
        self._refuse(msg.text)
        self._refresh_run(rec)

    @_while_open
    def on_relax_app_omega_applied(self, msg: OmegaApplied) -> None:
        if msg.ok:
            self._tell(msg.text, title="ω changed", timeout=4)
        else:
            self._refuse(msg.text)

    def _release_fields(self) -> None:
        """Keep finished fields within FIELD_BUDGET (never the shown or the latest run's)."""
        total = sum(r.field_bytes for r in self.records)
        for r in self.records[:-1]:
            if total <= FIELD_BUDGET:
                break
            if r.id != self.selected and r.field_bytes:
                total -= r.field_bytes
                r.result.field = None
                r.problem = "field released to save memory (report and history kept)"

    # -- controlling the running solve ----------------------------------------------------
    def action_pause(self) -> None:
        if self.active is None:
            self._refuse("no run in progress: s starts one")
            return
        self._ok()
        if self.control.paused:
            self.control.resume()
            self.active.status = "running" if self.phase != "preparing" else "preparing"
        else:
            self.control.pause()
            self.active.status = "paused" if self.phase != "preparing" else "preparing"
        if self.phase != "preparing":
            self.phase = self.active.status
        self._refresh_run(self.active)

    def action_step(self) -> None:
        if self.active is None:
            rec = self._begin(None, paused=True, one_step=True)
            if rec is not None:
                self._tell(f"run #{rec.id} paused after one chunk: n steps again, space runs on", timeout=4)
            return
        self._ok()
        if not self.control.paused:
            self.control.pause()
            if self.phase != "preparing":
                self.phase = "paused"
            self.active.status = "paused"
        self.control.step_once()
        self._refresh_run(self.active)

    def action_stop(self) -> None:
        if self.active is None:
            self._refuse("no run in progress")
            return
        self._ok()
        self.control.stop()
        self.phase = "stopping"

    @_while_open
    def on_params_panel_omega_submitted(self, msg: ParamsPanel.OmegaSubmitted) -> None:
        try:
            omega = parse_omega(msg.text)
        except RelaxError as exc:
            self._refuse(str(exc))
            return
        if self.active is not None and self.phase != "stopping":
            self.control.request_omega(omega)
        else:
            shown = "auto" if omega == "auto" else f"{omega:g}"
            self._tell(f"ω {shown} will be used by the next run (s starts it)", timeout=3)

    # -- choosing runs -------------------------------------------------------------------------
    def _selected(self) -> RunRecord | None:
        return self._record(self.selected) if self.selected is not None else None

    def _select(self, run_id: int | None) -> None:
        self.selected = run_id
        self.main.query_one(RunsPanel).select(run_id)
        rec = self._selected()
        if rec is not None and rec is self.active and rec.frame is not None:
            self.main.query_one(FieldView).show_frame(rec.frame)
        else:
            self._show_owned_frame()
        self._plot_dirty = True
        self._refresh_plot()
        self._refresh_run(rec)

    @_while_open
    def on_runs_panel_run_chosen(self, msg: RunsPanel.RunChosen) -> None:
        self._ok()
        self._select(msg.run_id)
        self._tell(f"showing run #{msg.run_id}", timeout=2)

    # -- refreshing panels ------------------------------------------------------------------------
    def _refresh_run(self, rec: RunRecord | None, live: bool = False) -> None:
        """Show a run's state; ``live`` progress updates the table at most every TABLE_INTERVAL."""
        if rec is not None:
            now = time.monotonic()
            if not live or now - self._table_time >= TABLE_INTERVAL:
                self._table_time = now
                self.main.query_one(RunsPanel).set_row(rec.row())
        if rec is None or rec.id == self.selected:
            timing = self.main.query_one(TimingPanel)
            if rec is None:
                timing.show(None)
            else:
                note = "preparing: assembling, estimating ω, compiling kernels…" if rec.status == "preparing" else None
                timing.show(rec.progress if rec.status != "preparing" else None, rec.rate, note=note)
            self._update_status()
        self._update_banner()

    @_while_open
    def _refresh_plot(self) -> None:
        if not self._plot_dirty:
            return
        panel = self.main.query_one(HistoryPanel)
        if not panel.display:
            return  # hidden (one panel at a time at 80 columns): drawn when shown
        self._plot_dirty = False
        rec = self._selected()
        others = [r.series() for r in self.records if r is not rec and r.status != "failed"]
        self.main.query_one(HistoryPanel).show(rec.series() if rec is not None else None, others[-5:])

    def watch_phase(self, phase: str) -> None:
        if self._mounted and not self._gone():
            self._update_banner()
            self._update_status()

    def _update_banner(self) -> None:
        banner = self.main.query_one(Banner)
        case = self.case
        if case is None:
            text = f"{self.case_path.name}"
        else:
            rows, cols = case.shape
            what = case.title or case.name
            unit = f" [{case.unit}]" if case.unit else ""
            text = f"{what} · {rows}×{cols} cells · h {case.cell_size:g} m · {case.quantity}{unit}"
        a = self.active
        phase = {
            "loading": ("loading the case…", "bold yellow"),
            "load-failed": ("cannot load", "bold red"),
            "ready": ("ready", "bold green"),
            "preparing": (f"preparing #{a.id}…" if a else "preparing…", "bold yellow"),
            "running": (f"● running #{a.id} · {group(a.progress.sweeps)} sweeps" if a and a.progress else "● running", "bold yellow"),
            "paused": (f"‖ paused #{a.id} · {group(a.progress.sweeps)} sweeps" if a and a.progress else "‖ paused", "bold cyan"),
            "stopping": ("stopping…", "bold"),
        }.get(self.phase, (self.phase, "bold"))
        banner.show(text, *phase)

    def _update_status(self) -> None:
        status = self.main.query_one(StatusStrip)
        rec = self._selected()
        if self.phase == "loading":
            status.show(f"loading {self.case_path.name}: reading the picture, assembling the operator…")
            return
        if self.phase == "load-failed":
            status.show("the case could not be loaded", problem=self.problem)
            return
        if rec is None:
            status.show("ready — s starts a run, ? lists every key", problem=self.problem)
            return
        head = f"#{rec.id} {rec.method}"
        if rec.status == "preparing":
            head += " preparing (assembly, ω estimate, kernel compilation)"
        report = rec.result.report if rec.result is not None else None
        status.show(head, rec.progress if rec.status != "preparing" else None, report, self.problem or rec.problem)

    def _tell(self, text: str, **kwargs) -> None:
        """A toast; the text is shown as it is (paths and messages may hold brackets)."""
        self.notify(text, markup=False, **kwargs)

    def _ok(self) -> None:
        """A request went through: forget the last refusal."""
        if self.problem is not None:
            self.problem = None
            self._update_status()

    def _refuse(self, text: str) -> None:
        """Bad input or an impossible request: say so, in the UI, and carry on."""
        self.problem = text
        self._tell(text, title="refused", severity="error", timeout=5)
        self._update_status()

    # -- panels and focus -------------------------------------------------------------------------
    def action_panel(self, name: str) -> None:
        self.panel = name
        deck = self.main.query_one("#deck")
        for p in PANELS:
            deck.set_class(p == name, f"-show-{p}")
        self.main.query_one("#body").set_class(name == "runs", "-runs-view")
        target = {"field": FieldView, "history": HistoryPanel, "runs": RunsPanel}[name]
        widget = self.main.query_one(target)
        if name == "runs":
            self.main.query_one("#runs-table").focus()
        elif name == "field":
            widget.focus()
        else:
            self.set_focus(None)
        if name == "history":
            self._plot_dirty = True
            self.call_after_refresh(self._refresh_plot)

    def action_focus_panel(self) -> None:
        self.action_panel(self.panel)

    def action_focus_param(self, which: str) -> None:
        self.main.query_one(f"#param-{which}").focus()

    # -- export --------------------------------------------------------------------------------------
    def action_export(self) -> None:
        rec = self._selected()
        if rec is None:
            self._refuse("no run to export yet")
            return
        if rec.result is None:
            self._refuse(f"run #{rec.id} is still going: stop it (x) or let it finish, then export")
            return
        if rec.result.field is None:
            self._refuse(f"run #{rec.id}'s field was released to save memory; run it again to export")
            return
        from relaxtui.solver.driver import check_outputs

        base = f"{self.case.name}-run{rec.id}"
        defaults = {"out": f"{base}.npy", "report": f"{base}.json", "history": f"{base}.csv"}

        def check(out=None, report=None, history=None):
            check_outputs(field=out, report=report, history=history)

        def done(paths):
            if paths:
                self._export(rec.result, paths)

        self.push_screen(ExportScreen(f"run #{rec.id}", defaults, check), done)

    @work(thread=True, group="export", name="export")
    def _export(self, result, paths: dict) -> None:
        from relaxtui.solver.driver import write_outputs

        try:
            written = write_outputs(result, out=paths.get("out"), report=paths.get("report"), history=paths.get("history"))
        except (RelaxError, OSError) as exc:
            self.post_message(self.Exported(None, str(exc)))
            return
        self.post_message(self.Exported(written))

    @_while_open
    def on_relax_app_exported(self, msg: Exported) -> None:
        if msg.paths is None:
            self._refuse(f"export failed: {msg.text}")
            return
        self._ok()
        names = ", ".join(str(p) for p in msg.paths)
        self.last_export = list(msg.paths)
        self._tell(f"wrote {names}", title="exported", timeout=8)

    # -- help and quitting ----------------------------------------------------------------------------
    def action_help(self) -> None:
        self.push_screen(HelpScreen())

    async def action_quit(self) -> None:
        if self.active is None:
            self.exit()
            return

        def answer(yes: bool | None) -> None:
            if yes:
                if self.control is not None:
                    self.control.stop(quitting=True)
                self.exit()

        self.push_screen(ConfirmQuit(f"run #{self.active.id}"), answer)
