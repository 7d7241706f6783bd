"""Section 1, roofline: sweep speed of every method against a copy kernel over the same arrays.

Cases: benchmarks/kernels.py's model problem (uniform conductivity) and its
two-material case (a k = 10 disc with a source, a convection edge), n x n
unknowns in a one-cell frame. Every figure of one case is timed in the same
round-robin (one call of each per round, a warm-up round first), so that load
from other users falls on all of them alike.

Byte model (bytes a sweep must move per cell, each array streamed once):
- copy kernel: read 8 + write 8 = 16 B per cell;
- Jacobi: read u 8 + write the other buffer 8 = 16 B per streamed cell, plus
  the class code (1 B) of each cell in a mixed stretch (the class table and the
  row segments are a few kB and stay in cache);
- red-black SOR (fused: red row i + 1, then black row i, one pass over the
  grid): read 8 + write 8 per cell, the same model as Jacobi;
- Gauss-Seidel and lexicographic SOR: read 8 + write 8 per unknown, plus the
  class code of every cell of the grid (the kernel reads cls everywhere).
Write-allocate traffic is the same for the copy kernel and the two-buffer
Jacobi, so it is left out of both sides of the ratio; the in-place sweeps
(red-black, lexicographic) have none, so their real traffic is if anything
below the model's.
"""

from __future__ import annotations

import numpy as np
from common import fmt_stats, kernels_bench, round_robin, stats


def _measure_case(kind: str, n: int, repeats: int, quick: bool) -> dict:
    import numba
    from relaxtui.kernels import sweeps as k

    from relaxtui.solver.assembled import Operator

    kb = kernels_bench()
    threads = numba.get_num_threads()
    case = kb.make_case(kind, n)
    op = Operator(case)
    u = op.new_field()
    cells = op.cells_streamed
    unknowns = op.unknowns
    grid_cells = op.shape[0] * op.shape[1]
    code_bytes = op.cls.itemsize
    mixed = int(sum(int(e) - int(s) for s, e, c in zip(op.seg_start, op.seg_end, op.seg_class) if c < 0))
    par_sweeps = 8
    lex_sweeps = 2
    upd = np.zeros(par_sweeps)
    res = np.zeros(par_sweeps)
    a = np.zeros(op.padded_shape)
    b = np.ones(op.padded_shape)

    def with_threads(t, fn):
        def call():
            numba.set_num_threads(t)
            try:
                fn()
            finally:
                numba.set_num_threads(threads)
        return call

    def copies(nblk):
        def call():
            for _ in range(par_sweeps):
                k.copy_kernel(b, a, nblk)
        return call

    fns = {
        "copy_all": copies(threads),
        "copy_1": with_threads(1, copies(1)),
        "jacobi": lambda: op.sweep(u, "jacobi", 1.0, par_sweeps, upd, res),
        "red-black-sor": lambda: op.sweep(u, "red-black-sor", 1.9, par_sweeps, upd, res),
        "gauss-seidel": lambda: op.sweep(u, "gauss-seidel", 1.0, lex_sweeps, upd, res),
        "sor": lambda: op.sweep(u, "sor", 1.9, lex_sweeps, upd, res),
    }
    numpy_cells = 0
    if kind == "uniform":
        mask = op.view(op.cls) != 0
        new = u.copy()
        numpy_cells = int(mask.sum())
        fns["numpy-jacobi"] = lambda: kb.numpy_jacobi(u, new, mask, 1.0)
    times = round_robin(fns, repeats)
    copy_bytes = 16 * a.size
    out = {"kind": kind, "n": n, "threads": threads, "cells": cells, "unknowns": unknowns, "classes": op.classes,
           "segments": int(len(op.seg_start)), "mixed": mixed, "rates": {}, "bytes": {}, "samples": times}
    for name in ("copy_all", "copy_1"):
        out["rates"][name] = stats([par_sweeps * a.size / t / 1e6 for t in times[name]])
        out["bytes"][name] = 16.0
    model_par = (16.0 * cells + code_bytes * mixed) / cells
    model_lex = (16.0 * unknowns + code_bytes * grid_cells) / unknowns
    for name, per, count, model in (("jacobi", par_sweeps, cells, model_par), ("red-black-sor", par_sweeps, cells, model_par),
                                    ("gauss-seidel", lex_sweeps, unknowns, model_lex), ("sor", lex_sweeps, unknowns, model_lex)):
        out["rates"][name] = stats([per * count / t / 1e6 for t in times[name]])
        out["bytes"][name] = model
    if "numpy-jacobi" in times:
        out["rates"]["numpy-jacobi"] = stats([numpy_cells / t / 1e6 for t in times["numpy-jacobi"]])
        out["bytes"]["numpy-jacobi"] = None
    out["per_round"] = {}
    for name in times:
        count = {"copy_all": par_sweeps * a.size, "copy_1": par_sweeps * a.size, "jacobi": par_sweeps * cells,
                 "red-black-sor": par_sweeps * cells, "gauss-seidel": lex_sweeps * unknowns, "sor": lex_sweeps * unknowns,
                 "numpy-jacobi": numpy_cells}[name]
        out["per_round"][name] = [count / t / 1e6 for t in times[name]]
    out["copy_gbs"] = {name: stats([copy_bytes * par_sweeps / t / 1e9 for t in times[name]]) for name in ("copy_all", "copy_1")}
    op.release()
    return out


def _median_ratio(a, b) -> float:
    return float(np.median(np.array(a) / np.array(b)))


LABEL = {"copy_all": "copy kernel", "copy_1": "copy kernel", "jacobi": "Jacobi", "red-black-sor": "red-black SOR (fused)",
         "gauss-seidel": "Gauss-Seidel (lexicographic)", "sor": "SOR (lexicographic)", "numpy-jacobi": "numpy Jacobi (slicing, np.where)"}


def run(quick: bool) -> dict:
    n = 1024 if quick else 4096
    results = [_measure_case(kind, n, 5, quick) for kind in ("uniform", "two-material")]
    rows = []
    targets = []
    notes = []
    for r in results:
        threads = r["threads"]
        for name in ("copy_all", "copy_1", "jacobi", "red-black-sor", "gauss-seidel", "sor", "numpy-jacobi"):
            if name not in r["rates"]:
                continue
            rate = r["rates"][name]
            t = 1 if name in ("copy_1", "gauss-seidel", "sor", "numpy-jacobi") else threads
            model = r["bytes"][name]
            copy = r["rates"]["copy_all" if t == threads else "copy_1"]["median"] * 16.0  # MB/s of the copy at t threads
            if model is None:
                gbs, frac = "", ""
            else:
                gbs = fmt_stats(rate, 3, model / 1e3)
                frac = f"{rate['median'] * model / copy:.0%}"
            rows.append([LABEL[name], r["kind"], str(t), fmt_stats(rate, 3), "" if model is None else f"{model:.2f}", gbs, frac])
        # ratios per round (the figures of one round were measured seconds apart), then their median:
        # more robust against bursts of load from other users than a ratio of medians
        pr = r["per_round"]
        jac_copy = _median_ratio([j * r["bytes"]["jacobi"] for j in pr["jacobi"]], [c * 16.0 for c in pr["copy_all"]])
        rb_jac = _median_ratio(pr["red-black-sor"], pr["jacobi"])
        targets.append({"target": f"Jacobi >= 75 % of copy bandwidth ({r['kind']}, {n}², {threads} threads)",
                        "measured": f"{jac_copy:.0%} (median of per-round ratios)", "ok": jac_copy >= 0.75})
        targets.append({"target": f"red-black SOR >= 75 % of Jacobi ({r['kind']}, {n}²)", "measured": f"{rb_jac:.0%} (median of per-round ratios)",
                        "ok": rb_jac >= 0.75})
        if "numpy-jacobi" in pr:
            jn = _median_ratio(pr["jacobi"], pr["numpy-jacobi"])
            rn = _median_ratio(pr["red-black-sor"], pr["numpy-jacobi"])
            targets.append({"target": f"Jacobi kernel >= 3x numpy Jacobi ({r['kind']}, {n}²)", "measured": f"{jn:.1f}x", "ok": jn >= 3})
            targets.append({"target": f"red-black SOR >= 3x numpy Jacobi ({r['kind']}, {n}²)", "measured": f"{rn:.1f}x", "ok": rn >= 3})
        notes.append(f"{r['kind']} {n}²: {r['unknowns']:,} unknowns, {r['cells']:,} cells streamed by Jacobi/red-black, "
                     f"{r['classes']} classes, {r['segments']:,} row segments, {r['mixed']:,} cells in mixed stretches.")
    notes.append("Mcell/s counts the cells a sweep streams (Jacobi, red-black) or the unknowns it updates (lexicographic); "
                 "the copy kernel's Mcell/s is float64 elements copied. Copy figures per case were measured in that case's round-robin.")
    notes.append("The % of copy compares the modelled GB/s with the copy kernel at the same thread count "
                 "(Gauss-Seidel and SOR are serial: 1 thread); the table shows the ratio of medians, the targets the "
                 "median of the per-round ratios (figures of one round are measured seconds apart, so a burst of "
                 "load from other users cancels better).")
    notes.append("The virtual machine reports a 480 MiB L3 cache (lscpu); the two 134 MB arrays of a 4096² copy may partly "
                 "stay in it, so 'copy bandwidth' is the streaming rate this working set gets, from whichever level serves it.")
    return {
        "title": f"1. Roofline ({n}², every method, uniform and two-material)",
        "tables": [{"columns": ["kernel", "case", "threads", "Mcell/s median (min–max)", "model B/cell", "GB/s at the model", "% of copy"],
                    "rows": rows}],
        "notes": notes,
        "targets": targets,
        "data": [{k: v for k, v in r.items() if k != "samples"} for r in results],
    }
