"""The banner: one line naming the case and saying what the session is doing."""

from __future__ import annotations

from rich.table import Table
from rich.text import Text
from textual.widgets import Static


class Banner(Static):
    """The top line: the case and what the session is doing."""

    plain = ""  # the text shown, without styles (for tests and screen readers)

    def show(self, case_text: str, phase_text: str, phase_style: str = "bold") -> None:
        self.plain = f"relaxtui {case_text} {phase_text}"
        t = Table.grid(expand=True)
        t.add_column(no_wrap=True, overflow="ellipsis", ratio=1)
        t.add_column(no_wrap=True, justify="right")
        left = Text()
        left.append(" relaxtui ", style="bold reverse")
        left.append(" " + case_text)
        t.add_row(left, Text(phase_text + " ", style=phase_style))
        self.update(t, layout=False)
