"""The per-sweep history of a run (the report's history columns and the CSV export)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np


class History:
    """Per-sweep records of a run: numpy arrays of equal length (views)."""

    COLUMNS = ("sweep", "seconds", "residual", "estimated_error")

    def __init__(self):
        self._data = np.empty((5, 256))
        self._n = 0

    def __len__(self) -> int:
        return self._n

    def extend(self, sweeps, seconds, residual, error, omega) -> None:
        k = len(sweeps)
        need = self._n + k
        if need > self._data.shape[1]:
            grown = np.empty((5, max(need, 2 * self._data.shape[1])))
            grown[:, : self._n] = self._data[:, : self._n]
            self._data = grown
        block = self._data[:, self._n : need]
        block[0] = sweeps
        block[1] = seconds
        block[2] = residual
        block[3] = error
        block[4] = omega
        self._n = need

    sweep = property(lambda self: self._data[0, : self._n])
    seconds = property(lambda self: self._data[1, : self._n])
    residual = property(lambda self: self._data[2, : self._n])
    estimated_error = property(lambda self: self._data[3, : self._n])
    omega = property(lambda self: self._data[4, : self._n])

    def copy(self) -> "History":
        other = History()
        other._data = self._data[:, : self._n].copy()
        other._n = self._n
        return other

    def to_csv_text(self) -> str:
        lines = [",".join(self.COLUMNS)]
        for s, t, r, e in zip(self.sweep, self.seconds, self.residual, self.estimated_error):
            lines.append(f"{int(s)},{t:.6f},{_num(r)},{_num(e)}")
        return "\n".join(lines) + "\n"

    def to_csv(self, path) -> Path:
        from relaxtui.output.atomic import write_text

        return write_text(path, self.to_csv_text(), "history")


def _num(x: float) -> str:
    return repr(float(x)) if math.isfinite(x) else ("inf" if x > 0 else "-inf" if x < 0 else "nan")
