"""What the banner, the status strip and the field title say about the session (pure text).

Every word about a run's state comes from its :class:`~relaxtui.tui.session.RunRecord`
``status`` (the one source of truth) and its latest progress snapshot, so the
banner, the field's title and the status strip can never disagree.
"""

from __future__ import annotations

from relaxtui.output.text import group
from relaxtui.tui.timing import duration

PHASE_STYLE = {"loading": "bold yellow", "load-failed": "bold red", "ready": "bold green", "preparing": "bold yellow",
               "running": "bold yellow", "paused": "bold cyan", "stopping": "bold", "finishing": "bold"}


def banner_phase(phase: str, rec) -> tuple[str, str]:
    """The right-hand side of the banner: the session's phase and the active run."""
    style = PHASE_STYLE.get(phase, "bold")
    if phase == "loading":
        return "loading the case…", style
    if phase == "load-failed":
        return "cannot load", style
    if phase == "ready" or rec is None:
        return phase, style
    sweeps = f" · {group(rec.progress.sweeps)} sweeps" if rec.progress is not None and phase != "preparing" else ""
    mark = {"running": "● ", "paused": "‖ "}.get(phase, "")
    word = {"finishing": "finishing", "stopping": "stopping"}.get(phase, phase)
    return f"{mark}{word} #{rec.id}{sweeps}" + ("…" if phase in ("preparing", "stopping", "finishing") else ""), style


def to_go_text(rec) -> str:
    """Sweeps and time left, and what will end the run."""
    left = rec.to_go()
    if left.by == "":
        return "—"
    parts = []
    if left.seconds is not None:
        parts.append(duration(left.seconds))
    if left.sweeps is not None:
        parts.append(f"{group(left.sweeps)} sw")
    text = " · ".join(parts) or "—"
    if left.by == "tolerance":
        return f"{text} (tolerance)"
    return f"{'≤ ' if not left.forecast else ''}{text} ({left.by})"


def run_message(rec) -> str:
    """The status strip's sentence about a live run (the driver's words once it has ended)."""
    p = rec.progress
    if p is None:
        return ""
    if p.status is not None or not rec.live or rec.status == "preparing":
        return p.message
    unit = ""
    err = "not yet estimable" if p.estimated_error is None or p.estimated_error != p.estimated_error or p.estimated_error == float("inf") else f"{p.estimated_error:.2g}"
    left = rec.to_go()
    end = ""
    if left.by and left.sweeps is not None:
        bound = "at most " if not left.forecast else "about "
        end = f"; {bound}{group(left.sweeps)} sweeps to go, ended by the {left.by}"
    return f"{rec.status}: estimated error {err}{unit}, tolerance {p.tolerance:.3g}{end}"
