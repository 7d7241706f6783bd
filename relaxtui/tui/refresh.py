"""The app's side of the worker events: session transitions, then panel updates.

:class:`Refresher` is mixed into :class:`relaxtui.tui.app.RelaxApp`; it keeps
the panels in step with the :class:`~relaxtui.tui.session.Session` (the
banner, the field's title and the status strip all read the run's one state).
"""

from __future__ import annotations

import time

from relaxtui.output.text import group
from relaxtui.tui import present
from relaxtui.tui.banner import Banner
from relaxtui.tui.fieldview import FieldView
from relaxtui.tui.history import HistoryPanel
from relaxtui.tui.omega_study import OmegaPanel
from relaxtui.tui.params import ParamsPanel
from relaxtui.tui.runs import RunRow, RunsPanel
from relaxtui.tui.sampling import SamplingPlan
from relaxtui.tui.status import StatusStrip
from relaxtui.tui.timing import TimingPanel

TABLE_INTERVAL = 1.0  # seconds between updates of the running run's row in the runs table


class Refresher:
    """Worker-event handlers and panel refreshes of the app (a mixin)."""

    def _init_refresher(self) -> None:
        self.plot_dirty = True
        self._table_time = 0.0
        self._plans: dict = {}

    # -- worker events ---------------------------------------------------------------------
    def on_preparing(self, ev) -> None:
        rec = self.session.preparing(ev.run_id, ev.text)
        if rec is not None and rec.id == self.selected:
            self.show_run(rec)

    def on_prepared(self, ev) -> None:
        rec = self.session.prepared(ev.run_id, ev.progress, ev.mu, ev.theory)
        if rec is not None:
            self.main.query_one(ParamsPanel).set_radius(ev.mu)
            self.show_run(rec)

    def on_frameready(self, ev) -> None:
        rec = self.session.record(ev.run_id)
        if rec is None or ev.frame is None:
            return
        self.session.keep_frame(rec, ev.frame)
        if rec.id == self.selected:
            self.main.query_one(FieldView).show_frame(ev.frame, rec.status)

    def on_progressed(self, ev) -> None:
        rec = self.session.progressed(ev.run_id, ev.progress, ev.tail, ev.frame, ev.mu, ev.theory)
        if rec is None:
            return
        if ev.frame is not None and rec.id == self.selected:
            self.main.query_one(FieldView).show_frame(ev.frame, rec.status)
        self.plot_dirty = True
        self.show_run(rec, live=True)

    def on_finished(self, ev) -> None:
        rec = self.session.finished(ev.run_id, ev.result, ev.run)
        if rec is None:
            return
        rec.update = ev.update
        self.plot_dirty = True
        self.show_run(rec)
        if rec.id == self.selected:
            self.show_owned_frame()
        severity = "information" if rec.status == "converged" else "warning"
        self._tell(f"run #{rec.id} {rec.status} after {group(rec.progress.sweeps)} sweeps", title="finished", severity=severity, timeout=4)
        self.withdraw_quit_question()
        self.refresh_study()
        self._next_scan()

    def on_failed(self, ev) -> None:
        rec = self.session.failed(ev.run_id, ev.text)
        if rec is None:
            return
        self.scan = []
        self._refuse(ev.text)
        self.show_run(rec)
        self.withdraw_quit_question()

    # -- the shown run ------------------------------------------------------------------------
    def row(self, rec) -> RunRow:
        p = rec.progress
        return RunRow(
            run_id=rec.id, method=rec.method, omega=None if p is None or rec.status == "preparing" else p.omega,
            omega_auto=rec.omega_auto, tolerance=rec.tolerance, sweeps=0 if p is None else p.sweeps,
            seconds=0.0 if p is None else p.seconds, status=rec.status, factor=None if p is None else p.factor,
            start=rec.start, message=rec.problem or ("" if p is None else present.run_message(rec)),
        )

    def select(self, run_id) -> None:
        self.session.selected = run_id
        self.main.query_one(RunsPanel).select(run_id)
        rec = self.session.shown()
        frame = rec.frames.get(self.view_mode) if rec is not None else None
        if rec is not None and rec is self.active and frame is not None:
            self.main.query_one(FieldView).show_frame(frame, rec.status)
        else:
            self.show_owned_frame()
        self.plot_dirty = True
        self.refresh_plot()
        self.show_run(rec)

    def show_run(self, rec, live: bool = False) -> None:
        """Show a run's state; ``live`` progress updates the table at most every TABLE_INTERVAL."""
        if rec is not None:
            now = time.monotonic()
            if not live or now - self._table_time >= TABLE_INTERVAL:
                self._table_time = now
                self.main.query_one(RunsPanel).set_row(self.row(rec))
        if rec is None or rec.id == self.selected:
            timing = self.main.query_one(TimingPanel)
            if rec is None:
                timing.show(None)
            elif rec.status == "preparing":
                timing.show(None, note=f"preparing: {rec.preparing or 'starting'}…")
            else:
                timing.show(rec.progress, rec.rate, to_go=present.to_go_text(rec))
            if rec is not None:
                self.main.query_one(FieldView).set_state(rec.status)
        self.update_texts()

    # -- field frames the UI thread makes itself --------------------------------------------------
    def on_field_view_view_changed(self, msg) -> None:
        if self._gone():
            return
        rec = self.session.shown()
        if self.control is not None:
            self.control.set_view(msg.viewport)
        if rec is not None and rec is self.active and rec.frames.get(self.view_mode) is not None:
            return  # the worker answers with a frame from the live field
        self.show_owned_frame(msg.viewport)

    def _plan(self, vp) -> SamplingPlan:
        plan = self._plans.get(vp.plan_key)
        if plan is None:
            plan = SamplingPlan(self.layout, vp)
            self._plans = {vp.plan_key: plan}
        return plan

    def _owned_field(self, rec):
        """The field the UI thread owns for ``rec`` in the current view, and its label."""
        if rec is None:
            return (self.initial_field, "initial guess") if self.view_mode == "solution" else (None, "")
        if rec.result is not None:
            label = f"run {rec.id} · {rec.status} · {group(rec.progress.sweeps)} sweeps"
            if self.view_mode == "update":
                return getattr(rec, "update", None), label if getattr(rec, "update", None) is not None else ""
            field = rec.result.field
            if field is not None and self.view_mode == "residual":
                base = rec.run.field if rec.run is not None else self.operator.new_field(field)
                return self.operator.residual_field(base), label
            return field, label
        if self.view_mode == "solution" and rec.frame is None:  # preparing: show where it starts from
            src = rec.source
            if src is None:
                return self.initial_field, f"run {rec.id} preparing · from the initial guess"
            if src.result is not None and src.result.field is not None:
                return src.result.field, f"run {rec.id} preparing · from run {src.id}"
        return None, ""

    def show_owned_frame(self, vp=None) -> None:
        view = self.main.query_one(FieldView)
        vp = vp or view.viewport
        if vp is None or self.layout is None:
            return
        rec = self.session.shown()
        field, label = self._owned_field(rec)
        if field is None:
            frame = rec.frames.get(self.view_mode) if rec is not None else None
            if frame is None and self.view_mode == "update" and rec is not None and rec.result is not None:
                view.set_placeholder("no update recorded: switch to this view while a run sweeps")
            view.show_frame(frame, rec.status if rec is not None else "")
            return
        frame = self._plan(vp).frame(field, cursor=vp.cursor, label=label, viewport=vp, mode=self.view_mode)
        view.show_frame(frame, rec.status if rec is not None else "")

    # -- plots and texts --------------------------------------------------------------------------
    def refresh_plot(self) -> None:
        if self._gone() or not self.plot_dirty:
            return
        panel = self.main.query_one(HistoryPanel)
        if not panel.display:
            return  # hidden (one panel at a time at 80 columns): drawn when shown
        self.plot_dirty = False
        rec = self.session.shown()
        others = [r.series() for r in self.records if r is not rec and r.status != "failed"]
        if rec is None:
            panel.show(None, others[-5:])
            return
        panel.show(rec.series(), others[-5:], show_all=self.show_all_runs, factors=rec.factors(), theory=rec.theory)

    def refresh_study(self) -> None:
        if self._gone():
            return
        panel = self.main.query_one(OmegaPanel)
        mus = [r.mu for r in self.records if r.mu is not None]
        scanning = f"scan: {len(self.scan)} more after the current run" if self.scan else ""
        panel.update_study(self.records, self.main.query_one(ParamsPanel).method, mus[-1] if mus else None, scanning)

    def update_texts(self) -> None:
        if self._gone():
            return
        case = self.case
        if case is None:
            text = self.case_path.name
        else:
            rows, cols = case.shape
            unit = f" [{case.unit}]" if case.unit else ""
            text = f"{case.title or case.name} · {rows}×{cols} cells · h {case.cell_size:g} m · {case.quantity}{unit}"
        self.main.query_one(Banner).show(text, *present.banner_phase(self.phase, self.active))
        status = self.main.query_one(StatusStrip)
        rec = self.session.shown()
        if self.phase == "loading":
            status.show(f"loading {self.case_path.name}: reading the picture, assembling the operator…")
        elif self.phase == "load-failed":
            status.show("the case could not be loaded", problem=self.problem)
        elif rec is None:
            status.show("ready — s starts a run, ? lists every key", problem=self.problem)
        else:
            head = f"#{rec.id} {rec.method}"
            if rec.status == "preparing":
                head += f" preparing: {rec.preparing or 'starting'} (q quits at once, x stops)"
            report = rec.result.report if rec.result is not None else None
            progress = rec.progress if rec.status != "preparing" else None
            message = present.run_message(rec) if progress is not None else None
            background = getattr(progress, "background", "") if progress is not None and rec.live else ""
            if background and message:
                message += f" ({background}, beside the sweeps)"
            status.show(head, progress, report, self.problem or rec.problem, message=message)

    def _tell(self, text: str, **kwargs) -> None:
        """A toast; the text is shown as it is (paths and messages may hold brackets)."""
        self.notify(text, markup=False, **kwargs)

    def _ok(self) -> None:
        """A request went through: forget the last refusal."""
        if self.problem is not None:
            self.problem = None
            self.update_texts()

    def _refuse(self, text: str) -> None:
        """Bad input or an impossible request: say so, in the UI, and carry on."""
        self.problem = text
        self._tell(text, title="refused", severity="error", timeout=5)
        self.update_texts()
