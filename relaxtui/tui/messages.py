"""Small shared pieces of the UI's widgets: the base of panel messages and key tables."""

from __future__ import annotations

import functools

from textual.binding import Binding
from textual.css.query import NoMatches
from textual.message import Message


class PanelMessage(Message):
    """A message a panel posts about itself (``control`` is the panel, for Textual's selectors)."""

    def __init__(self, panel) -> None:
        super().__init__()
        self.panel = panel

    @property
    def control(self):
        return self.panel


def hidden_keys(*rows: tuple[str, str, str]) -> list[Binding]:
    """Bindings not shown in the footer, from ``(keys, action, description)`` rows."""
    return [Binding(keys, action, description, show=False) for keys, action, description in rows]


class WorkerEvent(Message):
    """An event of a worker thread (see :mod:`relaxtui.tui.worker`), posted to the app."""

    def __init__(self, event) -> None:
        super().__init__()
        self.event = event


def while_open(handler):
    """Run a handler only while the main screen is up: worker messages and timers that
    arrive before mounting or during shutdown (widgets already gone) are dropped."""

    @functools.wraps(handler)
    def wrapper(self, *args, **kwargs):
        if self._gone():
            return None
        try:
            return handler(self, *args, **kwargs)
        except NoMatches:
            if self._closing_down():
                return None
            raise

    return wrapper
