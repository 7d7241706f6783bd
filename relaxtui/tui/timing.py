"""The timing panel: how fast the selected run goes and how far it has to go.

Attributes down: the app sets :attr:`TimingPanel.progress` (an immutable
:class:`relaxtui.solver.driver.Progress`) and the recent sweep rate it measured from
consecutive snapshots; the panel only formats them.
"""

from __future__ import annotations

import math

from rich.table import Table
from rich.text import Text
from textual.widgets import Static

from relaxtui.output.text import group, group_float

__all__ = ["TimingPanel", "duration", "group", "sci"]


def duration(seconds: float | None) -> str:
    """1.23 s, 12.3 s, 4 min 05 s, 2 h 03 min."""
    if seconds is None or not math.isfinite(seconds):
        return "—"
    if seconds < 10:
        return f"{seconds:.2f} s"
    if seconds < 60:
        return f"{seconds:.1f} s"
    if seconds < 3600:
        m, s = divmod(int(round(seconds)), 60)
        return f"{m} min {s:02d} s"
    h, m = divmod(int(round(seconds / 60)), 60)
    return f"{h} h {m:02d} min"


def sci(v: float | None, unit: str = "") -> str:
    if v is None:
        return "—"
    if not math.isfinite(v):
        return "not yet" if v > 0 else "—"
    return f"{v:.2e}{(' ' + unit) if unit else ''}"


class TimingPanel(Static):
    """Sweeps, speed, elapsed, ETA, convergence factor and ω of the selected run."""

    def __init__(self, *, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(id=id, classes=classes)
        self.progress = None
        self.sweep_rate: float | None = None
        self.unit = ""
        self.note = "no run yet"
        self.note_lines = 2  # lines of the omega note shown (the app sets it by layout)
        self.to_go = "—"

    def show(self, progress, sweep_rate: float | None = None, note: str | None = None, to_go: str | None = None) -> None:
        """Display ``progress`` (or a note when there is none); ``to_go`` is what is left, in words."""
        self.progress = progress
        self.sweep_rate = sweep_rate
        self.to_go = to_go or "—"
        if note is not None:
            self.note = note
        self.update(self._table(), layout=False)  # the panel's height is fixed by the stylesheet

    def _table(self):
        p = self.progress
        if p is None:
            return Text(self.note, style="italic")
        t = Table.grid(padding=(0, 1), expand=True)
        t.add_column(style="dim", no_wrap=True)
        t.add_column(no_wrap=True, overflow="ellipsis")
        rate = self.sweep_rate
        if rate is None and p.seconds > 0:
            rate = p.sweeps / p.seconds
        t.add_row("sweeps", group(p.sweeps))
        t.add_row("rate", "—" if not rate else f"{group_float(rate)} sweeps/s")
        t.add_row("speed", f"{p.mcells_per_s:.1f} Mcell/s" if p.mcells_per_s else "—")
        t.add_row("elapsed", duration(p.seconds))
        t.add_row("to go", self.to_go if p.status is None else "done")
        t.add_row("factor", "—" if p.factor is None else f"ρ {p.factor:.6f}")
        t.add_row("ω", f"{p.omega:.4f}")
        t.add_row("residual", sci(p.residual, self.unit))
        t.add_row("error", sci(p.estimated_error, self.unit))
        from rich.console import Group

        return Group(t, Text(self._short(p.omega_note), style="dim italic"))

    def _short(self, note: str) -> str:
        """The note wrapped to the panel, cut to ``note_lines`` lines."""
        import textwrap

        width = max(self.content_size.width, 10)
        lines = textwrap.wrap(note, width)
        if len(lines) > self.note_lines:
            lines = lines[: self.note_lines]
            lines[-1] = lines[-1][: width - 1].rstrip() + "…"
        return "\n".join(lines)

    def on_resize(self) -> None:
        if self.progress is not None:
            self.update(self._table(), layout=False)
