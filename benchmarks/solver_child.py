"""One solver on one problem, in a process of its own (so its peak resident memory is its own).

    python benchmarks/solver_child.py SPEC.json

SPEC keys: solver (relaxtui-rbsor, relaxtui-multigrid, spsolve, pyamg, cg,
reference), problem ({"kind": "model", "n": N} or {"kind": "case", "path": TOML}),
tolerance (field units), reference (path of the reference field .npy, for the
calibration of pyamg and CG), out (where to write the last solution, a
(rows, cols) float64 field, NaN outside the domain), budget (seconds for the
timed repeats), cap (seconds after which one solve is abandoned), mem_limit
(bytes of address space, spsolve only), repeats.

Order of work: a warm-up of the same solver on the 63 x 63 model problem
(imports, compiled code, caches), for relaxtui also two sweeps on the case
itself (kernels are compiled per class-code dtype, which the case decides). For pyamg and CG a calibration run at full
size follows that checks the true error against the reference after every
iteration (in chunks, no full-size temporaries) and stops at the first
iteration whose max error is <= tolerance; when that run took more than half
the budget it stands in for the timed run (its wall time minus the measured
time of the checks; its peak RSS minus the reference vector), otherwise the
timed runs stop at that same iteration. Before the timed runs the peak-RSS
mark is reset (/proc/self/clear_refs); each timed run goes from the loaded case
(assembly included) to the solution. The first timed run is discarded as a
same-size warm-up when it took less than budget / (repeats + 1); otherwise it
counts and only as many runs as fit the budget are made. Prints one JSON line.
"""

from __future__ import annotations

import gc
import json
import math
import sys
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

import common  # noqa: E402


class _Stop(Exception):
    pass


def load_problem(problem: dict):
    if problem["kind"] == "model":
        return common.model_case(int(problem["n"]))
    from relaxtui.case import load_case

    return load_case(problem["path"])


# --- solvers: each returns (field, info) ------------------------------------------------------

def solve_relaxtui(case, tol, cap, method):
    from relaxtui.solver.driver import solve

    t = time.perf_counter()
    res = solve(case, method=method, omega="auto" if method != "multigrid" else None, tolerance=tol, time_limit=cap)
    wall = time.perf_counter() - t
    r = res.report
    est = r["estimated_error"]  # None when the stopping rule had no estimate (e.g. a stalled run)
    info = {"iterations": int(r["sweeps"]), "status": r["status"], "estimated_error": math.nan if est is None else float(est),
            "prepare_seconds": float(r.get("prepare_seconds", math.nan)), "sweep_seconds": float(r["seconds"]),
            "omega": float(r["omega"]), "wall": wall, "message": r.get("message", "")}
    return res.field, info


def _assemble(case):
    import system

    t = time.perf_counter()
    A, b, index = system.assemble(case)
    return A, b, index, time.perf_counter() - t


def solve_spsolve(case, tol, cap, **_):
    import scipy.sparse.linalg as sla
    import system

    t = time.perf_counter()
    A, b, index, ta = _assemble(case)
    x = sla.spsolve(A.tocsc(), b)
    wall = time.perf_counter() - t
    field = system.scatter(x, index, case)
    return field, {"iterations": None, "status": "direct", "assembly_seconds": ta, "wall": wall,
                   "relres": float(np.linalg.norm(b - A @ x) / np.linalg.norm(b))}


def solve_pyamg(case, tol, cap, maxiter=None, rtol=1e-14, callback=None, **_):
    import pyamg
    import system

    t = time.perf_counter()
    A, b, index, ta = _assemble(case)
    t1 = time.perf_counter()
    ml = pyamg.smoothed_aggregation_solver(A, symmetry="symmetric")
    setup = time.perf_counter() - t1
    its = [0]

    def cb(xk):
        its[0] += 1
        if callback is not None:
            callback(xk, its[0])

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            x = ml.solve(b, tol=rtol, maxiter=maxiter or 500, accel="cg", callback=cb)
        except _Stop as stop:
            x = stop.args[0]
    wall = time.perf_counter() - t
    field = system.scatter(x, index, case)
    return field, {"iterations": its[0], "status": "done", "assembly_seconds": ta, "setup_seconds": setup, "wall": wall,
                   "levels": len(ml.levels), "operator_complexity": float(ml.operator_complexity()),
                   "relres": float(np.linalg.norm(b - A @ x) / np.linalg.norm(b))}


def solve_cg(case, tol, cap, maxiter=None, rtol=1e-14, callback=None, **_):
    import scipy.sparse.linalg as sla
    import system

    t = time.perf_counter()
    A, b, index, ta = _assemble(case)
    its = [0]

    def cb(xk):
        its[0] += 1
        if callback is not None:
            callback(xk, its[0])

    try:
        x, flag = sla.cg(A, b, rtol=rtol, atol=0.0, maxiter=maxiter or 10_000_000, callback=cb)
    except _Stop as stop:
        x = stop.args[0]
    wall = time.perf_counter() - t
    field = system.scatter(x, index, case)
    return field, {"iterations": its[0], "status": "done", "assembly_seconds": ta, "wall": wall,
                   "relres": float(np.linalg.norm(b - A @ x) / np.linalg.norm(b))}


SOLVERS = {
    "relaxtui-rbsor": lambda case, tol, cap, **kw: solve_relaxtui(case, tol, cap, "red-black-sor"),
    "relaxtui-multigrid": lambda case, tol, cap, **kw: solve_relaxtui(case, tol, cap, "multigrid"),
    "spsolve": solve_spsolve,
    "pyamg": solve_pyamg,
    "cg": solve_cg,
}


def _reference_vector(case, ref_path: str) -> np.ndarray:
    """The reference field's values at the unknowns, in the assembly's order (row-major over interior cells)."""
    ref = np.load(ref_path, mmap_mode="r")
    kinds = case.kind_codes()[case.codes]
    out = np.ascontiguousarray(ref[kinds == 0])
    del ref, kinds
    return out


def _max_abs_diff(a: np.ndarray, b: np.ndarray, chunk: int = 1 << 18) -> float:
    """max |a - b| in chunks (no full-size temporaries, so the peak memory is not inflated)."""
    m = 0.0
    for i in range(0, a.size, chunk):
        m = max(m, float(np.max(np.abs(a[i : i + chunk] - b[i : i + chunk]))))
    return m


def calibrate(solver: str, case, tol: float, xref: np.ndarray, cap: float) -> dict:
    """Run the solver with a true-error check after every iteration; stop at the first with max error <= tol.

    Returns the iteration found (None if the cap came first), the field and
    info of that run, and the seconds spent in the checks (so the run can
    stand in for a timed one: wall minus checks).
    """
    state = {"first": None, "errors": [], "t0": time.perf_counter(), "capped": False, "check": 0.0}

    def cb(xk, k):
        t = time.perf_counter()
        err = _max_abs_diff(xk, xref)
        state["errors"].append(err)
        state["check"] += time.perf_counter() - t
        if err <= tol:
            state["first"] = k
            raise _Stop(xk)
        if time.perf_counter() - state["t0"] > cap:
            state["capped"] = True
            raise _Stop(xk)

    field, info = SOLVERS[solver](case, tol, cap, callback=cb, maxiter=None)
    return {"first": state["first"], "iterations": info["iterations"], "capped": state["capped"],
            "last_error": state["errors"][-1] if state["errors"] else None, "seconds": time.perf_counter() - state["t0"],
            "check_seconds": state["check"], "field": field, "info": info}


def make_reference(case, out: str) -> dict:
    """pyamg (smoothed aggregation + CG) to a relative residual of 1e-12; its change from 1e-10 bounds its own error."""
    import pyamg
    import system

    t = time.perf_counter()
    A, b, index = system.assemble(case)
    ml = pyamg.smoothed_aggregation_solver(A, symmetry="symmetric")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        x1 = ml.solve(b, tol=1e-10, maxiter=500, accel="cg")
        x2 = ml.solve(b, x0=x1, tol=1e-12, maxiter=500, accel="cg")
    change = float(np.max(np.abs(x2 - x1)))
    relres = float(np.linalg.norm(b - A @ x2) / np.linalg.norm(b))
    np.save(out, system.scatter(x2, index, case))
    return {"seconds": time.perf_counter() - t, "change_from_1e-10": change, "relres": relres}


def main() -> int:
    spec = json.loads(Path(sys.argv[1]).read_text())
    solver = spec["solver"]
    case = load_problem(spec["problem"])
    tol = float(spec["tolerance"])
    cap = float(spec.get("cap", 600))
    if solver == "reference":
        print(json.dumps(make_reference(case, spec["out"])))
        return 0
    if spec.get("mem_limit"):
        import resource

        limit = int(spec["mem_limit"])
        resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
    fn = SOLVERS[solver]
    result = {"solver": solver}
    # warm-up: the same solver on the small model problem; relaxtui also on the case itself for two
    # sweeps (its compiled kernels are typed by the case's class-code dtype, which the case decides)
    small = common.model_case(63)
    fn(small, 1e-6, cap)
    del small
    if solver.startswith("relaxtui"):
        from relaxtui.solver.driver import solve

        solve(case, method="multigrid" if solver == "relaxtui-multigrid" else "red-black-sor", tolerance=tol, max_sweeps=2)
    budget = float(spec.get("budget", 60))
    repeats = int(spec.get("repeats", common.REPEATS))
    times, infos = [], []
    kw = {}
    if solver in ("pyamg", "cg"):
        xref = _reference_vector(case, spec["reference"])
        gc.collect()
        result["peak_reset"] = common.reset_peak_rss()
        cal = calibrate(solver, case, tol, xref, cap)
        cal_peak = common.peak_rss() - xref.nbytes  # the reference vector is the check's, not the solver's
        del xref
        field, info = cal.pop("field"), cal.pop("info")
        result["calibration"] = cal
        if cal["first"] is None:
            result["error"] = (f"did not reach max error {tol:g} within {cap:.0f} s "
                               f"({cal['iterations']} iterations, max error then {cal['last_error']:.3g})")
            result["peak_rss"] = cal_peak
            print(json.dumps(result))
            return 0
        if info["wall"] > budget / 2:
            # a long run: the calibration run stands in for the timed one (its error checks subtracted)
            info = dict(info, wall=info["wall"] - cal["check_seconds"])
            result.update(times=[info["wall"]], info=info, infos=[info], peak_rss=cal_peak, derived=True,
                          same_size_warmup=False, total_seconds=cal["seconds"])
            np.save(spec["out"], field)
            print(json.dumps(result))
            return 0
        del field
        kw = {"maxiter": cal["first"], "rtol": 1e-300}  # stop exactly at that iteration
    gc.collect()
    result["rss_before"] = common.current_rss()
    result["peak_reset"] = common.reset_peak_rss()
    field = None
    t_all = time.perf_counter()
    try:
        field, info = fn(case, tol, cap, **kw)
    except MemoryError:
        result["error"] = f"out of memory (address space limited to {int(spec['mem_limit']) / 1e9:.0f} GB)"
        result["peak_rss"] = common.peak_rss()
        print(json.dumps(result))
        return 0
    first = info["wall"]
    if first < budget / (repeats + 1):
        result["same_size_warmup"] = True  # discard it, then the full set of repeats
        runs = repeats
    else:
        result["same_size_warmup"] = False
        times.append(first)
        infos.append(info)
        runs = max(0, min(repeats, int(budget // first)) - 1)
    for _ in range(runs):
        del field
        gc.collect()
        field, info = fn(case, tol, cap, **kw)
        times.append(info["wall"])
        infos.append(info)
    result["peak_rss"] = common.peak_rss()
    result["times"] = times
    result["info"] = infos[-1]
    result["infos"] = infos
    result["total_seconds"] = time.perf_counter() - t_all
    np.save(spec["out"], field)
    print(json.dumps(result))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
