"""Sweep speed of some methods on one case, in a process of its own (thread count from NUMBA_NUM_THREADS).

    python benchmarks/sweep_child.py N KIND CELL_UPDATES METHOD [METHOD ...]

KIND is "uniform" or "two-material" (benchmarks/kernels.py's cases, N x N
unknowns). The methods are timed in a round-robin, 5 rounds after a warm-up
round, each call as many sweeps as make about CELL_UPDATES cell updates. Prints one JSON line: threads, cells, and per
method the Mcell/s samples.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

import common  # noqa: E402

OMEGA = {"jacobi": 1.0, "gauss-seidel": 1.0, "sor": 1.9, "red-black-sor": 1.9}


def main() -> int:
    import numba

    from relaxtui.solver.assembled import Operator

    n, kind, work, methods = int(sys.argv[1]), sys.argv[2], float(sys.argv[3]), sys.argv[4:]
    op = Operator(common.kernels_bench().make_case(kind, n))
    u = op.new_field()
    k = max(2, int(work // op.cells_streamed))
    upd, res = np.zeros(k), np.zeros(k)
    fns = {m: (lambda m=m: op.sweep(u, m, OMEGA[m], k, upd, res)) for m in methods}
    times = common.round_robin(fns)
    print(json.dumps({"threads": numba.get_num_threads(), "cells": op.cells_streamed, "sweeps": k,
                      "mcells": {m: [k * op.cells_streamed / t / 1e6 for t in times[m]] for m in methods}}))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
