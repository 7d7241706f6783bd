"""Class path against per-cell path (case format v1.1): sweep rates of the same problem.

The model problem (n x n unknowns in a one-cell fixed frame) is assembled three ways:

* ``v1``: the v1 class-coded operator (one byte of class code per cell, bulk runs with
  broadcast weights);
* ``class-v11``: the same case with ``conductivity = [1.0, 1.0]`` (orthotropic, equal): the v1.1
  class path (same classes, table recomputed), which must sweep as fast as v1;
* ``per-cell``: the same case with a constant conductivity map: every unknown its own class
  (uint32 code, one table row of 40 B and a diagonal of 8 B per cell), mixed segments only;
* ``part-map``: the model problem with a square insert (a sixteenth of the area) whose
  conductivity is a map: only the insert's cells and their neighbours get classes of their own;
* ``axisym``: the same case as axisymmetric (no map): one class per (v1 class, column), a
  table of about one row per column read from cache, mixed segments with 2-byte codes.

For each it times ``sweeps`` sweeps of jacobi, red-black-sor and sor (median of ``repeats``
calls after a warm-up call, round robin so the machine's load hits all alike) and one multigrid
iteration (set-up timed apart), and prints Mcell/s. Usage::

    python benchmarks/paths.py [--n 1024] [--sweeps 20] [--repeats 5] [--json out.json]

The machine is shared (2 cores, several users): compare figures from one run only.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))


def cases(n: int):
    from common import model_case  # noqa: E402 - benchmarks/common.py

    from relaxtui.case.loader import build_case
    from relaxtui.case.physics import CoefficientMap

    base = model_case(n)
    regions = list(base.regions)
    ortho = [replace(r, conductivity_y=1.0) if r.kind == "interior" else r for r in regions]
    plate = next(r.name for r in regions if r.kind == "interior")
    kmap = CoefficientMap(plate, "conductivity", "<array>", np.ones(base.shape))
    return {
        "v1": base,
        "class-v11": build_case(base.codes, ortho, cell_size=base.cell_size),
        "per-cell": build_case(base.codes, regions, cell_size=base.cell_size, maps=[kmap]),
        "part-map": part_map(base, regions),
        "axisym": build_case(base.codes, regions, cell_size=base.cell_size, geometry="axisymmetric"),
    }


def part_map(base, regions):
    """The model problem with a square insert of a sixteenth of the area whose k is a map."""
    from relaxtui.case.loader import build_case
    from relaxtui.case.model import Region
    from relaxtui.case.physics import CoefficientMap

    codes = base.codes.copy()
    n = codes.shape[0]
    a, b = 3 * n // 8, 5 * n // 8
    insert = len(regions)
    codes[a:b, a:b] = insert
    regions = list(regions) + [Region("insert", "#123456", "interior", conductivity=1.0)]
    y, x = np.mgrid[0:n, 0:n] / n
    k = 1.0 + 0.5 * np.sin(6.0 * x) * np.cos(5.0 * y)
    return build_case(codes, regions, cell_size=base.cell_size, maps=[CoefficientMap("insert", "conductivity", "<array>", k)])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1024)
    ap.add_argument("--sweeps", type=int, default=20)
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--json", metavar="FILE")
    args = ap.parse_args(argv)

    import numba

    from relaxtui.solver.methods import get_method
    from relaxtui.solver.assembled import Operator

    ops, setup = {}, {}
    for name, case in cases(args.n).items():
        t0 = time.perf_counter()
        ops[name] = Operator(case)
        setup[name] = time.perf_counter() - t0
    methods = (("jacobi", 1.0), ("red-black-sor", 1.9), ("sor", 1.9))
    fields = {name: op.new_field() for name, op in ops.items()}
    upd = np.zeros(args.sweeps)
    res = np.zeros(args.sweeps)
    for name, op in ops.items():  # warm-up: compile and touch every array
        for m, w in methods:
            op.sweep(fields[name], m, w, 1, upd, res)
    samples = {(name, m): [] for name in ops for m, _ in methods}
    for _ in range(args.repeats):
        for m, w in methods:
            for name, op in ops.items():
                t0 = time.perf_counter()
                op.sweep(fields[name], m, w, args.sweeps, upd, res)
                samples[(name, m)].append(time.perf_counter() - t0)
    rows = []
    for (name, m), ts in samples.items():
        t = float(np.median(ts))
        rows.append({"operator": name, "method": m, "mcells_per_s": ops[name].unknowns * args.sweeps / t / 1e6,
                     "seconds_per_sweep": t / args.sweeps})
    for name, op in ops.items():
        t0 = time.perf_counter()
        stepper = get_method("multigrid").make_stepper(op)
        t_setup = time.perf_counter() - t0
        u = op.new_field()
        stepper.sweep(u, 1.2, 1, upd, res)  # warm-up
        ts = []
        for _ in range(args.repeats):
            t0 = time.perf_counter()
            stepper.sweep(u, 1.2, 1, upd, res)
            ts.append(time.perf_counter() - t0)
        t = float(np.median(ts))
        rows.append({"operator": name, "method": "multigrid", "mcells_per_s": op.unknowns / t / 1e6,
                     "seconds_per_sweep": t, "setup_seconds": t_setup})
    info = {"n": args.n, "sweeps": args.sweeps, "repeats": args.repeats, "threads": numba.get_num_threads(),
            "cpus": os.cpu_count(), "load_average": os.getloadavg(),
            "assembly_seconds": setup, "operator_bytes": {k: int(op.memory_bytes("red-black-sor")) for k, op in ops.items()}}
    print(f"{args.n} x {args.n} unknowns, {args.sweeps} sweeps per call, median of {args.repeats}; "
          f"{info['threads']} threads, load average {info['load_average'][0]:.1f} (shared machine)")
    print(f"{'operator':<10} {'method':<14} {'Mcell/s':>9} {'s/sweep':>10}")
    for r in rows:
        print(f"{r['operator']:<10} {r['method']:<14} {r['mcells_per_s']:9.1f} {r['seconds_per_sweep']:10.4f}")
    for k in ops:
        print(f"assembly {k}: {setup[k]:.3f} s, operator + field + export {info['operator_bytes'][k] / 2**20:.0f} MiB")
    if args.json:
        Path(args.json).write_text(json.dumps({"info": info, "rows": rows}, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
