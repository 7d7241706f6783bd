"""The parameters panel: method, ω, tolerance and sweep limit of the next run.

:meth:`ParamsPanel.read` turns the fields into solver options or raises
:class:`relaxtui.errors.UsageError` naming the bad field, so the app can
refuse bad input with a message. Pressing Enter in the ω field posts
:class:`ParamsPanel.OmegaSubmitted` (the app applies it to a running solve);
Escape in any field hands the focus back to the field panel.
"""

from __future__ import annotations

import math

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.message import Message
from textual.widgets import Input, Label, Select

from relaxtui.errors import UsageError


def parse_omega(text: str):
    """"auto" or a number in (0, 2)."""
    text = text.strip()
    if text.lower() == "auto" or text == "":
        return "auto"
    try:
        value = float(text)
    except ValueError:
        raise UsageError(f"ω must be a number in (0, 2) or 'auto', not {text!r}") from None
    if not 0.0 < value < 2.0:
        raise UsageError(f"ω must lie in (0, 2), got {text}")
    return value


def parse_tolerance(text: str) -> float:
    text = text.strip()
    try:
        value = float(text)
    except ValueError:
        raise UsageError(f"tolerance must be a positive number, not {text!r}") from None
    if not (value > 0.0 and math.isfinite(value)):
        raise UsageError(f"tolerance must be a positive finite number, got {text}")
    return value


def parse_max_sweeps(text: str) -> int:
    text = text.strip().replace("_", "").replace(" ", "")
    try:
        value = int(text)
    except ValueError:
        raise UsageError(f"sweep limit must be a whole number, not {text!r}") from None
    if value < 1:
        raise UsageError(f"sweep limit must be at least 1, got {value}")
    return value


class ParamField(Input):
    """A one-line input that gives the focus back on Escape."""

    BINDINGS = [Binding("escape", "leave", "Back to the field", show=False)]

    async def action_leave(self) -> None:
        await self.run_action("app.focus_panel")


class ParamsPanel(Vertical):
    """Fields for the next run's options."""

    class OmegaSubmitted(Message):
        """Enter was pressed in the ω field."""

        def __init__(self, panel: "ParamsPanel", text: str) -> None:
            super().__init__()
            self.panel = panel
            self.text = text

        @property
        def control(self) -> "ParamsPanel":
            return self.panel

    def __init__(self, methods, *, method: str, omega: str, tolerance: str, max_sweeps: str, unit: str = "",
                 id: str | None = None, classes: str | None = None) -> None:
        super().__init__(id=id, classes=classes)
        self.methods = tuple(methods)
        self._initial = (method, omega, tolerance, max_sweeps)
        self.unit = unit

    def compose(self) -> ComposeResult:
        method, omega, tolerance, max_sweeps = self._initial
        with Horizontal(classes="param-row"):
            yield Label("method", classes="param-label")
            yield Select([(m, m) for m in self.methods], value=method, allow_blank=False, compact=True, id="param-method")
        with Horizontal(classes="param-row"):
            yield Label("ω", classes="param-label")
            yield ParamField(omega, placeholder="auto or 0<ω<2", compact=True, id="param-omega")
        with Horizontal(classes="param-row"):
            yield Label("tolerance", classes="param-label", id="param-tolerance-label")
            yield ParamField(tolerance, placeholder="e.g. 1e-3", compact=True, id="param-tolerance")
        with Horizontal(classes="param-row"):
            yield Label("max sweeps", classes="param-label")
            yield ParamField(max_sweeps, compact=True, id="param-max-sweeps")

    def set_unit(self, unit: str) -> None:
        self.unit = unit
        if unit:
            self.query_one("#param-tolerance-label", Label).update(Text(f"tol. [{unit}]"))

    def read(self) -> dict:
        """The options as solver keywords; raises UsageError naming a bad field."""
        method = self.query_one("#param-method", Select).value
        if method not in self.methods:
            raise UsageError("choose a method")
        return {
            "method": method,
            "omega": parse_omega(self.query_one("#param-omega", Input).value),
            "tolerance": parse_tolerance(self.query_one("#param-tolerance", Input).value),
            "max_sweeps": parse_max_sweeps(self.query_one("#param-max-sweeps", Input).value),
        }

    def omega_text(self) -> str:
        return self.query_one("#param-omega", Input).value

    def on_input_submitted(self, event: Input.Submitted) -> None:
        if event.input.id == "param-omega":
            event.stop()
            self.post_message(self.OmegaSubmitted(self, event.value))
