"""The status strip: the stopping rule in words, why a run stopped, its balance.

Attributes down: :meth:`StatusStrip.show` takes the phase of the session, the
selected run's latest :class:`relaxtui.solver.driver.Progress` and, once the run is
done, its report (``flows``, ``source_total``, ``imbalance``).
"""

from __future__ import annotations

import math

from rich.console import Group
from rich.table import Table
from rich.text import Text
from textual.widgets import Static

STOP_REASONS = {
    "converged": "stopped: the estimated error is within the tolerance",
    "stalled": "stopped: no further progress (the tolerance may be finer than float64 resolves)",
    "diverged": "stopped: the field grows without bound (ω too large for this method?)",
    "sweep-limit": "stopped: the sweep limit was reached before the tolerance",
    "time-limit": "stopped: the time limit was reached before the tolerance",
    "cancelled": "stopped by you",
}

STATUS_STYLE = {"converged": "bold green", "diverged": "bold red", "stalled": "bold yellow",
                "sweep-limit": "bold yellow", "time-limit": "bold yellow", "cancelled": "bold"}


def _flow(v) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "—"
    return f"{v:+.4g}"


class StatusStrip(Static):
    """What the selected run is doing or why it stopped, and its flows once done."""

    def __init__(self, *, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(id=id, classes=classes)
        self.headline = ""
        self.progress = None
        self.report: dict | None = None
        self.problem: str | None = None
        self.message: str | None = None
        self.plain = ""  # the text shown, without styles (for tests and screen readers)

    def show(self, headline: str, progress=None, report: dict | None = None, problem: str | None = None,
             message: str | None = None) -> None:
        """``message`` replaces the progress's own sentence (the app words a live run's state itself)."""
        self.headline, self.progress, self.report, self.problem = headline, progress, report, problem
        self.message = message
        self._draw()

    def _draw(self) -> None:
        content = self._content()
        self.plain = "\n".join(r.plain if isinstance(r, Text) else "" for r in content.renderables)
        if self.report:
            flows = self.report.get("flows") or {}
            self.plain += "\n" + " ".join(f"{k} {_flow(v)}" for k, v in flows.items())
        self.update(content, layout=False)  # fixed height (stylesheet)

    def _content(self):
        # In order of importance: a small strip shows the first lines only.
        lines = []
        if self.problem:
            lines.append(Text("refused: " + self.problem, style="bold red", no_wrap=True, overflow="ellipsis"))
        head = Text()
        head.append(self.headline, style="bold")
        p = self.progress
        if p is not None and p.status is not None:
            head.append(" ")
            head.append(f" {p.status} ", style=STATUS_STYLE.get(p.status, "bold") + " reverse")
        message = self.message if self.message is not None else (p.message if p is not None else "")
        if message:
            head.append(" ")
            head.append(message)
        lines.append(head)
        why = None
        if p is not None and p.status is not None:
            why = Text(no_wrap=True, overflow="ellipsis", style="dim")
            why.append(STOP_REASONS.get(p.status, "stopped"))
        r = self.report
        if r is not None:
            balance = Text(no_wrap=True, overflow="ellipsis")
            balance.append("balance ", style="dim")
            imb = r.get("imbalance")
            balance.append("imbalance " + ("—" if imb is None else f"{imb:.2e}"), style="bold")
            balance.append(f" · sources {_flow(r.get('source_total'))}")
            flows = r.get("flows") or {}
            if flows:
                balance.append(" · flows in: ", style="dim")
                balance.append(", ".join(f"{name} {_flow(v)}" for name, v in flows.items()))
            lines.append(balance)
            if why is not None:
                lines.append(why)
                why = None
            if flows and self.size.height >= len(lines) + 2:
                grid = Table.grid(padding=(0, 2))
                per_row = max(1, min(4, max(self.size.width, 20) // 28))
                for _ in range(per_row):
                    grid.add_column(style="dim", no_wrap=True)
                    grid.add_column(justify="right", no_wrap=True)
                items = list(flows.items()) + [("sources", r.get("source_total"))]
                for i in range(0, len(items), per_row):
                    chunk = items[i : i + per_row]
                    cells = []
                    for name, v in chunk:
                        cells += [name, _flow(v)]
                    cells += [""] * (2 * per_row - len(cells))
                    grid.add_row(*cells)
                lines.append(Text("flows into the domain, per region:", style="dim"))
                lines.append(grid)
        if why is not None:
            lines.append(why)
        return Group(*lines)

    def on_resize(self) -> None:
        self._draw()
