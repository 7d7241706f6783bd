"""The relaxtui terminal UI (``relaxtui open CASE.toml``): composes the panels and routes.

The session's runs and their states live in :mod:`relaxtui.tui.session`, the
solve worker's loop in :mod:`relaxtui.tui.worker` (both without Textual); the
app turns keys into session transitions, worker events into panel updates
(:mod:`relaxtui.tui.refresh`), and owns the worker threads. Solve and load
threads are daemon threads: quitting never waits for a preparation or a chunk.

A stop signal (SIGHUP, SIGTERM, SIGINT: see :mod:`relaxtui.commands.open`) is not the
app's business beyond leaving: ``stop_requested()`` turns true, the app exits at its next
look (every ``STOP_POLL`` seconds) and starts no new run meanwhile, while a thread of the
command saves the runs without the screen (:func:`relaxtui.tui.worker.save_on_signal`).
"""

from __future__ import annotations

import threading
from pathlib import Path

from textual import events
from textual.app import App, ComposeResult
from textual.binding import Binding
from textual.containers import Container, Horizontal, Vertical
from textual.widgets import Footer, Input

from relaxtui.case import model
from relaxtui.errors import RelaxError
from relaxtui.tui import worker as w
from relaxtui.tui.banner import Banner
from relaxtui.tui.dialogs import ConfirmQuit, HelpScreen
from relaxtui.tui.fieldview import FieldView
from relaxtui.tui.history import HistoryPanel
from relaxtui.tui.messages import WorkerEvent, hidden_keys, while_open as _while_open
from relaxtui.tui.omega_study import OmegaPanel
from relaxtui.tui.params import ParamsPanel
from relaxtui.tui.controls import Controls
from relaxtui.tui.refresh import Refresher
from relaxtui.tui.runs import RunsPanel
from relaxtui.tui.session import Session
from relaxtui.tui.status import StatusStrip
from relaxtui.tui.timing import TimingPanel

PLOT_INTERVAL = 1.0  # seconds between redraws of the history plot while running
STOP_POLL = 0.1  # seconds between looks at a stop signal's request
WIDE = (120, 34)  # columns and rows from which every panel is shown at once
PANELS = ("field", "history", "runs", "omega")
# Keys that move the focus into a field: run when read (not after the keys queued behind them),
# so that "m→→" typed in one burst turns the method instead of moving the probe.
FOCUS_KEYS = {"m": "focus_param('method')", "o": "focus_param('omega')", "t": "focus_param('tolerance')",
              "p": "focus_param('precision')",
              "r": "focus_study('scan')", "l": "focus_study('csv')"}


def release_resume_signals() -> None:
    """SIGCONT and SIGTSTP back to their default actions: the UI is leaving, nothing to suspend or resume
    (main thread only)."""
    import signal

    for name in ("SIGCONT", "SIGTSTP"):
        if hasattr(signal, name):
            signal.signal(getattr(signal, name), signal.SIG_DFL)


class RelaxApp(Controls, Refresher, App):
    """Watch and tune steady-state field solves of one case."""

    CSS_PATH = Path(__file__).with_name("relaxtui.tcss")
    TITLE = "relaxtui"
    ENABLE_COMMAND_PALETTE = False

    BINDINGS = [
        Binding("s", "start", "Start"),
        Binding("c", "continue_run", "Continue"),
        Binding("space", "pause", "Pause", key_display="space"),
        Binding("x", "stop", "Stop"),
        Binding("v", "cycle_view", "View"),
        Binding("w", "panel('omega')", "ω"),
        Binding("e", "export", "Export"),
        Binding("question_mark,f1", "help", "Help", key_display="?"),
        Binding("q", "quit", "Quit"),
    ] + hidden_keys(
        ("n", "step", "Step"), ("1", "panel('field')", "Field"), ("2", "panel('history')", "History"),
        ("3", "panel('runs')", "Runs"), ("4", "panel('omega')", "ω study"), ("h", "toggle_held", "Held values"),
        ("a", "toggle_span", "All runs"), ("m", "focus_param('method')", "Method"),
        ("o", "focus_param('omega')", "Omega"), ("t", "focus_param('tolerance')", "Tolerance"),
        ("p", "focus_param('precision')", "Precision"),
        ("r", "focus_study('scan')", "ω scan range"), ("l", "focus_study('csv')", "Load a sweep CSV"),
    )

    def __init__(self, case_path, *, method=None, omega=None, tolerance=None, max_sweeps=None, precision=None,
                 run=False, stop_requested=None) -> None:
        super().__init__()
        self.stop_requested = stop_requested  # callable: a stop signal has come (the command saves the runs)
        self.case_path = Path(case_path)
        self.cli = {"method": method, "omega": omega, "tolerance": tolerance, "max_sweeps": max_sweeps,
                    "precision": precision}
        self.autostart = bool(run)
        self.case = self.operator = self.layout = self.initial_field = None
        self.session = Session()
        self.load_state = "loading"  # loading, load-failed, loaded
        self.panel = "field"
        self.problem: str | None = None
        self.load_seconds: float | None = None
        self.last_export: list[Path] = []
        self.main = None  # the main screen, once mounted
        self._exit_requested = False
        self.view_mode = "solution"
        self.show_all_runs = False
        self.scan: list = []  # ω values still to run in a scan started from the ω panel
        self.threads: list[threading.Thread] = []
        self._init_refresher()

    # -- the session's state, for the panels and the tests -------------------------------
    records = property(lambda self: self.session.records)
    active = property(lambda self: self.session.active)
    control = property(lambda self: self.session.control)
    selected = property(lambda self: self.session.selected)

    @property
    def phase(self) -> str:
        return self.load_state if self.load_state != "loaded" else self.session.state()

    @property
    def wide(self) -> bool:
        return self.main is not None and self.main.has_class("-wide")

    # -- building ----------------------------------------------------------------------------
    def compose(self) -> ComposeResult:
        from relaxtui.solver.methods import METHODS
        from relaxtui.solver.methods import METHOD_NAMES

        omega = self.cli["omega"]
        yield Banner(id="banner")
        with Horizontal(id="body"):
            with Container(id="deck", classes="-show-field"):
                yield FieldView(id="field", classes="deck-panel")
                yield HistoryPanel(id="history", classes="deck-panel")
                yield RunsPanel(id="runs", classes="deck-panel")
                yield OmegaPanel(id="omega", classes="deck-panel")
            with Vertical(id="side"):
                yield TimingPanel(id="timing")
                yield ParamsPanel(
                    [m for m in METHOD_NAMES if m in METHODS],
                    method=self.cli["method"] or model.DEFAULT_METHOD,
                    omega="auto" if omega in (None, "auto") else f"{omega:g}",
                    tolerance=f"{self.cli['tolerance'] or model.DEFAULT_TOLERANCE:g}",
                    max_sweeps=str(self.cli["max_sweeps"] or model.DEFAULT_MAX_SWEEPS),
                    precision=self.cli["precision"] or "double",
                    id="params",
                )
        yield StatusStrip(id="status")
        yield Footer(compact=True)

    def on_mount(self) -> None:
        self.main = self.screen  # widgets are looked up on the main screen, also under a dialog
        titles = {"#field": "Field", "#history": "Residual history", "#runs": "Runs", "#omega": "ω study",
                  "#timing": "Timing"}  # the Next run panel titles itself (a warning can take the title)
        for sel, title in titles.items():
            self.main.query_one(sel).border_title = title
        self.main.query_one(FieldView).mono = self.no_color
        self._apply_layout()
        self.update_texts()
        self.main.query_one(HistoryPanel).show(None)
        self.main.query_one(FieldView).focus()
        self.set_interval(PLOT_INTERVAL, self.refresh_plot)
        if self.stop_requested is not None:
            self.set_interval(STOP_POLL, self._leave_on_stop_signal)
        self._thread(w.load_case, self.case_path, self._post)

    def _leave_on_stop_signal(self) -> None:
        if not self._exit_requested and self.stop_requested():
            # Textual's SIGCONT handler resumes the screen and needs the event loop: one that came after
            # the loop has ended (a stopped and continued save) would raise in the main thread
            release_resume_signals()
            self.exit()

    async def on_event(self, event) -> None:
        if (isinstance(event, events.Key) and not event.is_forwarded and event.key in FOCUS_KEYS
                and self.main is not None and self.screen is self.main and not isinstance(self.focused, Input)):
            await self.run_action(FOCUS_KEYS[event.key])
            return
        await super().on_event(event)

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
        self.main.query_one(TimingPanel).note_lines = 8 if wide else 1

    # -- threads and their events ---------------------------------------------------------------
    def _thread(self, target, *args) -> None:
        t = threading.Thread(target=target, args=args, daemon=True, name=getattr(target, "__name__", "worker"))
        self.threads = [x for x in self.threads if x.is_alive()] + [t]
        t.start()

    def _post(self, event) -> None:
        self.post_message(WorkerEvent(event))

    @_while_open
    def on_worker_event(self, msg: WorkerEvent) -> None:
        handler = getattr(self, "on_" + type(msg.event).__name__.lower(), None)
        if handler is not None:
            handler(msg.event)

    def on_loaded(self, ev: w.Loaded) -> None:
        self.case, self.operator, self.layout, self.initial_field = ev.case, ev.operator, ev.layout, ev.initial
        self.load_seconds = ev.seconds
        s, cli = ev.case.solver, self.cli
        params = self.main.query_one(ParamsPanel)
        params.set_defaults(
            method=s.method if cli["method"] is None and s.method else None,
            omega=s.omega if cli["omega"] is None and s.omega is not None else None,
            tolerance=s.tolerance if cli["tolerance"] is None else None,
            max_sweeps=s.max_sweeps if cli["max_sweeps"] is None else None,
            precision=s.precision if cli["precision"] is None and s.precision else None,
        )
        params.set_unit(ev.case.unit)
        self.main.query_one(TimingPanel).unit = ev.case.unit
        self.load_state = "loaded"
        self.main.query_one(TimingPanel).show(None, note=f"case loaded in {ev.seconds:.2f} s; s starts a run")
        self.main.query_one(FieldView).set_case(ev.case, ev.case.unit, w.boundary_range(ev.case, ev.initial))
        self.update_texts()
        if self.autostart:
            self.action_start()

    def on_loadfailed(self, ev: w.LoadFailed) -> None:
        self.load_state = "load-failed"
        self.problem = ev.text
        self.main.query_one(FieldView).set_placeholder("the case could not be loaded (see below); q quits")
        self.update_texts()

    # -- starting runs --------------------------------------------------------------------------
    def _ready_for_run(self) -> bool:
        if self.session.closing:
            self._refuse("a stop signal came: the runs are being saved and the program ends")
        elif self.phase == "loading":
            self._refuse("the case is still loading")
        elif self.phase == "load-failed":
            self._refuse(f"the case could not be loaded: {self.problem}")
        elif self.active is not None:
            self._refuse(f"run #{self.active.id} is in progress: space pauses or resumes it, x stops it")
        else:
            return True
        return False

    def _begin(self, start_from=None, paused=False, one_step=False, omega=None):
        from relaxtui.solver.driver import Run

        if not self._ready_for_run():
            return None
        kwargs, start = {}, "the initial guess"
        if start_from is not None:
            if start_from.run is not None:
                kwargs["field"] = start_from.run.field
            elif start_from.result is not None and start_from.result.field is not None:
                kwargs["initial"] = start_from.result.field
            else:
                self._refuse(f"run #{start_from.id} has no field to continue from")
                return None
            start = f"run #{start_from.id}"
        params = self.main.query_one(ParamsPanel)
        try:
            options = params.read()
            if omega is not None:
                options["omega"] = omega
            run = Run(self.case, operator=self.operator, radius_cache=Path.cwd(), **options, **kwargs)
        except RelaxError as exc:
            self._refuse(str(exc))
            return None
        self.problem = None
        warning = params.warning()
        view = self.main.query_one(FieldView)
        rec = self.session.begin(run, start, options["omega"] == "auto", viewport=view.viewport, paused=paused,
                                 one_step=one_step, source=start_from, view=self.view_mode)
        self.main.query_one(RunsPanel).set_row(self.row(rec))
        self.select(rec.id)
        self._thread(w.solve_loop, rec.id, run, self.session.control, self.layout, self._post)
        if warning:
            self._tell(warning, title="warning", severity="warning", timeout=6)
        return rec

    def action_start(self) -> None:
        self._begin(None)

    def action_continue_run(self) -> None:
        src = self.session.shown() or (self.records[-1] if self.records else None)
        if src is None:
            if self._ready_for_run():
                self._refuse("no run to continue from yet: s starts one from the initial guess")
            return
        self._begin(src)

    # -- panels and focus ----------------------------------------------------------------------
    def action_panel(self, name: str) -> None:
        self.panel = name
        deck = self.main.query_one("#deck")
        for p in PANELS:
            deck.set_class(p == name, f"-show-{p}")
        self.main.query_one("#body").set_class(name in ("runs", "omega"), "-runs-view")
        if name == "runs":
            self.main.query_one(RunsPanel).focus_table()
        elif name == "field":
            self.main.set_focus(self.main.query_one(FieldView))  # at once: the next key goes there
        elif name == "omega":
            self.refresh_study()
            self.main.set_focus(None)
        else:
            self.main.set_focus(None)
        if name == "history":
            self.plot_dirty = True
            self.call_after_refresh(self.refresh_plot)

    def action_focus_panel(self) -> None:
        self.action_panel(self.panel)

    def action_focus_param(self, which: str) -> None:
        self.main.query_one(ParamsPanel).focus_field(which)

    def action_focus_study(self, which: str) -> None:
        if self.panel != "omega":
            self.action_panel("omega")
        self.main.query_one(OmegaPanel).focus_field(which)

    # -- export, help, quitting ---------------------------------------------------------------
    def action_export(self) -> None:
        from relaxtui.tui.exporting import ask_export

        ask_export(self)

    def on_exported(self, ev) -> None:
        if ev.paths is None:
            self._refuse(f"export failed: {ev.text}")
            return
        self._ok()
        self.session.mark_exported(ev.run_id)
        self.last_export = list(ev.paths)
        self._tell(f"wrote {', '.join(str(p) for p in ev.paths)}", title="exported", timeout=8)

    def action_help(self) -> None:
        self.push_screen(HelpScreen())

    async def action_quit(self) -> None:
        if not self.session.in_progress():
            self.session.stop(quitting=True)  # a run still building its report: nothing to lose
            self.exit()
            return

        def answer(yes: bool | None) -> None:
            if yes:
                self.session.stop(quitting=True)
                self.exit()

        self.push_screen(ConfirmQuit(f"run #{self.active.id}"), answer)

    def withdraw_quit_question(self) -> None:
        """The run the quit dialog asks about has ended: the question is void."""
        if isinstance(self.screen, ConfirmQuit):
            self.screen.dismiss(False)
            self._tell("the run has ended: q quits without asking", timeout=4)
