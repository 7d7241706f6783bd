"""The app's actions on runs, the ω scan and the field views (a mixin of the app).

Each action turns a key into a :class:`~relaxtui.tui.session.Session`
transition and then refreshes the panels (see :mod:`relaxtui.tui.refresh`).
"""

from __future__ import annotations

from pathlib import Path

from relaxtui.errors import UsageError
from relaxtui.tui.fieldview import FieldView
from relaxtui.tui.omega_study import OmegaPanel, load_sweep_csv
from relaxtui.tui.messages import while_open
from relaxtui.tui.params import ParamsPanel
from relaxtui.tui.runs import RunsPanel
from relaxtui.tui.session import VIEWS
from relaxtui.tui.worker import OmegaApplied


class Controls:
    """Run control, ω changes, the ω scan and view toggles."""

    # -- controlling the running solve ----------------------------------------------------------
    def action_pause(self) -> None:
        if self.active is None:
            self._refuse("no run in progress: s starts one")
            return
        self._ok()
        self.session.toggle_pause()
        self.show_run(self.active)

    def action_step(self) -> None:
        if self.active is not None:
            self._ok()
            self.session.step()
            self.show_run(self.active)
        elif self._begin(None, paused=True, one_step=True) is not None:
            self._tell(f"run #{self.active.id} paused after one chunk: n steps again, space runs on", timeout=4)

    def action_stop(self) -> None:
        if self.active is None:
            self._refuse("no run in progress")
            return
        self._ok()
        if self.scan:
            self._tell(f"scan cancelled ({len(self.scan)} settings not run)", timeout=4)
            self.scan = []
        self.session.stop()
        self.show_run(self.active)

    @while_open
    def on_params_panel_omega_submitted(self, msg: ParamsPanel.OmegaSubmitted) -> None:
        if self.active is not None and self.active.live and self.active.status != "stopping":
            self.control.request_omega(msg.value)
        else:
            shown = "auto" if msg.value == "auto" else f"{msg.value:g}"
            self._tell(f"ω {shown} will be used by the next run (s starts it)", timeout=3)

    @while_open
    def on_params_panel_refused(self, msg: ParamsPanel.Refused) -> None:
        self._refuse(msg.text)

    def on_omegaapplied(self, ev: OmegaApplied) -> None:
        if ev.ok:
            self._tell(ev.text, title="ω changed", timeout=4)
        else:
            self._refuse(ev.text)

    # -- the ω study: a scan through the same worker ------------------------------------------
    @while_open
    def on_omega_panel_scan_requested(self, msg: OmegaPanel.ScanRequested) -> None:
        from relaxtui.commands.sweep import parse_range

        method = self.main.query_one(ParamsPanel).method
        try:
            if method not in ("sor", "red-black-sor"):
                raise UsageError(f"an omega scan needs sor or red-black-sor, not {method} (m chooses the method)")
            values = parse_range(msg.text.strip())
        except UsageError as exc:
            self._refuse(str(exc))
            return
        if not self._ready_for_run():
            return
        self.scan = list(values)
        self._tell(f"scan of {len(values)} ω values with {method}: x cancels it", timeout=4)
        self._next_scan()

    def _next_scan(self) -> None:
        if self.scan and self.active is None:
            if self._begin(None, omega=self.scan.pop(0)) is None:
                self.scan = []
        self.refresh_study()

    @while_open
    def on_omega_panel_csv_requested(self, msg: OmegaPanel.CsvRequested) -> None:
        panel = self.main.query_one(OmegaPanel)
        try:
            panel.csv_points = load_sweep_csv(Path(msg.text.strip()).expanduser(), panel.method)
        except UsageError as exc:
            self._refuse(str(exc))
            return
        self._ok()
        self._tell(f"{len(panel.csv_points)} rows loaded from {msg.text.strip()}", timeout=4)
        self.refresh_study()

    # -- choosing runs and views -----------------------------------------------------------------
    @while_open
    def on_runs_panel_run_chosen(self, msg: RunsPanel.RunChosen) -> None:
        self._ok()
        self.select(msg.run_id)
        self._tell(f"showing run #{msg.run_id}", timeout=2)

    def action_cycle_view(self) -> None:
        self.view_mode = VIEWS[(VIEWS.index(self.view_mode) + 1) % len(VIEWS)]
        self.main.query_one(FieldView).set_mode(self.view_mode)
        if self.control is not None:
            self.control.set_view(mode=self.view_mode)
        self.show_owned_frame()
        if self.panel != "field" and not self.wide:
            self.action_panel("field")

    def action_toggle_held(self) -> None:
        view = self.main.query_one(FieldView)
        view.set_include_held(not view.include_held)
        self._tell("scale: " + ("domain, held values and ambients" if view.include_held else "the domain's values"), timeout=2)

    def action_toggle_span(self) -> None:
        self.show_all_runs = not self.show_all_runs
        self.plot_dirty = True
        self.refresh_plot()
