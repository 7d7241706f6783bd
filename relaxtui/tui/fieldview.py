"""The field panel: the heatmap of a snapshot, zoom, pan and a cursor probe.

The widget owns only *what is looked at* (a :class:`~relaxtui.tui.sampling.Viewport`);
the pixels come from outside as an immutable :class:`~relaxtui.tui.sampling.Frame`
(``show_frame``). When the user moves the probe, pans or zooms, or the panel is
resized, it posts :class:`FieldView.ViewChanged` and the app answers with a new
frame: the solve worker makes it from the live field, or the app makes it from
a finished field it owns.

Keys (while the panel has focus): arrows move the probe one pixel (the view
follows it), shift+arrows a quarter of the panel, ``+``/``-`` zoom in and out
around the probe, ``0`` shows the whole grid.

Views (:attr:`FieldView.mode`, the app cycles it): the solution, on the range of
the domain's own values (:attr:`FieldView.include_held` widens it to the held
values and ambients); the residual of each cell and the latest update per
sweep, each on its own symmetric log scale (:func:`relaxtui.tui.scales.symlog`).
"""

from __future__ import annotations

import math

from rich.console import Group
from rich.text import Text
from textual.widget import Widget

from relaxtui.tui.heatmap import LEGEND_LINES, render_heatmap
from relaxtui.tui.messages import PanelMessage, hidden_keys
from relaxtui.tui.sampling import (
    MAX_MAGNIFY,
    Frame,
    Viewport,
    centred,
    clamp_viewport,
    fit_zoom,
)
from relaxtui.tui.scales import domain_range, symlog

VIEW_TITLES = {"solution": "Field", "residual": "Residual r (symlog)", "update": "Update per sweep (symlog)"}

PROBE_LINES = 1


def _num(v: float) -> str:
    if v is None or not math.isfinite(v):
        return "—" if v is None else str(v)
    return f"{v:.5g}"


class FieldView(Widget, can_focus=True):
    """Heatmap of the selected run's field with a probe cursor."""

    BINDINGS = hidden_keys(
        ("up", "move(-1, 0)", "Probe up"), ("down", "move(1, 0)", "Probe down"),
        ("left", "move(0, -1)", "Probe left"), ("right", "move(0, 1)", "Probe right"),
        ("shift+up", "jump(-1, 0)", "Pan up"), ("shift+down", "jump(1, 0)", "Pan down"),
        ("shift+left", "jump(0, -1)", "Pan left"), ("shift+right", "jump(0, 1)", "Pan right"),
        ("plus,equals_sign", "zoom(-1)", "Zoom in"), ("minus", "zoom(1)", "Zoom out"), ("0", "fit", "Whole grid"),
    )

    class ViewChanged(PanelMessage):
        """The viewport (pan, zoom, size or probe cursor) changed; a new frame is wanted."""

        def __init__(self, view: "FieldView", viewport: Viewport, plan_changed: bool) -> None:
            super().__init__(view)
            self.view = view
            self.viewport = viewport
            self.plan_changed = plan_changed

    def __init__(self, *, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(id=id, classes=classes)
        self.case = None  # relaxtui.case.model.Case, set by the app once loaded
        self.shape: tuple[int, int] | None = None
        self.unit = ""
        self.mono = False
        self.placeholder = "loading the case…"
        self.scale_range: tuple[float, float] | None = None  # values the scale always covers
        self.frame: Frame | None = None
        self.viewport: Viewport | None = None
        self._auto_fit = True  # refit the whole grid on resize until the user zooms
        self.mode = "solution"  # solution, residual or update
        self.include_held = False  # widen the solution's scale to held values and ambients
        self.state = ""  # the shown run's state, for the title ("paused", "running", ...)

    # -- attributes down --------------------------------------------------------
    def set_case(self, case, unit: str, scale_range: tuple[float, float] | None) -> None:
        """Show a new case: the whole grid, the probe in its middle."""
        self.case = case
        self.shape = case.shape
        self.unit = unit
        self.scale_range = scale_range
        self.frame = None
        self.viewport = None
        self._auto_fit = True
        self._update_viewport(fit=True)

    def show_frame(self, frame: Frame | None, state: str | None = None) -> None:
        """Show ``frame``; ``state`` (the run's state from the session) goes in the title."""
        self.frame = frame
        if state is not None:
            self.state = state
        self._title()
        self.refresh()

    def set_state(self, state: str) -> None:
        if state != self.state:
            self.state = state
            self._title()

    def _title(self) -> None:
        frame = self.frame
        title = VIEW_TITLES.get(self.mode, "Field")
        if frame is not None and frame.label:
            label = frame.label
            if self.state and frame.sweeps >= 0:
                label = label.replace(" · sweep ", f" · {self.state} · sweep ", 1)
            title += f" · {label}"
        self.border_title = title

    def set_mode(self, mode: str) -> None:
        self.mode = mode
        self._title()
        self.refresh()

    def set_include_held(self, on: bool) -> None:
        self.include_held = on
        self.refresh()

    def set_placeholder(self, text: str) -> None:
        self.placeholder = text
        self.refresh()

    # -- geometry ----------------------------------------------------------------
    def pixel_size(self) -> tuple[int, int]:
        """Pixel rows and columns the map has room for."""
        size = self.content_size
        rows = max(size.height - LEGEND_LINES - PROBE_LINES, 1)
        return 2 * rows, max(size.width, 1)

    def _update_viewport(self, fit: bool = False, new: Viewport | None = None) -> None:
        if self.shape is None:
            return
        height, width = self.pixel_size()
        old = self.viewport
        if new is None:
            if old is None or fit:
                zoom = fit_zoom(self.shape, height, width)
                cursor = old.cursor if old is not None else (self.shape[0] // 2, self.shape[1] // 2)
                new = Viewport(0, 0, zoom, height, width, cursor)
            else:
                new = Viewport(old.row0, old.col0, old.zoom, height, width, old.cursor)
        new = clamp_viewport(new, self.shape)
        if old == new:
            return
        self.viewport = new
        self.post_message(self.ViewChanged(self, new, old is None or old.plan_key != new.plan_key))
        self.refresh()

    def on_resize(self) -> None:
        self._update_viewport(fit=self._auto_fit)

    # -- actions -------------------------------------------------------------------
    def _step(self) -> int:
        return self.viewport.block if self.viewport is not None else 1

    def action_move(self, drow: int, dcol: int) -> None:
        vp = self.viewport
        if vp is None:
            return
        b = self._step()
        r, c = vp.cursor
        self._update_viewport(new=Viewport(vp.row0, vp.col0, vp.zoom, vp.height, vp.width, (r + drow * b, c + dcol * b)))

    def action_jump(self, drow: int, dcol: int) -> None:
        vp = self.viewport
        if vp is None:
            return
        span_r, span_c = vp.cells_shown()
        dr, dc = drow * max(span_r // 4, 1), dcol * max(span_c // 4, 1)
        r, c = vp.cursor
        self._update_viewport(new=Viewport(vp.row0 + dr, vp.col0 + dc, vp.zoom, vp.height, vp.width, (r + dr, c + dc)))

    def action_zoom(self, direction: int) -> None:
        vp = self.viewport
        if vp is None:
            return
        fit = fit_zoom(self.shape, vp.height, vp.width)
        zoom = vp.zoom + direction
        zoom = max(zoom, 1 - MAX_MAGNIFY)
        zoom = min(zoom, max(fit, 0))
        if zoom == vp.zoom:
            self.app.bell()
            return
        self._auto_fit = False
        self._update_viewport(new=centred(Viewport(0, 0, zoom, vp.height, vp.width, vp.cursor), self.shape))

    def action_fit(self) -> None:
        self._auto_fit = True
        self._update_viewport(fit=True)

    # -- drawing --------------------------------------------------------------------
    def render(self):
        width = max(self.content_size.width, 1)
        height = max(self.content_size.height, 1)
        frame, vp = self.frame, self.viewport
        if frame is None or vp is None:
            return Text(self.placeholder, style="italic")
        same_plan = frame.viewport.plan_key == vp.plan_key
        cursor = None
        if same_plan:
            i, j, size = vp.pixel_of(*vp.cursor)
            cursor = (i, j, size)
        values, ticks, unit = frame.values, None, self.unit
        if frame.mode == "solution" and self.mode == "solution":
            lo, hi = domain_range(frame.values, frame.domain, frame.fixed)
            flat = not (math.isfinite(lo) and math.isfinite(hi)) or hi - lo <= 1e-12 * max(abs(lo), abs(hi), 1.0)
            if self.include_held or flat:  # a uniform guess has no range of its own: show it against the held values
                lo, hi = frame.vmin, frame.vmax
                if self.scale_range is not None:
                    lo = min(self.scale_range[0], lo) if math.isfinite(lo) else self.scale_range[0]
                    hi = max(self.scale_range[1], hi) if math.isfinite(hi) else self.scale_range[1]
        elif frame.mode == self.mode:
            values, limit, ticks, _ = symlog(frame.values)
            lo, hi = -limit, limit
            unit = f"{unit}/sweep" if frame.mode == "update" and unit else unit
        else:
            return Text("computing the view…", style="italic")
        heatmap = render_heatmap(
            values,
            width,
            height - PROBE_LINES,
            mono=self.mono,
            vmin=lo,
            vmax=hi,
            fixed=frame.fixed,
            domain=frame.domain,
            unit=unit,
            cursor=cursor,
            magnify=False,
            ticks=ticks,
        )
        self.border_subtitle = self._zoom_text(vp)
        return Group(self.probe_text(), heatmap)

    def _zoom_text(self, vp: Viewport) -> str:
        if vp.zoom > 0:
            return f"1 px = {vp.block}×{vp.block} cells"
        if vp.zoom < 0:
            return f"1 cell = {vp.magnify}×{vp.magnify} px"
        return "1 px = 1 cell"

    def probe_text(self) -> Text:
        """One line: the probed cell, its position in metres, its value and region."""
        vp, frame = self.viewport, self.frame
        if vp is None:
            return Text("")
        r, c = vp.cursor
        rows = self.shape[0]
        h = self.case.cell_size if self.case is not None else 1.0
        x, y = (c + 0.5) * h, (rows - r - 0.5) * h
        text = Text()
        text.append("◆ ", style="bold")
        text.append(f"x {x:.4g} y {y:.4g} m ", style="")
        probe = frame.probe if frame is not None else None
        unit = f" {self.unit}" if self.unit else ""
        region = ""
        if self.case is not None:
            region = self.case.regions[int(self.case.codes[r, c])].name
        if probe is None or (probe.row, probe.col) != (r, c):
            text.append("…")
        elif probe.value is None:
            text.append("not in the domain", style="italic")
        else:
            text.append(f"{_num(probe.value)}{unit}", style="bold")
            if probe.block_mean is not None:
                text.append(f" (px mean {_num(probe.block_mean)})", style="dim")
        if region:
            text.append(f" · {region}", style="dim")
        text.append(f" · r{r} c{c}", style="dim")
        text.truncate(max(self.content_size.width, 1), overflow="ellipsis")
        return text
