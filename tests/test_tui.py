"""The terminal UI driven by Textual's pilot at 80 x 24 (and once at 200 x 50).

Each test builds a small case in tmp_path: a square plate whose top edge is
held hot and whose other three edges are held at 0. The physics check is the
classical superposition argument for Laplace's equation (common practice; it
holds for the discrete 5-point equations too): the four rotations of the
problem add up to a plate held at the hot value all round, whose solution is
that value everywhere, so by symmetry the mean of the four centre cells is a
quarter of the hot value.
"""

from __future__ import annotations

import asyncio
import json

import numpy as np
import pytest
from PIL import Image

pytest.importorskip("textual")

from textual.widgets import Input  # noqa: E402

from relaxtui.tui.app import RelaxApp  # noqa: E402
from relaxtui.tui.dialogs import ConfirmQuit, ExportScreen, HelpScreen  # noqa: E402
from relaxtui.tui.fieldview import FieldView  # noqa: E402
from relaxtui.tui.history import HistoryPlot  # noqa: E402
from relaxtui.tui.runs import RunsPanel  # noqa: E402
from relaxtui.tui.status import StatusStrip  # noqa: E402

HOT = 100.0

CASE_TOML = """\
title = "Plate with a hot edge"
quantity = "temperature"
unit = "°C"
mask = "plate.png"
cell_size = 0.002

[solver]
method = "{method}"
tolerance = {tolerance}

[[region]]
name = "plate"
color = "#ffffff"
kind = "interior"

[[region]]
name = "hot"
color = "#ff0000"
kind = "fixed"
value = {hot}

[[region]]
name = "cold"
color = "#0000ff"
kind = "fixed"
value = 0.0
"""


def make_plate(folder, n=30, method="red-black-sor", tolerance=1e-3, extra=""):
    """An n x n picture: a border of fixed cells (top row hot, the rest cold), interior inside."""
    img = np.full((n, n, 3), 255, dtype=np.uint8)
    img[0, :] = (255, 0, 0)
    img[-1, :] = (0, 0, 255)
    img[:, 0] = (0, 0, 255)
    img[:, -1] = (0, 0, 255)
    Image.fromarray(img).save(folder / "plate.png")
    path = folder / "plate.toml"
    path.write_text(CASE_TOML.format(method=method, tolerance=tolerance, hot=HOT) + extra, encoding="utf-8")
    return path


async def wait_for(pilot, condition, what: str, limit: float = 120.0) -> None:
    """Let the app run until ``condition()`` holds (a guard against hanging, not a speed check)."""
    loop = asyncio.get_running_loop()
    end = loop.time() + limit
    while not condition():
        if loop.time() > end:
            raise AssertionError(f"gave up waiting for: {what}")
        await pilot.pause(0.05)


async def loaded(pilot, app):
    await wait_for(pilot, lambda: app.case is not None or app.phase == "load-failed", "the case to load")


async def finished(pilot, app, n):
    await wait_for(pilot, lambda: len(app.records) >= n and app.records[n - 1].result is not None and app.active is None, f"run {n} to finish")


async def stop(pilot, app, n):
    """Stop the active run with "x" and wait until run ``n`` has finished."""
    await pilot.press("x")
    await finished(pilot, app, n)


def status_text(app) -> str:
    return app.query_one(StatusStrip).plain


async def set_param(pilot, app, which: str, text: str) -> None:
    key = {"omega": "o", "tolerance": "t", "method": "m"}[which]
    await pilot.press(key)
    field = app.query_one(f"#param-{which}", Input)
    assert app.focused is field
    field.value = ""
    await pilot.press(*text)
    await pilot.press("escape")
    assert field.value == text


def centre_mean(field) -> float:
    n = field.shape[0]
    h = n // 2
    return float(field[h - 1 : h + 1, h - 1 : h + 1].mean())


def pilot_test(case, body, size=(80, 24), **app_kwargs):
    """Run ``await body(pilot, app)`` in a headless RelaxApp(case, **app_kwargs) of ``size`` once the case
    has loaded (or failed to load); returns the app."""

    async def scenario():
        app = RelaxApp(case, **app_kwargs)
        async with app.run_test(size=size) as pilot:
            await loaded(pilot, app)
            await body(pilot, app)
        return app

    return asyncio.run(scenario())


async def first_run(pilot, app):
    await loaded(pilot, app)
    assert app.phase == "ready"
    await pilot.press("s")
    await finished(pilot, app, 1)
    return app.records[0]


async def second_run_at_1_5(pilot, app):
    await set_param(pilot, app, "omega", "1.5")
    await pilot.press("s")
    await finished(pilot, app, 2)
    return app.records[1]


def test_run_converges_to_the_superposition_value(tmp_path):
    case = make_plate(tmp_path)

    async def body(pilot, app):
        first = await first_run(pilot, app)
        assert first.status == "converged"
        field = first.result.field
        # superposition and symmetry: the centre is a quarter of the hot value (tolerance 1e-3)
        assert abs(centre_mean(field) - HOT / 4) <= 2e-3
        assert np.isnan(field).sum() == 0  # every cell is interior or fixed
        assert first.result.report["status"] == "converged"
        # the history the plot shows is the run's history
        series = first.series()
        assert series.sweeps[-1] == first.progress.sweeps == len(first.result.history)
        assert "converged" in status_text(app)
        assert "imbalance" in status_text(app)

    pilot_test(case, body)


def test_second_run_at_another_omega_is_compared_and_chosen(tmp_path):
    case = make_plate(tmp_path)

    async def body(pilot, app):
        first = await first_run(pilot, app)
        # a second run at omega 1.5, compared with the first in the history plot
        second = await second_run_at_1_5(pilot, app)
        assert second.status == "converged"
        assert second.progress.omega == 1.5 and second.result.report["omega"] == 1.5
        assert second.progress.sweeps > first.progress.sweeps  # 1.5 is far from the optimum on 28 x 28
        assert abs(centre_mean(second.result.field) - HOT / 4) <= 2e-3
        plot = app.query_one(HistoryPlot)
        await pilot.press("2")
        await pilot.pause(0.6)
        assert plot.current.run_id == 2 and [s.run_id for s in plot.others] == [1]
        table = app.query_one(RunsPanel).table
        assert table.row_count == 2
        assert [str(c) for c in table.get_row("2")][6] == "converged"

        # choose run 1 in the table: history and field follow
        await pilot.press("3")
        table.move_cursor(row=0)
        await pilot.press("enter")
        await pilot.pause(0.1)
        assert app.selected == 1
        await pilot.press("2")  # at 80 columns the plot is drawn when its panel is shown
        await pilot.pause(0.3)
        assert plot.current.run_id == 1 and [s.run_id for s in plot.others] == [2]
        assert app.query_one(FieldView).frame.label.startswith("run 1")

    pilot_test(case, body)


def test_export_writes_the_chosen_run(tmp_path):
    case = make_plate(tmp_path)

    async def body(pilot, app):
        first = await first_run(pilot, app)
        await second_run_at_1_5(pilot, app)
        await pilot.press("3")
        app.query_one(RunsPanel).table.move_cursor(row=0)
        await pilot.press("enter")
        await pilot.pause(0.1)
        assert app.selected == 1
        # export run 1 to files in tmp_path
        await pilot.press("escape", "e")
        assert isinstance(app.screen, ExportScreen)
        out, report, history = tmp_path / "f.npy", tmp_path / "r.json", tmp_path / "h.csv"
        for key, path in (("out", out), ("report", report), ("history", history)):
            app.screen.query_one(f"#export-{key}", Input).value = str(path)
        app.screen.query_one("#export-out", Input).focus()
        await pilot.press("enter")
        await wait_for(pilot, lambda: len(app.last_export) == 3, "the export")
        saved = np.load(out)
        np.testing.assert_array_equal(saved, first.result.field)
        rep = json.loads(report.read_text(encoding="utf-8"))
        assert rep["status"] == "converged" and rep["sweeps"] == first.progress.sweeps
        rows = history.read_text(encoding="utf-8").splitlines()
        assert rows[0] == "sweep,seconds,residual,estimated_error"
        assert len(rows) == 1 + len(first.result.history)
        assert not list(tmp_path.glob("*.part"))  # atomic: no temporary files left

    pilot_test(case, body)


def test_pause_resume_single_step_and_stop(tmp_path):
    # Jacobi on a 300 x 300 plate to 1e-8 would take about 400 000 sweeps (factor cos(pi/299)
    # per sweep, common practice): far more than the test lets it run before stopping it.
    case = make_plate(tmp_path, n=300, method="jacobi", tolerance=1e-8)

    async def body(pilot, app):
        await pilot.press("n")  # from idle: a new run, paused after one chunk
        await wait_for(pilot, lambda: app.records and app.records[0].progress is not None and app.records[0].progress.sweeps > 0 and app.phase == "paused", "one chunk")
        rec = app.records[0]
        once = rec.progress.sweeps
        await pilot.pause(0.3)
        assert rec.progress.sweeps == once  # paused means paused
        await pilot.press("n")
        await wait_for(pilot, lambda: rec.progress.sweeps > once, "a second chunk")
        assert app.phase == "paused"
        await pilot.press("space")
        assert app.phase == "running"
        before = rec.progress.sweeps
        await wait_for(pilot, lambda: rec.progress.sweeps > before + 10, "the run to go on")
        await pilot.press("space")
        assert app.phase == "paused"
        await pilot.press("s")  # refused: a run is in progress
        assert len(app.records) == 1 and "in progress" in (app.problem or "")
        await stop(pilot, app, 1)
        assert rec.status == "cancelled" and rec.result.report["status"] == "cancelled"
        assert app.phase == "ready"
        # continue from the stopped run's field: starts where it stopped
        await pilot.press("c")
        await wait_for(pilot, lambda: len(app.records) == 2 and app.records[1].chunks, "the continued run")
        cont = app.records[1]
        assert cont.start == "run #1"
        first_res = rec.result.history.residual
        assert cont.chunks[0].residual[0] < 0.5 * first_res[0]
        await stop(pilot, app, 2)

    pilot_test(case, body)


def test_omega_change_mid_run_is_recorded(tmp_path):
    case = make_plate(tmp_path, n=40, method="sor", tolerance=1e-6)

    async def body(pilot, app):
        await pilot.press("n")
        await wait_for(pilot, lambda: app.phase == "paused" and app.records[0].progress and app.records[0].progress.sweeps > 0, "one chunk")
        await pilot.press("o")
        field = app.query_one("#param-omega", Input)
        field.value = "1.8"
        await pilot.press("enter", "escape")
        await pilot.press("space")
        await finished(pilot, app, 1)
        rec = app.records[0]
        omegas = rec.result.history.omega
        assert omegas[0] == 1.2 and omegas[-1] == 1.8
        changes = rec.result.report["omega_changes"]
        assert [c["omega"] for c in changes] == [1.2, 1.8]
        assert rec.series().omega_changes[-1] == changes[-1]["sweep"]

    pilot_test(case, body, omega=1.2)


def test_bad_input_is_refused_with_a_message(tmp_path):
    case = make_plate(tmp_path)

    async def body(pilot, app):
        await pilot.press("e")
        assert "no run" in app.problem
        await set_param(pilot, app, "omega", "2.3")
        await pilot.press("s")
        assert not app.records and "(0, 2)" in app.problem and "2.3" in status_text(app)
        await set_param(pilot, app, "omega", "auto")
        await set_param(pilot, app, "tolerance", "abc")
        await pilot.press("s")
        assert not app.records and "tolerance" in app.problem and "'abc'" in app.problem
        await set_param(pilot, app, "tolerance", "1e-3")
        app.query_one("#param-max-sweeps", Input).value = "-3"
        await pilot.press("s")
        assert not app.records and "sweep limit" in app.problem
        app.query_one("#param-max-sweeps", Input).value = "100000"
        # a method without a relaxation factor refuses omega 1.5 (the driver's own check)
        app.query_one("#param-method").value = "gauss-seidel"
        await set_param(pilot, app, "omega", "1.5")
        await pilot.press("s")
        assert not app.records and "gauss-seidel" in app.problem
        await set_param(pilot, app, "omega", "auto")
        await pilot.press("s")
        await finished(pilot, app, 1)
        assert app.problem is None
        # an export path in a folder that does not exist: refused inside the form
        await pilot.press("e")
        screen = app.screen
        assert isinstance(screen, ExportScreen)
        screen.query_one("#export-out", Input).value = str(tmp_path / "missing" / "f.npy")
        screen.query_one("#export-out", Input).focus()
        await pilot.press("enter")
        assert app.screen is screen
        assert "does not exist" in screen.message
        await pilot.press("escape")
        assert not isinstance(app.screen, ExportScreen)
        assert not (tmp_path / "missing").exists()

    pilot_test(case, body)


def test_quit_asks_first_while_a_run_is_in_progress(tmp_path):
    case = make_plate(tmp_path, n=60, method="jacobi", tolerance=1e-10)

    async def body(pilot, app):
        await pilot.press("question_mark")
        assert isinstance(app.screen, HelpScreen)
        await pilot.press("escape")
        await pilot.press("n")
        await wait_for(pilot, lambda: app.phase == "paused", "a paused run")
        await pilot.press("q")
        assert isinstance(app.screen, ConfirmQuit)
        await pilot.press("n")
        assert not isinstance(app.screen, ConfirmQuit) and app.is_running
        await pilot.press("q")
        await pilot.press("y")

    app = pilot_test(case, body)
    assert not app.is_running
    assert app.control is not None and app.control.quitting


def test_probe_zoom_and_pan_read_the_field(tmp_path):
    case = make_plate(tmp_path, n=30)

    async def body(pilot, app):
        await finished(pilot, app, 1)
        field = app.records[0].result.field
        view = app.query_one(FieldView)
        view.focus()
        start = view.viewport
        await pilot.press("up", "up", "left")
        await pilot.pause(0.05)
        r, c = view.viewport.cursor
        assert (r, c) == (start.cursor[0] - 2 * start.block, start.cursor[1] - start.block)
        probe = view.frame.probe
        assert (probe.row, probe.col) == (r, c) and probe.value == field[r, c]
        # contract position of the cell centre: x = (c + 0.5) h, y = (rows - r - 0.5) h, h = 2 mm
        assert probe.x == pytest.approx((c + 0.5) * 0.002) and probe.y == pytest.approx((30 - r - 0.5) * 0.002)
        assert f"{probe.x:.4g}" in str(view.probe_text())
        await pilot.press("plus", "plus")
        assert view.viewport.zoom == start.zoom - 2
        await pilot.press("shift+right")
        assert view.viewport.cursor[1] > c
        await pilot.press("0")
        assert view.viewport.zoom == start.zoom
        await pilot.press("minus")  # cannot zoom out past the whole grid
        assert view.viewport.zoom == start.zoom

    pilot_test(case, body, run=True)  # --run: starts at once


def test_no_color_draws_the_character_ramp(tmp_path, monkeypatch):
    monkeypatch.setenv("NO_COLOR", "1")
    case = make_plate(tmp_path)

    async def body(pilot, app):
        await finished(pilot, app, 1)
        view = app.query_one(FieldView)
        assert view.mono
        from relaxtui.output.colormap import RAMP

        text = "".join(seg.text for seg in app.console.render(view.render(), app.console.options.update(width=60)))
        assert any(ch in text for ch in RAMP[1:-1]) and "▀" not in text.split("\n")[1]

    pilot_test(case, body, run=True)


def test_wide_terminal_shows_every_panel_and_a_load_error_is_shown(tmp_path):
    case = make_plate(tmp_path)

    async def body(pilot, app):
        assert app.wide
        for name in ("#field", "#history", "#runs", "#timing", "#params", "#status"):
            assert app.query_one(name).region.width > 0, name

    pilot_test(case, body, size=(200, 50))

    bad = tmp_path / "bad.toml"
    bad.write_text('mask = "plate.png"\ncolour_depth = 3\n', encoding="utf-8")

    async def broken(pilot, app):
        assert app.phase == "load-failed"
        assert "colour_depth" in status_text(app)
        await pilot.press("s")
        assert not app.records
        await pilot.press("q")

    pilot_test(bad, broken)
