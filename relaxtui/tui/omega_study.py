"""The ω study panel: sweeps to tolerance against ω, measured and predicted.

Points come from the session's finished runs of a method with a relaxation
factor (sor, red-black-sor) and from a ``relaxtui sweep`` CSV. Overlaid:

* Young's prediction for the measured Jacobi radius μ: the SOR factor
  ρ(ω) (:func:`relaxtui.solver.young.sor_factor`; Young 1971) gives
  N(ω) = K / -ln ρ(ω) sweeps, where K = ln(initial error / tolerance) is not
  known beforehand; it is taken as the median of N_i · -ln ρ(ω_i) over the
  converged runs shown (so the curve is fitted in height only, its shape is
  the theory's);
* the automatic ω, 2 / (1 + sqrt(1 - μ²)) (Young's optimum), as a vertical line;
* the best run (fewest sweeps among the converged ones) marked.

A scan over a typed range (``START:STOP:STEP`` or ``a,b,c``, as ``relaxtui
sweep --omega`` takes it) is run by the app through the same solve worker,
one run at a time; x cancels it.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.widgets import Input, Label, Static
from textual_plotext import PlotextPlot

from relaxtui.errors import UsageError
from relaxtui.output.text import group
from relaxtui.tui.history import ERROR_RGB, MUTED_RGB, OMEGA_RGB, RESIDUAL_RGB, TOLERANCE_RGB, _rgb
from relaxtui.tui.messages import PanelMessage

STUDY_METHODS = ("sor", "red-black-sor")
BEST_RGB = (250, 250, 250)


@dataclass(frozen=True)
class Point:
    omega: float
    sweeps: int
    converged: bool
    source: str  # "#3" for a run of the session, "csv" for a loaded row


def session_points(records, method: str) -> list[Point]:
    """Finished runs of ``method`` started from the initial guess (continued runs would not compare)."""
    out = []
    for r in records:
        if r.method != method or r.result is None or r.source is not None or r.progress is None:
            continue
        changes = r.result.report.get("omega_changes") or []
        if len(changes) > 1:
            continue  # ω changed mid-run: no single ω to plot it at
        out.append(Point(float(r.progress.omega), int(r.progress.sweeps), r.status == "converged", f"#{r.id}"))
    return out


def load_sweep_csv(path, method: str | None = None) -> list[Point]:
    """Rows of a ``relaxtui sweep`` CSV (columns method, omega, sweeps, status, ...) as points."""
    path = Path(path)
    try:
        with open(path, newline="", encoding="utf-8") as f:
            rows = list(csv.DictReader(f))
    except OSError as exc:
        raise UsageError(f"{path}: cannot read the sweep CSV ({exc.strerror or exc})") from None
    points = []
    for k, row in enumerate(rows, start=2):
        try:
            if method is not None and row.get("method") not in (None, method):
                continue
            points.append(Point(float(row["omega"]), int(row["sweeps"]), row.get("status") == "converged", "csv"))
        except (KeyError, TypeError, ValueError):
            raise UsageError(f"{path}, line {k}: not a relaxtui sweep row (wants method, omega, sweeps, status)") from None
    if not points:
        raise UsageError(f"{path}: no rows" + (f" for {method}" if method else ""))
    return points


def young_curve(mu: float, points: list[Point], omegas: np.ndarray) -> np.ndarray | None:
    """Predicted sweeps to tolerance at ``omegas`` (NaN where ρ >= 1), fitted in height to the
    converged ``points``; None without a converged point."""
    from relaxtui.solver.young import sor_factor

    ks = []
    for p in points:
        rho = sor_factor(mu, p.omega)
        if p.converged and 0.0 < rho < 1.0:
            ks.append(p.sweeps * -math.log(rho))
    if not ks:
        return None
    k = float(np.median(ks))
    out = np.full(len(omegas), np.nan)
    for i, w in enumerate(omegas):
        rho = sor_factor(mu, float(w))
        if 0.0 < rho < 1.0:
            out[i] = k / -math.log(rho)
    return out


def best(points: list[Point]) -> Point | None:
    ok = [p for p in points if p.converged]
    return min(ok, key=lambda p: (p.sweeps, p.omega)) if ok else None


class OmegaPlot(PlotextPlot):
    """Sweeps to tolerance (log axis) against ω."""

    def __init__(self, *, id: str | None = None) -> None:
        super().__init__(id=id)
        self.points: list[Point] = []
        self.curve: tuple[np.ndarray, np.ndarray] | None = None
        self.auto: float | None = None
        self.best: Point | None = None

    def show(self, points, curve, auto, best_point) -> None:
        self.points, self.curve, self.auto, self.best = list(points), curve, auto, best_point
        plt = self.plt
        plt.clear_data()
        plt.clear_figure()
        plt.xlabel("ω")
        ys = []
        for group_, rgb in ((["csv"], MUTED_RGB[1]), (None, RESIDUAL_RGB)):
            sel = [p for p in self.points if (p.source == "csv") == (group_ is not None) and p.converged]
            if sel:
                plt.scatter([p.omega for p in sel], [math.log10(p.sweeps) for p in sel], marker="braille", color=rgb)
                ys += [math.log10(p.sweeps) for p in sel]
        if curve is not None:
            w, n = curve
            ok = np.isfinite(n) & (n > 0)
            if ok.any():
                plt.plot(w[ok].tolist(), np.log10(n[ok]).tolist(), marker="braille", color=ERROR_RGB)
        if auto is not None:
            plt.vertical_line(auto, color=OMEGA_RGB)
        if best_point is not None:
            plt.scatter([best_point.omega], [math.log10(best_point.sweeps)], marker="●", color=BEST_RGB)
        omegas = [p.omega for p in self.points] + ([auto] if auto is not None else [])
        if omegas:
            lo, hi = min(omegas), max(omegas)
            pad = max((hi - lo) * 0.05, 0.01)
            plt.xlim(max(lo - pad, 0.0), min(hi + pad, 2.0))
        if ys:
            lo, hi = math.floor(min(ys)), math.ceil(max(ys))
            hi = max(hi, lo + 1)
            plt.ylim(lo, hi)
            ticks = list(range(lo, hi + 1))
            plt.yticks(ticks, [group(10**t) for t in ticks])
        self.refresh()


class OmegaPanel(Vertical):
    """The ω study: the plot, its key, and the scan and CSV fields."""

    BINDINGS = [Binding("escape", "leave", "Back", show=True)]

    class ScanRequested(PanelMessage):
        def __init__(self, panel, text: str) -> None:
            super().__init__(panel)
            self.text = text

    class CsvRequested(PanelMessage):
        def __init__(self, panel, text: str) -> None:
            super().__init__(panel)
            self.text = text

    def __init__(self, *, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(id=id, classes=classes)
        self.csv_points: list[Point] = []
        self.method = "red-black-sor"
        self.mu: float | None = None
        self.shown: list[Point] = []

    def compose(self) -> ComposeResult:
        yield OmegaPlot(id="omega-plot")
        yield Static(id="omega-key")
        with Horizontal(classes="param-row"):
            yield Label("scan ω", classes="param-label")
            yield Input(placeholder="r, then e.g. 1.80:1.98:0.02 and enter", compact=True, id="omega-scan")
        with Horizontal(classes="param-row"):
            yield Label("sweep CSV", classes="param-label")
            yield Input(placeholder="l, then the path of a relaxtui sweep --csv file", compact=True, id="omega-csv")

    async def action_leave(self) -> None:
        await self.app.run_action("focus_panel")

    def focus_field(self, which: str) -> None:
        """``scan`` or ``csv``."""
        self.query_one(f"#omega-{which}", Input).focus()

    def on_input_submitted(self, event: Input.Submitted) -> None:
        event.stop()
        if event.input.id == "omega-scan":
            self.post_message(self.ScanRequested(self, event.value))
        elif event.input.id == "omega-csv":
            self.post_message(self.CsvRequested(self, event.value))
        self.app.call_later(self.app.run_action, "focus_panel")

    def update_study(self, records, method: str, mu: float | None, scanning: str = "") -> None:
        """Redraw from the session's runs (``method``: the study's method; ``mu``: the measured radius)."""
        from relaxtui.solver.young import optimal_omega

        self.method = method if method in STUDY_METHODS else self.method
        if mu is not None:
            self.mu = mu
        points = session_points(records, self.method) + [p for p in self.csv_points]
        self.shown = points
        auto = optimal_omega(self.mu) if self.mu is not None else None
        curve = None
        if self.mu is not None and points:
            lo = min([p.omega for p in points] + [auto])
            hi = max([p.omega for p in points] + [auto])
            w = np.linspace(max(lo - 0.02, 0.01), min(hi + 0.02, 1.999), 200)
            n = young_curve(self.mu, points, w)
            curve = None if n is None else (w, n)
        b = best(points)
        self.query_one(OmegaPlot).show(points, curve, auto, b)
        key = Text(no_wrap=True, overflow="ellipsis")
        key.append(f"{self.method}: ", style="bold")
        if not points:
            key.append("no finished runs yet: type a scan range below, or start runs", style="italic")
        else:
            key.append("• ", style=_rgb(RESIDUAL_RGB))
            key.append("runs  ")
            if self.csv_points:
                key.append("• ", style=_rgb(MUTED_RGB[1]))
                key.append("csv  ")
            if curve is not None:
                key.append("━ ", style=_rgb(ERROR_RGB))
                key.append(f"Young, μ {self.mu:.6f}  ")
            if auto is not None:
                key.append("│ ", style=_rgb(OMEGA_RGB))
                key.append(f"auto ω {auto:.4f}  ")
            if b is not None:
                key.append("● ", style="bold")
                key.append(f"best {b.source} ω {b.omega:.4g}: {group(b.sweeps)} sweeps")
        if scanning:
            key.append("  " + scanning, style="bold yellow")
        self.query_one("#omega-key", Static).update(key)


__all__ = ["OmegaPanel", "Point", "best", "load_sweep_csv", "session_points", "young_curve", "TOLERANCE_RGB"]
