"""Section 4, threads: Mcell/s of Jacobi and red-black SOR at 1 and 2 numba threads.

Each thread count runs in its own process (NUMBA_NUM_THREADS is read when
numba starts), on the uniform model problem (4096², ``--quick`` 1024²), the
two methods in a round-robin, 5 rounds after a warm-up. The two processes run
one after the other, so machine load can differ between them: compare the
speed-up with the noise shown by min–max.
"""

from __future__ import annotations

import os

import common

METHODS = ("jacobi", "red-black-sor")
LABEL = {"jacobi": "Jacobi", "red-black-sor": "red-black SOR (fused)"}


def run(quick: bool) -> dict:
    n = 1024 if quick else 4096
    counts = sorted({1, 2, os.cpu_count() or 1})
    results = {}
    for t in counts:
        results[t] = common.python_child("sweep_child.py", n, "uniform", 3e7 if quick else 1.5e8, *METHODS, env=common.child_env(threads=t), timeout=900)
    rows = []
    notes = []
    for m in METHODS:
        base = None
        for t in counts:
            r = results[t]
            if "error" in r:
                rows.append([LABEL[m], str(t), "—", "", r["error"]])
                continue
            st = common.stats(r["mcells"][m])
            base = st["median"] if t == 1 else base
            speedup = f"{st['median'] / base:.2f}x" if base else ""
            rows.append([LABEL[m], f"{t} (numba reports {r['threads']})", common.fmt_stats(st), speedup, f"{r['sweeps']} sweeps per call"])
    notes.append(f"Uniform model problem {n}² ({results[counts[0]].get('cells', 0):,} cells streamed); a sweep on a grid this size "
                 "streams from memory, so even on an idle machine the speed-up is bounded by the bandwidth two cores can draw.")
    notes.append("When other processes use about a core during this section (see the line below), the 2-thread run has no "
                 "second core of its own and its speed-up says nothing about the kernels.")
    return {"title": f"4. Threads ({n}², uniform)",
            "tables": [{"columns": ["method", "threads", "Mcell/s median (min–max)", "speed-up vs 1 thread", "notes"], "rows": rows}],
            "notes": notes, "targets": [], "data": {str(k): v for k, v in results.items()}}
