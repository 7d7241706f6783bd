"""What a run hands out: :class:`Progress` snapshots while it goes, the
:class:`SolveResult` at its end, and writing that result's files as one set.

The driver (:mod:`relaxtui.solver.driver`) builds these; it re-exports every
name here, so ``relaxtui.solver.driver.Progress`` and the others keep working.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from relaxtui.case import model
from relaxtui.solver.history import History


@dataclass(frozen=True)
class Progress:
    """An immutable snapshot of a run, safe to hand to another thread."""

    sweeps: int
    seconds: float
    residual: float
    estimated_error: float
    factor: float | None
    eta_sweeps: float | None
    eta_seconds: float | None
    mcells_per_s: float
    omega: float
    omega_note: str
    method: str
    tolerance: float
    status: str | None
    message: str
    background: str = ""  # work running beside the sweeps (the Jacobi radius estimate), "" when none


@dataclass
class SolveResult:
    field: np.ndarray
    report: dict
    history: History
    case: model.Case
    probes: object = None  # relaxtui.output.probes.ProbeLog of a case with probes (case format v1.1)



def check_outputs(**paths) -> None:
    """Refuse, before any work, output paths whose folder does not exist."""
    from relaxtui.output.atomic import check_target

    for what, path in paths.items():
        if path is not None:
            check_target(path, what)


def write_outputs(result: SolveResult, *, out=None, report=None, history=None, probes=None) -> list[Path]:
    """Write the field (.npy), report (.json), history (.csv) and probe log (.csv, v1.1) as one set."""
    from relaxtui.output.sets import write_run_outputs

    check_outputs(field=out, report=report, history=history, probes=probes)
    return write_run_outputs(result, out=out, report=report, history=history, probes=probes)  # temporaries, then renames
