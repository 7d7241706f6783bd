"""Section 3, scaling: red-black SOR's sweeps/s and time to tolerance as N doubles.

The model problem (tolerance 1e-5) at N = 511, 1023, 2047, 4095 (``--quick``:
127, 255, 511). Sweeps/s: fixed chunks of sweeps through the operator (no
stopping rule), timed in a round-robin over the sizes (5 rounds after a
warm-up). Time to tolerance: relaxtui.solver.driver.solve with auto omega in a child
process per size (assembly, omega estimate and sweeps included), the same
measurement as section 2, whose figures are reused when it ran in this
invocation. The exponent is the least-squares slope of log(seconds) against
log(cells); the textbook expectation for SOR at the optimal omega is 1.5
(sweeps grow like N, cost per sweep like N²: Young 1971, common practice).
"""

from __future__ import annotations

import json
import shutil
import sys
from pathlib import Path

import common
import numpy as np
import tolerance


def sizes(quick: bool) -> list[int]:
    return [127, 255, 511] if quick else [511, 1023, 2047, 4095]


def _sweep_rates(ns: list[int]) -> dict:
    from relaxtui.solver.assembled import Operator

    ops = {}
    fns = {}
    for n in ns:
        op = Operator(common.model_case(n))
        u = op.new_field()
        # about 0.1 s of work per call at 1 Gcell/s, at least 2 sweeps
        k = max(2, int(1e8 // op.cells_streamed))
        upd, res = np.zeros(k), np.zeros(k)
        ops[n] = (op, u, k)
        fns[n] = (lambda op=op, u=u, k=k, upd=upd, res=res: op.sweep(u, "red-black-sor", 1.9, k, upd, res))
    times = common.round_robin(fns)
    return {n: {"sweeps_per_s": common.stats([ops[n][2] / t for t in times[n]]),
                "mcells": common.stats([ops[n][2] * ops[n][0].cells_streamed / t / 1e6 for t in times[n]]),
                "cells": ops[n][0].cells_streamed} for n in ns}


def _previous(previous: Path | None) -> dict:
    out = {}
    if previous is None:
        return out
    path = Path(previous) / "tolerance.json"
    if not path.exists():
        return out
    for r in json.loads(path.read_text()).get("data", []):
        if r.get("solver") == "relaxtui-rbsor" and r.get("problem", "").startswith("model N=") and r.get("times"):
            out[int(r["problem"].split("=")[1])] = r
    return out


def _solve(n: int, quick: bool, work: Path) -> dict:
    import system

    s = tolerance.settings(quick)
    sol = work / f"solution-{n}.npy"
    spec = {"solver": "relaxtui-rbsor", "problem": {"kind": "model", "n": n}, "tolerance": tolerance.MODEL_TOL,
            "out": str(sol), "budget": s["budget"], "cap": s["cap_relax"], "repeats": common.REPEATS}
    path = work / f"spec-{n}.json"
    path.write_text(json.dumps(spec))
    r = common.python_child("solver_child.py", path, env=common.child_env(), timeout=4 * s["cap_relax"] + 600)
    if "error" not in r and sol.exists():
        field = np.load(sol)
        r["max_error"] = float(np.max(np.abs(field[1:-1, 1:-1] - system.model_exact(n))))
        del field
        sol.unlink()
    return r


def run(quick: bool, previous: Path | None = None) -> dict:
    ns = sizes(quick)
    print("   sweeps/s ...", file=sys.stderr, flush=True)
    rates = _sweep_rates(ns)
    prev = _previous(previous)
    work = common.temp_dir("scaling")
    solves = {}
    try:
        for n in ns:
            if n in prev:
                solves[n] = dict(prev[n], reused=True)
            else:
                print(f"   time to tolerance N={n} ...", file=sys.stderr, flush=True)
                solves[n] = _solve(n, quick, work)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    rows = []
    xs, ts, sw = [], [], []
    for n in ns:
        r = solves[n]
        cells = rates[n]["cells"]
        if "error" in r or not r.get("times"):
            rows.append([str(n), f"{cells:,}", common.fmt_stats(rates[n]["sweeps_per_s"]), common.fmt_stats(rates[n]["mcells"]),
                         "—", "", "", r.get("error", "no result")])
            continue
        st = common.stats(r["times"])
        info = r["info"]
        xs.append(cells)
        ts.append(st["median"])
        sw.append(info["iterations"])
        rows.append([str(n), f"{cells:,}", common.fmt_stats(rates[n]["sweeps_per_s"]), common.fmt_stats(rates[n]["mcells"]),
                     common.fmt_stats(st), str(info["iterations"]), f"{r.get('max_error', float('nan')):.2e}",
                     f"{info['status']}; set-up {info['prepare_seconds']:.2f} s; " + ("from section 2" if r.get("reused") else "measured here")])
    notes = []
    targets = []
    if len(xs) >= 2:
        lx = np.log(np.array(xs, dtype=float))
        slope_t = float(np.polyfit(lx, np.log(ts), 1)[0])
        slope_s = float(np.polyfit(lx, np.log(np.array(sw, dtype=float)), 1)[0])
        rate_x = np.log([rates[n]["cells"] for n in ns])
        slope_r = float(np.polyfit(rate_x, np.log([rates[n]["sweeps_per_s"]["median"] for n in ns]), 1)[0])
        notes.append(f"Fitted exponents against cells: time to tolerance ~ cells^{slope_t:.2f}, sweeps to tolerance ~ cells^{slope_s:.2f} "
                     f"(~ N^{2 * slope_s:.2f}), sweeps/s ~ cells^{slope_r:.2f}. Expected for SOR at optimal ω: 1.5, 0.5, -1.")
        targets.append({"target": "time to tolerance vs cells (fitted exponent; 1.5 expected for SOR)", "measured": f"{slope_t:.2f}", "ok": None})
    notes.append("Sweeps/s: red-black SOR chunks through relaxtui.solver.assembled.Operator.sweep, round-robin over the sizes, 5 rounds after a warm-up. "
                 "Small grids sit in cache, so their Mcell/s is higher than the streaming rate of the large ones.")
    if any(solves[n].get("times") and len(solves[n]["times"]) < common.REPEATS for n in ns):
        notes.append("Where n < 5 the solve was long and only as many repeats as fit the time budget were made (section 2's rule).")
    return {
        "title": f"3. Scaling of red-black SOR (model problem, tolerance {tolerance.MODEL_TOL:g})",
        "tables": [{"columns": ["N", "cells", "sweeps/s median (min–max)", "Mcell/s", "time to tolerance s", "sweeps", "max error", "notes"],
                    "rows": rows}],
        "notes": notes,
        "targets": targets,
        "data": {"rates": {str(k): v for k, v in rates.items()}, "solves": {str(k): {kk: vv for kk, vv in v.items() if kk != "infos"} for k, v in solves.items()}},
    }
