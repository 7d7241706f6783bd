"""Probes (case format v1.1): named points whose values a run reports and logs.

A probe at (x, y) metres (origin at the picture's bottom-left corner, y up, the
report's convention) reads the field bilinearly between the four cell centres
around it: fractional column x/h - 1/2, fractional row rows - y/h - 1/2. A
centre that is not a domain cell (interior or fixed) or lies beyond the
picture drops out and the other weights are scaled to sum to 1 (the cell that
holds the point always keeps a weight of at least 1/4, so the value is always
defined). The loader has already refused points outside the domain.

For the UI: :func:`probe_points` gives each probe's name and fractional
(row, col) for marks on the heatmap; :meth:`ProbeSet.values` reads a working
field (padded) or an exported one; :class:`ProbeLog` holds the values
recorded after every chunk of a run (``Run.probe_log``).
"""

from __future__ import annotations

import math

import numpy as np

from relaxtui.case.model import FIXED, INTERIOR


def probe_points(case) -> list[tuple[str, float, float]]:
    """(name, fractional row, fractional column) of each probe, cell centres at integers."""
    rows = case.shape[0]
    h = case.cell_size
    return [(p.name, rows - p.y / h - 0.5, p.x / h - 0.5) for p in case.probes]


class ProbeSet:
    """The bilinear stencils of a case's probes."""

    def __init__(self, case):
        self.names = [p.name for p in case.probes]
        rows, cols = case.shape
        kinds = case.kind_codes()  # per region; looked up at the probes' cells only (no picture-sized temporary)
        self.rows = np.zeros((len(self.names), 4), dtype=np.int64)
        self.cols = np.zeros((len(self.names), 4), dtype=np.int64)
        self.weights = np.zeros((len(self.names), 4))
        for n, (_, fr, fc) in enumerate(probe_points(case)):
            i0, j0 = math.floor(fr), math.floor(fc)
            ty, tx = fr - i0, fc - j0
            k = 0
            for di, wy in ((0, 1.0 - ty), (1, ty)):
                for dj, wx in ((0, 1.0 - tx), (1, tx)):
                    i, j = i0 + di, j0 + dj
                    inside = 0 <= i < rows and 0 <= j < cols
                    self.rows[n, k] = min(max(i, 0), rows - 1)
                    self.cols[n, k] = min(max(j, 0), cols - 1)
                    self.weights[n, k] = wy * wx if inside and kinds[case.codes[i, j]] in (INTERIOR, FIXED) else 0.0
                    k += 1
            total = self.weights[n].sum()
            if total > 0:
                self.weights[n] /= total

    def __len__(self) -> int:
        return len(self.names)

    def values(self, field: np.ndarray, padded: bool = False, lookup=None) -> np.ndarray:
        """The probes' values (float64, one per probe) from a (rows, cols) field, or a padded working field.

        ``lookup(rows, cols)``, if given, reads the padded working field's cells at (rows + 1, cols + 1)
        instead (an operator split across MPI ranks, whose rank 0 holds only its strip)."""
        off = 1 if padded else 0
        if not self.names:
            return np.zeros(0)
        vals = lookup(self.rows, self.cols) if lookup is not None else field[self.rows + off, self.cols + off]
        return np.where(self.weights > 0.0, vals * self.weights, 0.0).sum(axis=1)

    def as_dict(self, field: np.ndarray, padded: bool = False) -> dict[str, float]:
        return {name: float(v) for name, v in zip(self.names, self.values(field, padded))}


class ProbeLog:
    """Probe values after every chunk of a run: (sweep, seconds, values...) rows."""

    def __init__(self, case):
        self.probes = ProbeSet(case)
        self.sweep: list[int] = []
        self.seconds: list[float] = []
        self.rows: list[np.ndarray] = []

    def record(self, sweep: int, seconds: float, u: np.ndarray, lookup=None) -> None:
        """Record the values of the padded working field ``u`` after ``sweep`` sweeps (``lookup``: see
        :meth:`ProbeSet.values`)."""
        self.sweep.append(int(sweep))
        self.seconds.append(float(seconds))
        self.rows.append(self.probes.values(u, padded=True, lookup=lookup))

    def latest(self) -> dict[str, float]:
        """The last recorded values by name (empty before the first chunk)."""
        if not self.rows:
            return {}
        return {name: float(v) for name, v in zip(self.probes.names, self.rows[-1])}

    def to_csv_text(self) -> str:
        lines = [",".join(["sweep", "seconds"] + self.probes.names)]
        for s, t, vals in zip(self.sweep, self.seconds, self.rows):
            lines.append(",".join([str(s), f"{t:.6f}"] + [repr(float(v)) if math.isfinite(v) else "nan" for v in vals]))
        return "\n".join(lines) + "\n"

    def to_csv(self, path):
        from relaxtui.output.atomic import write_text

        return write_text(path, self.to_csv_text(), "probes")
