"""Speed and memory of the relaxation kernels (issue 3), each target measured with its comparison.

Run ``python benchmarks/kernels.py`` (4096 x 4096, a few minutes) or with
``--quick`` (1024 x 1024, under a minute). :func:`run` returns the table rows
(dicts) for ``benchmarks/run.py``.

Byte model (bytes a sweep must move per cell, every array streamed counted once):
- copy kernel: read 8 + write 8 = 16 B per cell;
- Jacobi: read u 8 + write the other buffer 8 = 16 B per cell of a bulk run,
  + 1 B (class code) per cell of a mixed stretch; the class table and the
  segment list are a few kB and stay in cache;
- red-black SOR (fused): read 8 + write 8 per cell, the same model.
Write-allocate traffic (reading a line before writing it) is the same for the
copy kernel and the sweeps, so it is left out of both sides of the ratio.

Timings are the median of several calls of a few sweeps each, after a warm-up
call; every ratio compares two figures measured in the same run, one right
after the other. The machine's other users share the cores: run it more than
once and compare medians.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

MB = 1 << 20


# --- cases, built without big temporaries (the memory figures count every byte) -----------------

def uniform_codes(n: int) -> tuple[np.ndarray, tuple]:
    """n x n unknowns in a one-cell frame: hot top row, cold elsewhere (the model problem)."""
    from relaxtui.case.model import Region

    codes = np.zeros((n + 2, n + 2), dtype=np.uint8)
    codes[0, :] = 1
    codes[-1, :] = 2
    codes[:, 0] = 2
    codes[:, -1] = 2
    regions = (Region("plate", "#ffffff", "interior", conductivity=1.0), Region("hot", "#ff0000", "fixed", value=1.0),
               Region("cold", "#0000ff", "fixed", value=0.0))
    return codes, regions


def two_material_codes(n: int) -> tuple[np.ndarray, tuple]:
    """The uniform case with a disc insert (k = 10, a source) of radius n/4 and a convection edge on the right."""
    from relaxtui.case.model import Region

    codes, regions = uniform_codes(n)
    codes[1:-1, -1] = 4
    centre, radius = (n + 2) / 2, n / 4
    cols = np.arange(n + 2)
    for i in range(1, n + 1):
        inside = (cols - centre) ** 2 + (i - centre) ** 2 < radius**2
        codes[i, inside] = 3
    regions = regions + (Region("insert", "#00ff00", "interior", conductivity=10.0, source=0.5),
                         Region("air", "#00ffff", "convection", coefficient=5.0, ambient=0.2))
    return codes, regions


def make_case(kind: str, n: int):
    from relaxtui.case.model import Case

    codes, regions = uniform_codes(n) if kind == "uniform" else two_material_codes(n)
    return Case(path=None, mask_path=Path(f"{kind}-{n}.png"), regions=regions, codes=codes)


# --- timing -------------------------------------------------------------------------------

def median_time(fn, calls: int) -> float:
    fn()  # warm-up (and compilation on a cold cache)
    times = []
    for _ in range(calls):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return float(np.median(times))


def numpy_jacobi(u, new, mask, omega):
    """Masked Jacobi the way a user writes it with numpy slicing (uniform 5-point weights)."""
    c = u[1:-1, 1:-1]
    s = 0.25 * (u[:-2, 1:-1] + u[2:, 1:-1] + u[1:-1, :-2] + u[1:-1, 2:])
    r = np.where(mask, s - c, 0.0)
    new[1:-1, 1:-1] = c + omega * r
    return np.abs(r).max()


def row(name, value, unit, detail="", target="", ok=None):
    return {"name": name, "value": value, "unit": unit, "detail": detail, "target": target, "ok": ok}


def speed_rows(n: int, calls: int, sweeps: int) -> list[dict]:
    import numba
    from relaxtui.kernels import sweeps as k

    from relaxtui.solver.assembled import Operator

    threads = numba.get_num_threads()
    rows = []
    op = Operator(make_case("uniform", n))
    u = op.new_field()
    upd, res = np.zeros(sweeps), np.zeros(sweeps)
    cells = op.cells_streamed
    mixed = int(sum(e - s for s, e, c in zip(op.seg_start, op.seg_end, op.seg_class) if c < 0))
    model_bytes = 16 * cells + mixed

    def rate(method, omega, operator=op, field=u):
        return cells * sweeps / median_time(lambda: operator.sweep(field, method, omega, sweeps, upd, res), calls) / 1e6

    # 1. Jacobi against the copy kernel, same run, all threads
    a = np.zeros_like(u)
    b = np.zeros_like(u)
    t_copy = median_time(lambda: k.copy_kernel(a, b, threads), calls * sweeps)
    copy_gbs = 16 * a.size / t_copy / 1e9
    del a, b
    jac = rate("jacobi", 1.0)
    jac_gbs = jac * 1e6 * model_bytes / cells / 1e9
    rows.append(row(f"copy kernel, {threads} threads", round(copy_gbs, 1), "GB/s", "16 B/cell"))
    rows.append(row(f"Jacobi, uniform {n}², {threads} threads", round(jac), "Mcell/s",
                    f"{jac_gbs:.1f} GB/s at {model_bytes / cells:.2f} B/cell = {jac_gbs / copy_gbs:.0%} of copy",
                    ">= 75 % of copy", jac_gbs / copy_gbs >= 0.75))
    # 2. red-black SOR against Jacobi, same run
    jac2 = rate("jacobi", 1.0)
    rb = rate("red-black-sor", 1.9)
    rows.append(row(f"red-black SOR (fused), uniform {n}², {threads} threads", round(rb), "Mcell/s",
                    f"{rb / jac2:.0%} of Jacobi ({jac2:.0f} Mcell/s in this pair)", ">= 75 % of Jacobi", rb / jac2 >= 0.75))
    # 3. against numpy
    mask = op.view(op.cls) != 0
    new = u.copy()
    t_np = median_time(lambda: numpy_jacobi(u, new, mask, 1.0), max(3, calls // 2))
    np_rate = cells / t_np / 1e6
    jac3 = rate("jacobi", 1.0)
    rows.append(row("numpy masked Jacobi (slicing, np.where)", round(np_rate), "Mcell/s",
                    f"the Jacobi kernel is {jac3 / np_rate:.1f}x faster ({jac3:.0f} Mcell/s in this pair)", ">= 3x", jac3 / np_rate >= 3))
    del mask, new
    # 4. one thread: lexicographic SOR against red-black SOR
    numba.set_num_threads(1)
    try:
        rb1 = rate("red-black-sor", 1.9)
        lex1 = rate("sor", 1.9)
        jac1 = rate("jacobi", 1.0)
    finally:
        numba.set_num_threads(threads)
    rows.append(row(f"red-black SOR, uniform {n}², 1 thread", round(rb1), "Mcell/s", f"Jacobi on 1 thread: {jac1:.0f}"))
    rows.append(row(f"lexicographic SOR, uniform {n}², 1 thread", round(lex1), "Mcell/s",
                    f"red-black is {rb1 / lex1:.2f}x faster", "within 1.5x of red-black", rb1 / lex1 <= 1.5))
    op.release()
    del u, op
    # 5. two materials, all threads
    op = Operator(make_case("two-material", n))
    u = op.new_field()
    cells = op.cells_streamed
    jt = rate("jacobi", 1.0, op, u)
    rbt = rate("red-black-sor", 1.9, op, u)
    rows.append(row(f"Jacobi / red-black SOR, two materials {n}², {threads} threads", f"{jt:.0f} / {rbt:.0f}", "Mcell/s",
                    f"{op.classes} classes, {len(op.seg_start)} segments"))
    return rows


def assembly_rows(n: int) -> list[dict]:
    from relaxtui.solver.assembled import Operator

    Operator(make_case("uniform", 8))  # kernels loaded
    rows = []
    for kind in ("uniform", "two-material"):
        case = make_case(kind, n)
        t = min(_timed(lambda: Operator(case)) for _ in range(3))
        rows.append(row(f"assembly, {kind} {n}²", round(t, 3), "s", "Operator(case), kernels loaded", "well under 1 s", t < 0.5))
    return rows


def _timed(fn) -> float:
    t = time.perf_counter()
    fn()
    return time.perf_counter() - t


MEMORY_SCRIPT = r"""
import json, sys
import numpy as np
import importlib.util
spec = importlib.util.spec_from_file_location("bench_kernels", sys.argv[1])
bench = importlib.util.module_from_spec(spec)
spec.loader.exec_module(bench)
from relaxtui.solver.assembled import Operator

def status(key):
    for line in open("/proc/self/status"):
        if line.startswith(key):
            return int(line.split()[1]) * 1024

kind, n, method = sys.argv[2], int(sys.argv[3]), sys.argv[4]
small = Operator(bench.make_case(kind, 8))  # load the kernels first: part of the fixed allowance
u = small.new_field()
small.sweep(u, method, 1.0, 1, np.zeros(1), np.zeros(1))
small.flows(u)
small.finish(u)
del small, u
base = status("VmRSS:")
case = bench.make_case(kind, n)
op = Operator(case)
u = op.new_field()
op.sweep(u, method, 1.0 if method != "sor" else 1.5, 3, np.zeros(3), np.zeros(3))
op.residual(u)
op.flows(u)
field = op.finish(u)
print(json.dumps({"peak": status("VmHWM:"), "base": base, "cells": n * n, "memory_bytes": op.memory_bytes(method)}))
"""


def memory_rows(n: int) -> list[dict]:
    rows = []
    for kind, method, per_cell in (("uniform", "red-black-sor", 32), ("uniform", "jacobi", 32),
                                   ("two-material", "red-black-sor", 48), ("two-material", "jacobi", 48)):
        proc = subprocess.run([sys.executable, "-c", MEMORY_SCRIPT, str(Path(__file__).resolve()), kind, str(n), method],
                              capture_output=True, text=True, timeout=600)
        if proc.returncode != 0:
            raise RuntimeError(proc.stderr)
        m = json.loads(proc.stdout)
        budget = per_cell * m["cells"] + 200 * MB
        rows.append(row(f"peak memory, {kind} {n}², {method}", round(m["peak"] / MB), "MB",
                        f"{(m['peak'] - m['base']) / m['cells']:.1f} B/cell over the {m['base'] / MB:.0f} MB before the case "
                        f"(picture codes included); memory_bytes() says {m['memory_bytes'] / m['cells']:.1f}",
                        f"<= {per_cell} B/cell + 200 MB", m["peak"] <= budget))
    return rows


LOAD_SCRIPT = r"""
import json, sys, time
if sys.argv[3] == "without-scipy":
    # a user install has no scipy (a test/bench extra); numba then skips its BLAS probe, which imports scipy.linalg
    class _NoScipy:
        def find_spec(self, name, path=None, target=None):
            if name == "scipy" or name.startswith("scipy."):
                raise ImportError("scipy hidden for this measurement")
            return None
    sys.meta_path.insert(0, _NoScipy())
t0 = time.perf_counter()
import numpy as np
import importlib.util
spec = importlib.util.spec_from_file_location("bench_kernels", sys.argv[1])
bench = importlib.util.module_from_spec(spec)
spec.loader.exec_module(bench)
import numba
t1 = time.perf_counter()
from relaxtui.solver.assembled import Operator
case = bench.make_case("uniform", 64)
t2 = time.perf_counter()
op = Operator(case)
u = op.new_field()
op.sweep(u, sys.argv[2], 1.5 if sys.argv[2] != "jacobi" else 1.0, 2, np.zeros(2), np.zeros(2))
op.residual(u)
op.flows(u)
op.finish(u)
t3 = time.perf_counter()
print(json.dumps({"imports": t1 - t0, "kernels": t3 - t2, "scipy": "scipy" in sys.modules}))
"""


def load_rows() -> list[dict]:
    """Seconds from the first kernel call of a small solve to its end, on a warm cache.

    The first call of any cached numba function also pays numba's own start
    (typing registries, LLVM), included here. Measured as installed for users
    (no scipy) and in the development environment (scipy present: numba's
    BLAS probe then imports scipy.linalg).
    """
    rows = []
    for method in ("red-black-sor", "jacobi", "sor"):
        for env in ("without-scipy", "with-scipy"):
            results = []
            for _ in range(4):  # the first run also fills the cache if it was cold
                proc = subprocess.run([sys.executable, "-c", LOAD_SCRIPT, str(Path(__file__).resolve()), method, env],
                                      capture_output=True, text=True, timeout=600)
                if proc.returncode != 0:
                    raise RuntimeError(proc.stderr)
                results.append(json.loads(proc.stdout))
            warm = float(np.median([r["kernels"] for r in results[1:]]))
            rows.append(row(f"kernel loading, warm cache, {method} solve, {env}", round(warm, 3), "s",
                            f"numba's first-call start included; numpy+numba import {results[-1]['imports']:.2f} s apart",
                            "<= 0.4 s", warm <= 0.4))
    return rows


def run(quick: bool = False, size: int | None = None) -> list[dict]:
    """Measure everything; return the rows (name, value, unit, detail, target, ok)."""
    n = size or (1024 if quick else 4096)
    calls = 5 if quick else 7
    sweeps = 4
    before = os.getloadavg()[0]
    rows = speed_rows(n, calls, sweeps)
    rows += assembly_rows(n)
    rows += memory_rows(n)
    rows += load_rows()
    rows.append(row("load average (1 min) before / after", f"{before:.2f} / {os.getloadavg()[0]:.2f}", "",
                    "other processes share the cores; this run's own threads add up to 2"))
    return rows


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="1024 x 1024 instead of 4096 x 4096")
    p.add_argument("--size", type=int, help="grid side (overrides --quick)")
    p.add_argument("--json", action="store_true", help="print the rows as JSON")
    args = p.parse_args(argv)
    rows = run(args.quick, args.size)
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from common import print_rows

    print_rows(rows, args.json)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
