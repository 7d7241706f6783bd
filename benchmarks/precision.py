"""Sweep rate of single-precision storage (a float32 field) against double, uniform 4096² (issue 14).

    python benchmarks/precision.py [--quick] [--json]

The rows of :func:`scale.precision_rows` (also part of ``benchmarks/scale.py``); run alone by
``python benchmarks/run.py --only precision``. Under ``flock`` of the machine's heavy lock on a
shared machine; the rows say the thread count, the load is printed beside them.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import scale  # noqa: E402


def run(quick: bool = False) -> list[dict]:
    rows = scale.precision_rows(1024 if quick else 4096)
    rows.append(scale.row("machine load at the end", round(os.getloadavg()[0], 1), "load average",
                          f"{os.cpu_count()} cores shared with other users"))
    return rows


def main(argv=None) -> int:
    return scale.main(argv, run, __doc__)


if __name__ == "__main__":
    raise SystemExit(main())
