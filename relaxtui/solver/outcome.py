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


class FieldExport:
    """The exported field of a run (interior cells, fixed cells at their exact value, NaN elsewhere),
    made from the working array only when asked: row strips (:meth:`rows`), a few cells (indexing with
    two index arrays), or the whole (rows, cols) float64 copy (:meth:`full`).

    Indexing with a row slice gives those rows, so the report's strip-wise functions
    (:func:`relaxtui.output.report.extremes`, ``peak_flux_in_strips``) and the probes read it as
    they read an array. The working array must not change while this is in use (a finished run's).
    """

    ndim = 2
    dtype = np.dtype(np.float64)

    def __init__(self, operator, u: np.ndarray):
        self.operator = operator
        self.u = u
        self.shape = tuple(operator.shape)

    def rows(self, a: int, b: int, out: np.ndarray | None = None) -> np.ndarray:
        """Rows a .. b - 1 of the exported field (into ``out``, (b - a, cols) float64, when given)."""
        return self.operator.export_rows(self.u, a, b, out)

    def full(self) -> np.ndarray:
        return self.operator.finish(self.u)

    def __getitem__(self, key):
        if isinstance(key, slice):
            a, b, step = key.indices(self.shape[0])
            if step != 1:
                raise IndexError("a field export gives contiguous rows only")
            return self.rows(a, max(a, b))
        if isinstance(key, tuple) and len(key) == 2:
            return self.operator.export_cells(self.u, np.asarray(key[0]), np.asarray(key[1]))
        raise IndexError(f"a field export takes a row slice or two index arrays, not {key!r}")


class SolveResult:
    """A finished run: its report, history, case, probe log and exported field.

    The field (``(rows, cols)`` float64, NaN outside the domain) is made on first access when the
    result was built with an ``export`` (:class:`FieldExport`), so writing the outputs need not hold
    a second full-size copy (:meth:`field_rows` streams it). Setting ``field = None`` drops it and
    the export (a screen session releasing an old run's memory).
    """

    def __init__(self, field: np.ndarray | None = None, report: dict | None = None, history: History | None = None,
                 case: model.Case | None = None, probes=None, *, export: FieldExport | None = None):
        self._field = field
        self.export = export if field is None else None
        self.report = report
        self.history = history
        self.case = case
        self.probes = probes  # relaxtui.output.probes.ProbeLog of a case with probes (case format v1.1)

    @property
    def field(self) -> np.ndarray | None:
        if self._field is None and self.export is not None:
            self._field = self.export.full()
            self.export = None  # the working array is not needed any more
        return self._field

    @field.setter
    def field(self, value) -> None:
        self._field = value
        self.export = None

    @property
    def field_shape(self) -> tuple[int, int] | None:
        if self._field is not None:
            return tuple(self._field.shape)
        return self.export.shape if self.export is not None else None

    def field_rows(self, a: int, b: int, out: np.ndarray) -> np.ndarray:
        """Rows a .. b - 1 of the exported field into ``out`` ((b - a, cols) float64), without making the
        whole field when it has not been made yet."""
        if self._field is None and self.export is not None:
            return self.export.rows(a, b, out)
        np.copyto(out, self.field[a:b], casting="same_kind")
        return out



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
