"""The residual-history panel: a textual-plotext plot and its key line.

The selected run's largest residual and estimated error per sweep are drawn on
a log axis (the plot works in log10 and labels its ticks in decades), with the
tolerance as a horizontal line and each mid-run ω change as a vertical line;
the session's other runs are overlaid in muted colours. The x-axis spans the
selected run (earlier, longer runs are clipped) unless ``show_all`` is on.
Below it, the measured convergence factor per chunk (the residual's ratio
over the chunk, per sweep) is drawn next to the method's theoretical factor at
the chosen ω for the measured Jacobi radius, so that the asymptotic regime
shows as the points settling on the line. The plot never sees live arrays:
the app hands it immutable :class:`Series` (decimated copies).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Vertical
from textual.widgets import Static
from textual_plotext import PlotextPlot

from relaxtui.output.colormap import PALETTE, nice_ticks
from relaxtui.output.text import group

MAX_POINTS = 600  # points per curve handed to the plot (decimated beyond)

RESIDUAL_RGB = tuple(int(v) for v in PALETTE[205])
ERROR_RGB = tuple(int(v) for v in PALETTE[110])
TOLERANCE_RGB = (120, 200, 150)
OMEGA_RGB = (110, 150, 210)
MUTED_RGB = [(100, 100, 110), (125, 110, 95), (95, 120, 110), (120, 100, 125), (105, 115, 130)]


@dataclass(frozen=True, eq=False)
class Series:
    """One run's history as drawn: read-only, decimated copies."""

    run_id: int
    label: str  # e.g. "#2 sor ω 1.9"
    sweeps: np.ndarray
    residual: np.ndarray
    error: np.ndarray
    tolerance: float
    omega_changes: tuple[int, ...] = ()  # sweeps at which ω was changed mid-run


def decimate(n: int, limit: int = MAX_POINTS) -> np.ndarray:
    """Indices of at most ``limit`` evenly spread points of ``n``, always keeping the first and last."""
    if n <= limit:
        return np.arange(n)
    idx = np.unique(np.linspace(0, n - 1, limit).round().astype(np.int64))
    return idx


def make_series(run_id, label, sweeps, residual, error, tolerance, omega_changes=()) -> Series:
    """A :class:`Series` from full history arrays (copied and decimated)."""
    idx = decimate(len(sweeps))
    arrays = []
    for a in (sweeps, residual, error):
        b = np.array(np.asarray(a)[idx], dtype=np.float64)
        b.setflags(write=False)
        arrays.append(b)
    return Series(run_id, label, *arrays, float(tolerance), tuple(int(s) for s in omega_changes))


def _log_points(x: np.ndarray, y: np.ndarray) -> tuple[list[float], list[float]]:
    ok = np.isfinite(y) & (y > 0)
    return x[ok].tolist(), np.log10(y[ok]).tolist()


class HistoryPlot(PlotextPlot):
    """The plot itself; call :meth:`show` with the series to draw."""

    def __init__(self, *, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(id=id, classes=classes)
        self.current: Series | None = None
        self.others: tuple[Series, ...] = ()
        self.show_all = False
        self._limits = None

    def show(self, current: Series | None, others=(), show_all: bool = False) -> None:
        self.current = current
        self.others = tuple(others)
        self.show_all = show_all
        self._replot()
        self.refresh()

    def _replot(self) -> None:
        plt = self.plt
        plt.clear_data()
        plt.clear_figure()
        plt.xlabel("sweep")
        lows, highs, xmax = [], [], 1.0
        for k, s in enumerate(self.others):
            x, y = _log_points(s.sweeps, s.residual)
            if x:
                plt.plot(x, y, marker="braille", color=MUTED_RGB[k % len(MUTED_RGB)])
                lows.append(min(y))
                highs.append(max(y))
                xmax = max(xmax, x[-1])
        cur = self.current
        if cur is not None:
            if not self.show_all and cur.sweeps.size:
                xmax = max(float(cur.sweeps[-1]), 1.0)  # the selected run's span; longer runs are clipped
            for values, rgb in ((cur.error, ERROR_RGB), (cur.residual, RESIDUAL_RGB)):
                x, y = _log_points(cur.sweeps, values)
                if x:
                    plt.plot(x, y, marker="braille", color=rgb)
                    lows.append(min(y))
                    highs.append(max(y))
                    xmax = max(xmax, x[-1]) if self.show_all else xmax
            if cur.tolerance > 0:
                t = math.log10(cur.tolerance)
                plt.horizontal_line(t, color=TOLERANCE_RGB)
                lows.append(t)
                highs.append(t)
            for s in cur.omega_changes[1:]:
                plt.vertical_line(s, color=OMEGA_RGB)
        self._limits = None
        if lows:
            lo, hi = math.floor(min(lows)), math.ceil(max(highs))
            if hi - lo < 1:
                hi = lo + 1
            self._limits = (lo, hi, xmax)

    def render(self):
        # Ticks depend on the size, known only now: decades on y, round sweeps on x.
        if self._limits is not None:
            lo, hi, xmax = self._limits
            plt = self.plt
            plt.ylim(lo, hi)
            step = max(1, math.ceil((hi - lo) / max((self.size.height - 3) // 2, 1)))
            ticks = list(range(lo, hi + 1, step))
            plt.yticks(ticks, [_decade(t) for t in ticks])
            plt.xlim(0, xmax)
            xt = [v for v in nice_ticks(0, xmax, max(2, self.size.width // 10)) if v == int(v)]
            plt.xticks(xt, [group(v) for v in xt])
        return super().render()


class FactorPlot(PlotextPlot):
    """Measured factor per chunk (points) and the theoretical factor (a line)."""

    def __init__(self, *, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(id=id, classes=classes)
        self.sweeps = np.zeros(0)
        self.factors = np.zeros(0)
        self.theory: float | None = None

    def show(self, sweeps, factors, theory: float | None, xmax: float | None = None) -> None:
        self.sweeps, self.factors, self.theory = np.asarray(sweeps, float), np.asarray(factors, float), theory
        plt = self.plt
        plt.clear_data()
        plt.clear_figure()
        ok = np.isfinite(self.factors)
        x, y = self.sweeps[ok], self.factors[ok]
        values = list(y)
        if x.size:
            plt.scatter(x.tolist(), y.tolist(), marker="braille", color=RESIDUAL_RGB)
        if theory is not None and math.isfinite(theory):
            plt.horizontal_line(theory, color=TOLERANCE_RGB)
            values.append(theory)
        if values:
            lo, hi = min(values), max(values)
            pad = max((hi - lo) * 0.15, 1e-6)
            plt.ylim(lo - pad, hi + pad)
        top = xmax if xmax else (float(x[-1]) if x.size else 1.0)
        plt.xlim(0, max(top, 1.0))
        self.refresh()


def _decade(k: int) -> str:
    return "1" if k == 0 else f"1e{k}"


class HistoryPanel(Vertical):
    """The plot and a key line saying which colour is what."""

    def compose(self) -> ComposeResult:
        yield HistoryPlot(id="history-plot")
        yield FactorPlot(id="factor-plot")
        yield Static(id="history-key")
        yield Static(id="factor-key")

    @property
    def plot(self) -> HistoryPlot:
        return self.query_one(HistoryPlot)

    def show(self, current: Series | None, others=(), *, show_all: bool = False, factors=None, theory: float | None = None) -> None:
        plot = self.query_one(HistoryPlot)
        plot.show(current, others, show_all=show_all)
        sweeps, values = factors if factors is not None else (np.zeros(0), np.zeros(0))
        xmax = None
        if current is not None and current.sweeps.size and not show_all:
            xmax = float(current.sweeps[-1])
        self.query_one(FactorPlot).show(sweeps, values, theory, xmax)
        fkey = Text(no_wrap=True, overflow="ellipsis")
        fkey.append("• ", style=_rgb(RESIDUAL_RGB))
        last = values[-1] if len(values) else None
        fkey.append("factor per chunk" + (f" {last:.5f}" if last is not None else " —") + "  ")
        fkey.append("━ ", style=_rgb(TOLERANCE_RGB))
        fkey.append("theory " + (f"{theory:.5f}" if theory is not None else "— (no radius estimate)"))
        self.query_one("#factor-key", Static).update(fkey)
        key = Text(no_wrap=True, overflow="ellipsis")
        if current is None:
            key.append("no run yet", style="italic")
        else:
            key.append("━ ", style=_rgb(RESIDUAL_RGB))
            key.append("residual  ")
            key.append("━ ", style=_rgb(ERROR_RGB))
            key.append("est. error  ")
            key.append("━ ", style=_rgb(TOLERANCE_RGB))
            key.append("tolerance")
            if current.omega_changes[1:]:
                key.append("  │ ", style=_rgb(OMEGA_RGB))
                key.append("ω change")
            if others:
                key.append("  ━ ", style=_rgb(MUTED_RGB[0]))
                key.append("other runs: " + ", ".join(s.label for s in others), style="dim")
            key.append("  a: " + ("this run's span" if show_all else "all runs' span"), style="dim")
        self.query_one("#history-key", Static).update(key)


def _rgb(rgb) -> str:
    return "rgb({},{},{})".format(*rgb)
