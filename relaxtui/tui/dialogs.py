"""Modal screens: the key help, the quit confirmation and the export form."""

from __future__ import annotations

from pathlib import Path

from rich.table import Table
from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical, VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import Input, Label, Static

from relaxtui.errors import RelaxError

HELP_SECTIONS = (
    ("Solving", (
        ("s", "start a run from the initial guess with the parameters shown"),
        ("c", "continue: a new run starting from the chosen run's field"),
        ("space", "pause / resume the running solve"),
        ("n", "single step: one chunk of sweeps (pauses a running solve first)"),
        ("x", "stop the run (it keeps its field and report, status cancelled); stops a scan too"),
        ("e", "export the chosen run: field .npy, report .json, history .csv"),
    )),
    ("Parameters", (
        ("m / o / t / p", "go to the method, ω, tolerance or precision field"),
        ("← → in method", "choose the method (or the precision); enter or escape goes back"),
        ("enter in a field", "check the value (refused with a message if bad) and go back to the panels"),
        ("enter in ω", "while a run is going: change its ω now (recorded in its history)"),
        ("escape", "leave a field, back to the panels"),
    )),
    ("Panels", (
        ("1 2 3 4", "field, residual history, runs, ω study (at 80 columns one shows at a time)"),
        ("w", "the ω study: sweeps to tolerance against ω, Young's curve, the automatic ω"),
        ("r / l", "in the ω study: type a scan range (1.80:1.98:0.02) / load a relaxtui sweep CSV"),
        ("tab", "move the focus between panels and fields"),
        ("enter in runs", "show that run's history, field and report"),
    )),
    ("Field panel", (
        ("v", "cycle the view: solution, residual of each cell, latest update (symmetric log scales)"),
        ("h", "scale the solution to the domain's values, or include held values and ambients"),
        ("arrows", "move the probe one pixel; the view follows"),
        ("shift+arrows", "move a quarter of the panel"),
        ("+ / -", "zoom in / out around the probe"),
        ("0", "show the whole grid"),
    )),
    ("History panel", (
        ("a", "the x-axis spans the chosen run, or every run"),
    )),
    ("Other", (
        ("?", "this help"),
        ("q", "quit (asks first while a run is in progress)"),
    )),
)


class HelpScreen(ModalScreen[None]):
    """Every key, in groups."""

    BINDINGS = [Binding("escape,q,question_mark,enter", "dismiss", "Close", show=True)]

    def compose(self) -> ComposeResult:
        table = Table.grid(padding=(0, 2))
        table.add_column(style="bold", no_wrap=True)
        table.add_column()
        for title, keys in HELP_SECTIONS:
            table.add_row(Text(title, style="bold underline"), "")
            for key, what in keys:
                table.add_row(key, what)
        with VerticalScroll(id="help-box", classes="dialog") as box:
            box.border_title = "relaxtui keys"
            box.border_subtitle = "escape closes"
            yield Static(table)

    def action_dismiss(self, result=None) -> None:
        self.dismiss(None)


class ConfirmQuit(ModalScreen[bool]):
    """Quit while a run is in progress? y / n."""

    BINDINGS = [
        Binding("y", "answer(True)", "Quit", show=True),
        Binding("n,escape", "answer(False)", "Stay", show=True),
    ]

    def __init__(self, what: str) -> None:
        super().__init__()
        self.what = what

    def compose(self) -> ComposeResult:
        with Vertical(id="confirm-box", classes="dialog") as box:
            box.border_title = "Quit?"
            yield Label(Text(f"{self.what} is in progress."))
            yield Label("Quit and stop it?  [b]y[/b] quit · [b]n[/b] stay")

    def action_answer(self, answer: bool) -> None:
        self.dismiss(answer)


class ExportScreen(ModalScreen[dict | None]):
    """Paths for the field, report and history of one run; empty skips a file.

    The folders are checked before the form closes (a missing folder is
    refused here, with a message); the app then writes in a worker.
    """

    BINDINGS = [Binding("escape", "cancel", "Cancel", show=True)]

    def __init__(self, what: str, defaults: dict[str, str], check) -> None:
        super().__init__()
        self.what = what
        self.defaults = defaults
        self.check = check  # callable(**paths): raises RelaxError for a path that cannot be written
        self.message = ""

    def compose(self) -> ComposeResult:
        with Vertical(id="export-box", classes="dialog") as box:
            box.border_title = f"Export {self.what}"
            box.border_subtitle = "enter writes · escape cancels"
            for key, label in (("out", "field .npy"), ("report", "report .json"), ("history", "history .csv")):
                with Horizontal(classes="export-row"):
                    yield Label(label, classes="export-label")
                    yield Input(self.defaults.get(key, ""), id=f"export-{key}", compact=True)
            yield Label("", id="export-message")

    def paths(self) -> dict[str, str | None]:
        result = {}
        for key in ("out", "report", "history"):
            text = self.query_one(f"#export-{key}", Input).value.strip()
            result[key] = text or None
        return result

    def on_input_submitted(self, event: Input.Submitted) -> None:
        event.stop()
        paths = self.paths()
        if not any(paths.values()):
            self._say("nothing to write: give at least one path")
            return
        try:
            self.check(**{k: Path(v) if v else None for k, v in paths.items()})
        except RelaxError as exc:
            self._say(str(exc))
            return
        self.dismiss(paths)

    def _say(self, text: str) -> None:
        self.message = text
        self.query_one("#export-message", Label).update(Text(text, style="bold red"))

    def action_cancel(self) -> None:
        self.dismiss(None)
