"""The parameters panel: method, ω, tolerance and sweep limit of the next run.

The app talks to the panel through methods: :meth:`ParamsPanel.set_defaults`,
:meth:`ParamsPanel.focus_field`, :meth:`ParamsPanel.read` (the options as
solver keywords, or :class:`relaxtui.errors.UsageError` naming the bad field),
:meth:`ParamsPanel.set_unit` and :meth:`ParamsPanel.set_radius`.

Every field is checked when Enter is pressed in it, with the command line's
messages; a valid value hands the focus back to the panels (so the footer's
keys work at once), a bad one keeps the focus and is refused with a message.
Escape leaves a field without checking. Enter in the ω field posts
:class:`ParamsPanel.OmegaSubmitted` (the app applies it to a running solve).

The method is a small spinner (left/right or up/down choose, Enter confirms),
not a drop-down list: no overlay to cover the status strip at 80 x 24, and
letters are never swallowed by a search. When the method changes, ω goes back
to ``auto`` unless the user set a value for that method earlier; a Jacobi
weight above 1 is flagged beside the field.
"""

from __future__ import annotations

from rich.text import Text
from textual import events
from textual.app import ComposeResult
from textual.binding import Binding, NoBinding
from textual.containers import Horizontal, Vertical
from textual.message import Message
from textual.reactive import reactive
from textual.widget import Widget
from textual.widgets import Input, Label

from relaxtui import options
from relaxtui.errors import UsageError
from relaxtui.tui.messages import PanelMessage

PRECISIONS = options.PRECISIONS
TITLE = "Next run"

FIELD_LABEL = {"omega": "ω", "tolerance": "tolerance", "max-sweeps": "sweep limit"}


def _labelled(which: str, parse, text: str):
    """Parse with the one options path (the command line's messages), the field named in front."""
    try:
        return parse(text)
    except UsageError as exc:
        raise UsageError(f"{FIELD_LABEL[which]}: {exc}") from None


def parse_omega(text: str):
    """"auto" (also for an empty field) or a number in (0, 2)."""
    text = text.strip()
    return _labelled("omega", options.parse_omega, "auto" if text == "" else text)


def parse_tolerance(text: str) -> float:
    return _labelled("tolerance", options.parse_tolerance, text)


def parse_max_sweeps(text: str) -> int:
    return _labelled("max-sweeps", options.parse_max_sweeps, text)


PARSERS = {"omega": parse_omega, "tolerance": parse_tolerance, "max-sweeps": parse_max_sweeps}


def jacobi_warning(omega, mu: float | None) -> str:
    """A warning for a Jacobi weight above 1 (empty when there is none).

    Weighted Jacobi's factor on a 2-cyclic operator is max |1 - w (1 ± μ)|
    (Young 1971; :func:`relaxtui.solver.young.jacobi_factor`): above 1 once
    w > 2 / (1 + μ), which is barely above 1 on a fine grid (μ near 1).
    """
    if omega == "auto" or omega is None or float(omega) <= 1.0:
        return ""
    if mu is not None:
        limit = 2.0 / (1.0 + mu)
        verdict = "diverges" if float(omega) > limit else "converges slower than at 1"
        return f"Jacobi weight {float(omega):g} > 1: {verdict} (limit 2/(1+μ) = {limit:.4f})"
    return f"Jacobi weight {float(omega):g} > 1: diverges once it exceeds 2/(1+μ), just above 1 on a fine grid"


class ParamField(Input):
    """A one-line input: Enter checks it, Escape gives the focus back.

    Keys reach a widget in the order they were typed, but Textual forwards a
    burst of keys to the widget focused when each was read, and runs a
    widget's bindings after the characters queued behind them. So this field
    runs its own bindings (Enter, Escape, the editing keys) in order with the
    characters, and a key that arrives after Enter handed the focus back
    (``1.85⏎s`` in one burst) is passed on to the app, where the footer's
    action takes it: it never lands in the field.
    """

    BINDINGS = [Binding("escape", "leave", "Back", show=True)]

    async def action_leave(self) -> None:
        await self.run_action("app.focus_panel")

    async def action_submit(self) -> None:
        parse = PARSERS.get((self.id or "").removeprefix("param-"))
        ok = True
        if parse is not None:
            try:
                parse(self.value)
            except UsageError:
                ok = False  # the panel refuses it with the message; the field keeps the focus
        await super().action_submit()
        if ok:
            await self.run_action("app.focus_panel")

    async def _on_key(self, event: events.Key) -> None:
        if self.screen.focused is not self:  # set at once by set_focus (has_focus follows an event later)
            event.stop()
            event.prevent_default()
            self.app.post_message(events.Key(event.key, event.character))
            return
        bindings = []
        if not event.is_printable:
            try:
                bindings = self._bindings.get_bindings_for_key(event.key)
            except NoBinding:  # Tab and other keys this field does not bind: Textual's own handling
                bindings = []
        if bindings:
            event.stop()
            event.prevent_default()
            await self.run_action(bindings[0].action)
            return
        await super()._on_key(event)


class MethodChoice(Widget, can_focus=True):
    """A choice among names (the method, the precision): left/right (or up/down) choose, Enter confirms
    and gives the focus back."""

    BINDINGS = [
        Binding("left,up", "turn(-1)", "Previous", show=False),
        Binding("right,down", "turn(1)", "Next", show=False),
        Binding("enter", "confirm", "Done", show=True),
        Binding("escape", "confirm", "Back", show=True),
    ]

    value = reactive("")

    class Changed(Message):
        def __init__(self, choice: "MethodChoice", old: str, new: str) -> None:
            super().__init__()
            self.choice, self.old, self.new = choice, old, new

    def __init__(self, methods, value: str, *, id: str | None = None) -> None:
        super().__init__(id=id)
        self.methods = tuple(methods)
        self.set_reactive(MethodChoice.value, value)

    def watch_value(self, old: str, new: str) -> None:
        if old != new:
            self.post_message(self.Changed(self, old, new))

    def action_turn(self, step: int) -> None:
        i = self.methods.index(self.value) if self.value in self.methods else 0
        self.value = self.methods[(i + step) % len(self.methods)]

    async def action_confirm(self) -> None:
        await self.run_action("app.focus_panel")

    def render(self):
        text = Text()
        text.append("◂ ", style="dim")
        text.append(self.value, style="bold" if self.has_focus else "")
        text.append(" ▸", style="dim")
        return text


class ParamsPanel(Vertical):
    """Fields for the next run's options."""

    class OmegaSubmitted(PanelMessage):
        """Enter was pressed in the ω field with a valid value (``value``: a number or "auto")."""

        def __init__(self, panel: "ParamsPanel", text: str, value=None) -> None:
            super().__init__(panel)
            self.text = text
            self.value = value

    class Refused(PanelMessage):
        """Enter was pressed in a field with a bad value."""

        def __init__(self, panel: "ParamsPanel", text: str) -> None:
            super().__init__(panel)
            self.text = text

    def __init__(self, methods, *, method: str, omega: str, tolerance: str, max_sweeps: str, unit: str = "",
                 precision: str = "double", id: str | None = None, classes: str | None = None) -> None:
        super().__init__(id=id, classes=classes)
        self.methods = tuple(methods)
        self._initial = (method, omega, tolerance, max_sweeps)
        self._initial_precision = precision
        self.unit = unit
        self.omega_by_method: dict[str, str] = {}  # ω text the user set, per method
        self.mu: float | None = None  # the latest measured Jacobi radius (for the Jacobi warning)
        if omega not in ("", "auto"):
            self.omega_by_method[method] = omega

    def compose(self) -> ComposeResult:
        method, omega, tolerance, max_sweeps = self._initial
        with Horizontal(classes="param-row"):
            yield Label("method", classes="param-label")
            yield MethodChoice(self.methods, method, id="param-method")
        with Horizontal(classes="param-row"):
            yield Label("ω", classes="param-label")
            yield ParamField(omega, placeholder="auto or 0<ω<2", compact=True, id="param-omega")
        with Horizontal(classes="param-row"):
            yield Label("tolerance", classes="param-label", id="param-tolerance-label")
            yield ParamField(tolerance, placeholder="e.g. 1e-3", compact=True, id="param-tolerance")
        with Horizontal(classes="param-row"):
            yield Label("max sweeps", classes="param-label")
            yield ParamField(max_sweeps, compact=True, id="param-max-sweeps")
        with Horizontal(classes="param-row"):
            yield Label("precision", classes="param-label")
            yield MethodChoice(PRECISIONS, self._initial_precision, id="param-precision")

    def on_mount(self) -> None:
        self.border_title = TITLE

    # -- the app's interface ---------------------------------------------------------
    def field(self, which: str):
        return self.query_one(f"#param-{which}")

    def focus_field(self, which: str) -> None:
        self.screen.set_focus(self.field(which))  # at once: keys typed right after land in the field

    def set_defaults(self, method=None, omega=None, tolerance=None, max_sweeps=None, precision=None) -> None:
        """Show the case's defaults (None leaves a field as it is)."""
        if precision is not None:
            self.field("precision").set_reactive(MethodChoice.value, precision)
            self.field("precision").refresh()
        if method is not None:
            self.field("method").set_reactive(MethodChoice.value, method)
            self.field("method").refresh()
        if omega is not None:
            text = "auto" if omega == "auto" else f"{omega:g}"
            self.field("omega").value = text
            if text != "auto":
                self.omega_by_method[self.method] = text
        if tolerance is not None:
            self.field("tolerance").value = f"{tolerance:g}"
        if max_sweeps is not None:
            self.field("max-sweeps").value = str(max_sweeps)
        self._warn()

    @property
    def method(self) -> str:
        return self.field("method").value

    def set_unit(self, unit: str) -> None:
        self.unit = unit
        if unit:
            self.query_one("#param-tolerance-label", Label).update(Text(f"tol. [{unit}]"))

    def set_radius(self, mu: float | None) -> None:
        if mu is not None:
            self.mu = mu
            self._warn()

    def read(self) -> dict:
        """The options as solver keywords; raises UsageError naming a bad field."""
        method = self.method
        if method not in self.methods:
            raise UsageError("choose a method")
        return {
            "method": method,
            "omega": parse_omega(self.field("omega").value),
            "tolerance": parse_tolerance(self.field("tolerance").value),
            "max_sweeps": parse_max_sweeps(self.field("max-sweeps").value),
            "precision": self.field("precision").value,
        }

    def omega_text(self) -> str:
        return self.field("omega").value

    def warning(self) -> str:
        try:
            omega = parse_omega(self.omega_text())
        except UsageError:
            return ""
        return jacobi_warning(omega, self.mu) if self.method == "jacobi" else ""

    # -- events ------------------------------------------------------------------------
    def _warn(self) -> None:
        """The short warning in the panel's title, in place of "Next run" (the whole sentence is the
        toast at start): the title line is there at every terminal size, a row under the fields is not."""
        text = self.warning()
        short = ""
        if text:
            w = float(parse_omega(self.omega_text()))
            verdict = "may diverge" if self.mu is None else ("diverges" if w > 2.0 / (1.0 + self.mu) else "is slower")
            short = f"⚠ weight {w:g} > 1 {verdict}"
        self.border_title = short or TITLE
        self.set_class(bool(text), "-warning")

    def on_method_choice_changed(self, event: MethodChoice.Changed) -> None:
        event.stop()
        if event.choice.id != "param-method":  # the precision choice: nothing else follows it
            return
        current = self.field("omega").value.strip()
        if current.lower() not in ("", "auto"):
            self.omega_by_method[event.old] = current
        self.field("omega").value = self.omega_by_method.get(event.new, "auto")
        self._warn()

    def on_input_changed(self, event: Input.Changed) -> None:
        if event.input.id == "param-omega":
            self._warn()

    def on_input_submitted(self, event: Input.Submitted) -> None:
        event.stop()
        which = (event.input.id or "").removeprefix("param-")
        parse = PARSERS.get(which)
        if parse is None:
            return
        try:
            value = parse(event.value)
        except UsageError as exc:
            self.post_message(self.Refused(self, str(exc)))
            return
        if which == "omega":
            text = event.value.strip()
            if text.lower() not in ("", "auto"):
                self.omega_by_method[self.method] = text
            else:
                self.omega_by_method.pop(self.method, None)
            self.post_message(self.OmegaSubmitted(self, event.value, value))
