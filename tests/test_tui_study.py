"""The terminal UI as a relaxation-study bench: traps fixed, new views, driven by the pilot at 80 x 24.

Each test is one behaviour, so that one failure does not hide the others. The
plate is the one of tests/test_tui.py (top edge hot, the rest cold).
"""

from __future__ import annotations

import re
import threading

import numpy as np
import pytest

pytest.importorskip("textual")

from textual.widgets import Input  # noqa: E402

from relaxtui.output.text import GROUP  # noqa: E402
from relaxtui.solver.driver import Run  # noqa: E402
from relaxtui.tui.banner import Banner  # noqa: E402
from relaxtui.tui.dialogs import ConfirmQuit  # noqa: E402
from relaxtui.tui.fieldview import FieldView  # noqa: E402
from relaxtui.tui.history import FactorPlot, HistoryPlot  # noqa: E402
from relaxtui.tui.omega_study import OmegaPanel, OmegaPlot  # noqa: E402
from relaxtui.tui.params import ParamsPanel  # noqa: E402
from relaxtui.tui.runs import COLUMNS, RunsPanel  # noqa: E402
from relaxtui.tui.timing import TimingPanel  # noqa: E402
from test_tui import finished, make_plate, pilot_test, status_text, stop, wait_for  # noqa: E402

CONVECTION = """
[[region]]
name = "breeze"
color = "#00ff00"
kind = "convection"
coefficient = 10.0
ambient = 500.0
"""


async def type_into(pilot, app, key: str, text: str, enter: bool = True) -> None:
    await pilot.press(key)
    field = app.focused
    assert isinstance(field, Input)
    field.value = ""
    await pilot.press(*text)
    if enter:
        await pilot.press("enter")
        await pilot.pause(0.05)


def banner_text(app) -> str:
    return app.query_one(Banner).plain


def timing_text(app) -> str:
    panel = app.query_one(TimingPanel)
    return "".join(seg.text for seg in app.console.render(panel._table(), app.console.options.update(width=60)))


# -- 1: the quit race -------------------------------------------------------------------


def test_quit_right_after_the_last_sweep_does_not_ask(tmp_path, monkeypatch):
    # Building the report takes a moment after the last sweep; quitting in that window
    # used to ask "run #1 is in progress" (and the pty test timed out on it).
    gate = threading.Event()
    real = Run.result

    def slow_result(self):
        gate.wait(30)
        return real(self)

    monkeypatch.setattr(Run, "result", slow_result)

    async def body(pilot, app):
        await pilot.press("s")
        await wait_for(pilot, lambda: app.records and app.records[0].status == "finishing", "the last sweep")
        await pilot.press("q")
        assert not isinstance(app.screen, ConfirmQuit)
        gate.set()

    app = pilot_test(make_plate(tmp_path), body)
    assert not app.is_running


def test_the_quit_question_is_withdrawn_when_the_run_ends(tmp_path):
    async def body(pilot, app):
        await pilot.press("n")
        await wait_for(pilot, lambda: app.phase == "paused", "a paused run")
        await pilot.press("q")
        assert isinstance(app.screen, ConfirmQuit)
        app.action_stop()
        await finished(pilot, app, 1)
        await pilot.pause(0.1)
        assert not isinstance(app.screen, ConfirmQuit)
        await pilot.press("q")  # nothing in progress: quits without asking

    app = pilot_test(make_plate(tmp_path, n=60, method="jacobi", tolerance=1e-10), body)
    assert not app.is_running


# -- 2, 3: focus and checks at Enter ----------------------------------------------------


def test_enter_hands_the_focus_back_so_footer_keys_work(tmp_path):
    async def body(pilot, app):
        await type_into(pilot, app, "o", "1.85")
        assert not isinstance(app.focused, Input)
        await pilot.press("s")  # starts a run, is not typed into the field
        assert app.query_one("#param-omega", Input).value == "1.85"
        await finished(pilot, app, 1)
        assert app.records[0].progress.omega == 1.85
        # the method: right chooses the next, s starts at once (no list swallowing keys)
        await pilot.press("m", "right", "left", "s")
        await finished(pilot, app, 2)
        assert app.query_one("#param-omega", Input).value == "1.85"
        assert app.records[1].method == "red-black-sor"

    pilot_test(make_plate(tmp_path), body)


def test_precision_follows_the_case_and_p_changes_it(tmp_path):
    # the case's [solver] precision is shown in the Next run panel; p, right, Enter turns it, and the
    # next run stores its field in that precision (float32 for "single", case-format v1.1 [solver])
    async def body(pilot, app):
        choice = app.query_one("#param-precision")
        assert choice.value == "single"
        assert choice.region.bottom <= app.query_one("#status").region.y  # shown at 80 x 24
        await pilot.press("s")
        await finished(pilot, app, 1)
        assert app.records[0].result.report["precision"] == "single"
        await pilot.press("p", "right", "enter", "s")
        assert choice.value == "double"
        await finished(pilot, app, 2)
        assert app.records[1].result.report["precision"] == "double"

    path = make_plate(tmp_path, tolerance=0.05)
    path.write_text(path.read_text().replace("[solver]\n", '[solver]\nprecision = "single"\n'), encoding="utf-8")
    pilot_test(path, body)


def test_escape_is_shown_in_the_footer_inside_a_field(tmp_path):
    async def body(pilot, app):
        await pilot.press("t")
        shown = {b.binding.key for b in app.screen.active_bindings.values() if b.binding.show}
        assert "escape" in shown
        await pilot.press("escape")
        assert not isinstance(app.focused, Input)

    pilot_test(make_plate(tmp_path), body)


@pytest.mark.parametrize("text", ["-5", "abc"])
def test_a_bad_tolerance_is_refused_at_enter(tmp_path, text, capsys):
    # the same words as the command line: what `relaxtui solve --tolerance TEXT` prints
    from relaxtui import cli

    with pytest.raises(SystemExit):
        cli.build_parser().parse_args(["solve", "x.toml", f"--tolerance={text}"])
    said = capsys.readouterr().err.strip().splitlines()[-1]
    message = said.split("argument --tolerance: ", 1)[1]
    assert "tolerance" in message and text in message

    async def body(pilot, app):
        await type_into(pilot, app, "t", text)
        assert message in (app.problem or "")
        assert app.focused is app.query_one("#param-tolerance", Input)  # stays for correction
        assert message in status_text(app)

    pilot_test(make_plate(tmp_path), body)


# -- 4, 5: numbers and layout ---------------------------------------------------------------


def test_grouped_numbers_cannot_wrap(tmp_path):
    # Jacobi on the 28 x 28 interior to 1e-4 takes a few thousand sweeps (factor cos(pi/29), common practice)
    async def body(pilot, app):
        await pilot.press("s")
        await finished(pilot, app, 1)
        rec = app.records[0]
        assert rec.progress.sweeps >= 1000
        row = [str(c) for c in app.query_one(RunsPanel).table.get_row("1")]
        assert GROUP in row[4] and " " not in row[4]
        assert GROUP in timing_text(app)
        assert GROUP in status_text(app)

    pilot_test(make_plate(tmp_path, method="jacobi", tolerance=1e-4), body)


def test_params_stay_above_the_status_strip_at_80x24(tmp_path):
    async def body(pilot, app):
        await pilot.press("m", "space")  # space never opens a list over the strip
        await pilot.pause(0.05)
        status = app.query_one("#status")
        for widget in app.query_one(ParamsPanel).query("*"):
            if widget.region.height:
                assert widget.region.bottom <= status.region.y, widget

    pilot_test(make_plate(tmp_path), body)


# -- 6, 7: one state, honest "to go" ------------------------------------------------------------


def test_paused_reads_paused_everywhere(tmp_path):
    # paused while running (frames are posted at most twice a second, progress more often)
    async def body(pilot, app):
        await pilot.press("s")
        await wait_for(pilot, lambda: app.phase == "running" and app.records[0].progress.sweeps > 50, "a running run")
        await pilot.press("space")
        assert app.phase == "paused"
        rec = app.records[0]
        await wait_for(pilot, lambda: rec.frame is not None and rec.frame.sweeps == rec.progress.sweeps, "the paused field")
        await pilot.pause(0.2)
        assert "paused" in banner_text(app)
        title = app.query_one(FieldView).border_title
        # the field shown is the paused field: the same sweep as the banner
        assert "paused" in title and f"sweep {rec.sweeps_text()}" in title and rec.sweeps_text() in banner_text(app)
        assert "paused" in status_text(app) and "running" not in status_text(app)
        await stop(pilot, app, 1)

    pilot_test(make_plate(tmp_path, n=300, method="jacobi", tolerance=1e-10), body)


def test_to_go_is_ended_by_the_sweep_limit(tmp_path):
    # to 1e-10 Jacobi needs far more than 3 000 sweeps on a 58 x 58 interior: the limit ends the run
    async def body(pilot, app):
        await pilot.press("n")
        await wait_for(pilot, lambda: app.phase == "paused" and app.records[0].progress.sweeps > 0, "one chunk")
        await pilot.pause(0.1)
        assert re.search(r"ends by\s+sweep limit", timing_text(app))
        assert "sweeps to go" in status_text(app) and "sweep limit" in status_text(app)
        await stop(pilot, app, 1)

    pilot_test(make_plate(tmp_path, n=60, method="jacobi", tolerance=1e-10), body, max_sweeps=3000)


# -- 8: the colour range ------------------------------------------------------------------------


def test_colour_range_is_the_domains_unless_asked(tmp_path):
    async def body(pilot, app):
        await pilot.press("s")
        await finished(pilot, app, 1)
        await pilot.pause(0.1)
        view = app.query_one(FieldView)
        field = app.records[0].result.field
        heat = view.render().renderables[1]
        interior = field[1:-1, 1:-1]
        assert heat.vmax < 500.0 and heat.vmax <= interior.max() + 1e-9 and heat.vmin >= interior.min() - 1e-9
        await pilot.press("h")
        heat = view.render().renderables[1]
        assert heat.vmax == 500.0 and heat.vmin == 0.0  # the ambient 500 and the held 0 and 100

    pilot_test(make_plate(tmp_path, extra=CONVECTION), body)


# -- 9: ω follows the method ----------------------------------------------------------------------


def test_method_change_resets_omega_unless_set_for_that_method(tmp_path):
    async def body(pilot, app):
        params = app.query_one(ParamsPanel)
        omega = app.query_one("#param-omega", Input)
        await type_into(pilot, app, "o", "1.7")
        assert params.method == "sor"
        await pilot.press("m", "right", "enter")  # red-black-sor
        assert params.method == "red-black-sor" and omega.value == "auto"
        await pilot.press("m", "left", "enter")  # back to sor: its ω comes back
        assert omega.value == "1.7"
        await pilot.press("m", "left", "left", "enter")  # gauss-seidel, then jacobi
        assert params.method == "jacobi" and omega.value == "auto"
        await type_into(pilot, app, "o", "1.5")
        # weighted Jacobi's factor max|1 - w(1 ± mu)| exceeds 1 for w > 2/(1+mu) (Young 1971)
        assert "Jacobi weight 1.5 > 1" in params.warning()
        assert "weight 1.5 > 1" in str(params.border_title)  # the title line: shown at every size
        await type_into(pilot, app, "o", "0.9")
        assert params.border_title == "Next run"

    pilot_test(make_plate(tmp_path, method="sor"), body)


# -- 10, 16: the history plot ------------------------------------------------------------------------


def test_history_spans_the_current_run_and_shows_factors(tmp_path):
    async def body(pilot, app):
        await type_into(pilot, app, "o", "1.2")
        await pilot.press("s")
        await finished(pilot, app, 1)
        await type_into(pilot, app, "o", "auto")
        await pilot.press("s")
        await finished(pilot, app, 2)
        first, second = app.records
        assert first.progress.sweeps > 2 * second.progress.sweeps
        await pilot.press("2")
        await pilot.pause(0.5)
        plot = app.query_one(HistoryPlot)
        assert plot._limits[2] == second.progress.sweeps
        await pilot.press("a")
        await pilot.pause(0.2)
        assert plot._limits[2] == first.progress.sweeps
        factor = app.query_one(FactorPlot)
        assert factor.factors.size >= 1 and np.all((factor.factors > 0) & (factor.factors < 1))
        # the theoretical factor of SOR at the run's ω for the measured radius (Young 1971)
        from relaxtui.solver.young import sor_factor

        assert factor.theory == pytest.approx(sor_factor(second.mu, second.progress.omega))

    pilot_test(make_plate(tmp_path, method="sor", tolerance=1e-6), body)


# -- 11: the runs table ---------------------------------------------------------------------------------


def test_runs_table_uses_command_line_names_and_clear_headers(tmp_path):
    async def body(pilot, app):
        await pilot.press("s")
        await finished(pilot, app, 1)
        row = [str(c) for c in app.query_one(RunsPanel).table.get_row("1")]
        assert row[1] == "red-black-sor" and row[2].endswith(" auto")
        assert {"ω", "tolerance", "seconds"} <= set(COLUMNS)

    pilot_test(make_plate(tmp_path), body)


# -- 14: residual and update views -------------------------------------------------------------------------


def test_views_cycle_solution_residual_update(tmp_path):
    async def body(pilot, app):
        await pilot.press("v")
        view = app.query_one(FieldView)
        assert view.mode == "residual" and "Residual" in view.border_title
        await pilot.press("s")
        await finished(pilot, app, 1)
        await pilot.pause(0.1)
        frame = view.frame
        assert frame.mode == "residual"
        rec = app.records[0]
        r = app.operator.residual_field(rec.run.field)
        vp = frame.viewport
        assert vp.zoom <= 0  # the 30 x 30 plate fits at one cell per pixel or more: values are cells
        m = vp.magnify
        np.testing.assert_allclose(frame.values[::m, ::m][:30, :30], r, equal_nan=True)
        heat = view.render().renderables[1]
        assert heat.vmin == -heat.vmax  # a symmetric scale about 0
        await pilot.press("v")
        assert view.mode == "update"
        await pilot.press("v")
        assert view.mode == "solution"

    pilot_test(make_plate(tmp_path, method="jacobi", tolerance=1e-4), body)


def test_update_view_while_running_is_the_change_per_sweep(tmp_path):
    async def body(pilot, app):
        await pilot.press("v", "v")
        await pilot.press("n")
        await wait_for(pilot, lambda: app.phase == "paused", "one chunk")
        await pilot.press("n")
        await wait_for(pilot, lambda: app.records[0].frames.get("update") is not None
                       and np.isfinite(app.records[0].frames["update"].values).any(), "an update frame")
        frame = app.records[0].frames["update"]
        assert frame.mode == "update" and np.nanmax(np.abs(frame.values)) > 0
        await stop(pilot, app, 1)

    pilot_test(make_plate(tmp_path, n=60, method="jacobi", tolerance=1e-10), body)


# -- 15: the ω study ------------------------------------------------------------------------------------------


def test_omega_panel_scan_from_the_ui_and_young_curve(tmp_path):
    async def body(pilot, app):
        await pilot.press("w")
        assert not isinstance(app.focused, Input)  # showing the panel takes no keys from the footer
        await pilot.press("r")
        assert app.focused is app.query_one("#omega-scan", Input)
        await pilot.press(*"1.5:1.7:0.1", "enter")
        await wait_for(pilot, lambda: len(app.records) == 3 and all(r.result is not None for r in app.records)
                       and app.active is None, "the scan")
        assert [r.progress.omega for r in app.records] == [1.5, 1.6, 1.7]
        plot = app.query_one(OmegaPlot)
        assert len(plot.points) == 3 and plot.curve is not None and plot.auto is not None
        best = min(app.records, key=lambda r: r.progress.sweeps)
        assert plot.best.sweeps == best.progress.sweeps
        # Young's curve falls towards the optimum on this side of it (Young 1971)
        w, n = plot.curve
        below = w < plot.auto
        assert np.all(np.diff(n[below][np.isfinite(n[below])]) < 0)
        assert "best" in str(app.query_one("#omega-key").render())

    pilot_test(make_plate(tmp_path, method="sor"), body)


def test_a_scan_is_cancelled_with_x(tmp_path):
    # SOR at ω 1 (Gauss-Seidel) on a 198 x 198 interior to 1e-6 takes tens of thousands of sweeps
    async def body(pilot, app):
        await pilot.press("r", *"1.0:1.9:0.05", "enter")
        await wait_for(pilot, lambda: app.active is not None and app.active.status == "running", "the first scan run")
        started = len(app.records)
        await stop(pilot, app, started)
        await pilot.pause(0.2)
        assert app.scan == [] and app.active is None and len(app.records) == started
        assert app.records[-1].status == "cancelled"

    pilot_test(make_plate(tmp_path, n=200, method="sor", tolerance=1e-6), body)


def test_sweep_csv_is_loaded_into_the_study(tmp_path, monkeypatch):
    # the path is typed relative to the current folder: "scan.csv" holds the keys s, c, a and n, which
    # start, continue, widen and step runs outside a field (the whole temporary path took 5 s to type)
    monkeypatch.chdir(tmp_path)
    csv_path = tmp_path / "scan.csv"
    csv_path.write_text("method,omega_setting,omega,sweeps,seconds,mcells_per_s,status,factor,best\n"
                        "sor,1.8,1.8,120,0.1,5,converged,0.8,\nsor,1.9,1.9,90,0.1,5,converged,0.9,*\n", encoding="utf-8")

    async def body(pilot, app):
        await pilot.press("l")
        assert app.focused is app.query_one("#omega-csv", Input)
        await pilot.press(*csv_path.name, "enter")
        await pilot.pause(0.1)
        panel = app.query_one(OmegaPanel)
        assert [(p.omega, p.sweeps) for p in panel.csv_points] == [(1.8, 120), (1.9, 90)]
        assert app.query_one(OmegaPlot).best.sweeps == 90

    pilot_test(make_plate(tmp_path, method="sor"), body)


# -- issue 17 item 3: a preparation is visible and never holds the UI -----------------------------


def test_preparation_is_shown_and_quitting_does_not_wait_for_it(tmp_path, monkeypatch):
    gate = threading.Event()
    real = Run.prepare

    def slow_prepare(self):
        if self.on_prepare is not None:
            self.on_prepare("estimating the Jacobi radius: 40/600 Lanczos steps, 0.990000 so far")
        gate.wait(60)  # a long preparation (a large grid) that has not finished when the user quits
        return real(self)

    monkeypatch.setattr(Run, "prepare", slow_prepare)

    async def body(pilot, app):
        await pilot.press("s")
        await wait_for(pilot, lambda: app.records and app.records[0].preparing, "the preparation's progress")
        assert "40/600 Lanczos steps" in status_text(app)
        assert "40/600" in str(app.query_one(TimingPanel).render())
        await pilot.press("q")
        assert not isinstance(app.screen, ConfirmQuit)

    app = pilot_test(make_plate(tmp_path), body)
    assert not app.is_running and not gate.is_set()  # quit while the preparation still ran
    gate.set()
