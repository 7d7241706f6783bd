"""The runs panel: a table of this session's runs and a line about the chosen one.

Each row is one :class:`RunRow` (an immutable summary the app builds). Enter
on a row posts :class:`RunsPanel.RunChosen`; the app then shows that run's
history, field and report.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Vertical
from textual.widgets import DataTable, Static

from relaxtui.output.text import group
from relaxtui.tui.messages import PanelMessage

# Methods by their command-line names; ω "auto" says it was chosen from the measured Jacobi radius.
COLUMNS = ("#", "method", "ω", "tolerance", "sweeps", "seconds", "status", "factor")


@dataclass(frozen=True)
class RunRow:
    """What the table shows of one run."""

    run_id: int
    method: str
    omega: float | None  # the ω in use at the end (None until prepared)
    omega_auto: bool
    tolerance: float
    sweeps: int
    seconds: float
    status: str  # converged, ..., or running / paused / preparing / failed
    factor: float | None
    start: str  # "initial guess" or "run #k"
    message: str = ""


def _cells(row: RunRow, selected: bool) -> list:
    omega = "—" if row.omega is None else f"{row.omega:.3f}"
    if row.omega_auto:
        omega = "auto" if row.omega is None else f"{omega} auto"
    factor = "—" if row.factor is None or not math.isfinite(row.factor) else f"{row.factor:.5f}"
    status_style = {"converged": "bold green", "diverged": "bold red", "failed": "bold red", "running": "bold yellow",
                    "paused": "yellow", "preparing": "yellow", "cancelled": "dim"}.get(row.status, "")
    mark = "▸" if selected else " "
    return [
        Text(f"{mark}{row.run_id}"),
        row.method,
        omega,
        f"{row.tolerance:.0e}",
        Text(group(row.sweeps), justify="right"),
        Text(f"{row.seconds:.2f}", justify="right"),
        Text(row.status, style=status_style),
        factor,
    ]


class RunsPanel(Vertical):
    """The session's runs; Enter shows a run."""

    class RunChosen(PanelMessage):
        def __init__(self, panel: "RunsPanel", run_id: int) -> None:
            super().__init__(panel)
            self.run_id = run_id

    def __init__(self, *, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(id=id, classes=classes)
        self.rows: dict[int, RunRow] = {}
        self.selected: int | None = None

    def compose(self) -> ComposeResult:
        table = DataTable(id="runs-table", cursor_type="row", zebra_stripes=True)
        yield table
        yield Static(id="runs-detail")

    def on_mount(self) -> None:
        table = self.query_one(DataTable)
        for name in COLUMNS:
            table.add_column(name, key=name)
        self._detail()

    @property
    def table(self) -> DataTable:
        return self.query_one(DataTable)

    def set_row(self, row: RunRow) -> None:
        """Add or update one run's row."""
        table = self.table
        cells = _cells(row, row.run_id == self.selected)
        key = str(row.run_id)
        if row.run_id in self.rows:
            old = _cells(self.rows[row.run_id], row.run_id == self.selected)
            for name, value, before in zip(COLUMNS, cells, old):
                if str(value) != str(before):
                    # widen a column only when the text grew (a width change re-lays the table out)
                    table.update_cell(key, name, value, update_width=len(str(value)) > len(str(before)))
        else:
            table.add_row(*cells, key=key)
        self.rows[row.run_id] = row
        if row.run_id == self.selected:
            self._detail()

    def select(self, run_id: int | None) -> None:
        """Mark ``run_id`` as the run on show (and move the cursor to it)."""
        old, self.selected = self.selected, run_id
        for rid in (old, run_id):
            if rid is not None and rid in self.rows:
                self.table.update_cell(str(rid), "#", _cells(self.rows[rid], rid == run_id)[0])
        if run_id is not None and run_id in self.rows:
            self.table.move_cursor(row=self.table.get_row_index(str(run_id)))
        self._detail()

    def _detail(self) -> None:
        row = self.rows.get(self.selected) if self.selected is not None else None
        detail = self.query_one("#runs-detail", Static)
        if row is None:
            detail.update(Text("no runs yet — s starts one", style="italic"), layout=False)
            return
        text = Text()
        text.append(f"#{row.run_id} {row.method}", style="bold")
        text.append(f" from {row.start}; ")
        text.append(row.message or row.status)
        if row.omega_auto:
            text.append(" · ω auto: from the measured Jacobi radius", style="dim")
        detail.update(text, layout=False)

    def focus_table(self) -> None:
        self.table.focus()

    def on_data_table_row_selected(self, event: DataTable.RowSelected) -> None:
        event.stop()
        self.post_message(self.RunChosen(self, int(event.row_key.value)))
