"""Section 2, time to tolerance: every solver to the same true accuracy, each in its own process.

Problems: the model problem (N x N unknowns in a one-cell frame, top row 1,
the rest 0; tolerance 1e-5) at N = 511, 1023, 2047, and the large demo
(grids/large-aquifer.toml, 4096², several materials, its own tolerance).
``--quick``: N = 127, 255 and the large demo subsampled every 8th pixel.

Solvers: relaxtui's red-black SOR with auto omega (relaxtui.solver.driver.solve,
assembly, omega estimate and sweeps included: the time a user waits);
relaxtui's multigrid when the method registry has it; scipy spsolve (SuperLU)
on the assembled system; pyamg smoothed aggregation as a preconditioner for
CG (setup + solve); scipy CG without a preconditioner. The scipy solvers'
times include the assembly of the matrix from the loaded case (numpy,
benchmarks/system.py) and its share is shown.

Same accuracy: every result is compared with a reference solution, and the
table shows max |u - u_ref| over the unknowns. The reference is exact for the
model problem (the discrete sine transform solution, benchmarks/system.py)
and, for the large demo, pyamg run to a relative residual of 1e-12 (its change
from 1e-10 is shown as a bound on its own error). relaxtui stops on its own
error estimate; spsolve is direct; pyamg and CG are stopped at the first
iteration whose true max error is <= the tolerance, found by an untimed
calibration run that checks the error after every iteration: an oracle
stopping point no user has, so it flatters them, not relaxtui.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import common
import numpy as np

MODEL_TOL = 1e-5


def _mem_limit() -> int:
    try:
        text = Path("/proc/meminfo").read_text()
        avail = int(text.split("MemAvailable:")[1].split()[0]) * 1024
    except (OSError, IndexError, ValueError):
        avail = 8 << 30
    return int(min(14 << 30, 0.6 * avail))


def settings(quick: bool) -> dict:
    if quick:
        return {"sizes": [127], "demo_step": 16, "budget": 4.0, "cap": 10.0, "cap_relax": 20.0, "cap_demo_cg": 10.0}
    return {"sizes": [511, 1023, 2047], "demo_step": 1, "budget": 60.0, "cap": 240.0, "cap_relax": 600.0, "cap_demo_cg": 120.0}


def cap_for(solver: str, problem: dict, s: dict) -> float:
    """Seconds after which one solve is abandoned (spsolve: the child is killed)."""
    if solver.startswith("relaxtui") or solver == "pyamg":
        return s["cap_relax"]
    if solver == "cg" and problem["kind"] != "model":
        return s["cap_demo_cg"]
    return s["cap"]


def solvers() -> list[str]:
    names = ["relaxtui-rbsor"]
    try:
        from relaxtui.solver.methods import METHODS

        if "multigrid" in METHODS:
            names.append("relaxtui-multigrid")
    except ImportError:
        pass
    return names + ["spsolve", "pyamg", "cg"]


LABEL = {"relaxtui-rbsor": "relaxtui red-black SOR, auto ω", "relaxtui-multigrid": "relaxtui multigrid",
         "spsolve": "scipy spsolve (SuperLU)", "pyamg": "pyamg SA + CG (setup + solve)", "cg": "scipy CG, no preconditioner"}


def _interior_mask(case) -> np.ndarray:
    kinds = case.kind_codes()[case.codes]
    return kinds == 0


def _child(spec: dict, work: Path, timeout: float) -> dict:
    path = work / f"spec-{spec['solver']}.json"
    path.write_text(json.dumps(spec))
    return common.python_child("solver_child.py", path, env=common.child_env(), timeout=timeout)


def measure_problem(problem: dict, label: str, tol: float, case, s: dict, work: Path, log, skip: dict) -> list[dict]:
    mask = _interior_mask(case)
    ref_path = work / "reference.npy"
    ref_note = ""
    if problem["kind"] == "model":
        import system

        n = int(problem["n"])
        field = np.full(case.shape, np.nan)
        field[1:-1, 1:-1] = system.model_exact(n)
        np.save(ref_path, field)
        del field
        ref_note = "exact (discrete sine transform)"
    else:
        log(f"   reference for {label} (pyamg to 1e-12) ...")
        spec = {"solver": "reference", "problem": problem, "tolerance": tol, "out": str(ref_path)}
        r = _child(spec, work, timeout=3600)
        if "error" in r:
            return [{"problem": label, "solver": "reference", "error": f"reference failed: {r['error']}"}]
        ref_note = (f"pyamg to relative residual {r['relres']:.1e} in {r['seconds']:.0f} s; "
                    f"it moved by {r['change_from_1e-10']:.1e} after 1e-10")
    ref = np.load(ref_path, mmap_mode="r")
    out = []
    for solver in solvers():
        if solver in skip:
            out.append({"problem": label, "solver": solver, "error": skip[solver], "tolerance": tol})
            continue
        log(f"   {label}: {solver} ...")
        sol_path = work / f"solution-{solver}.npy"
        spec = {"solver": solver, "problem": problem, "tolerance": tol, "reference": str(ref_path), "out": str(sol_path),
                "budget": s["budget"], "cap": cap_for(solver, problem, s),
                "repeats": common.REPEATS}
        if solver == "spsolve":
            spec["mem_limit"] = _mem_limit()
        timeout = s["budget"] + 2 * s["cap"] + 120 if solver == "spsolve" else 3 * spec["cap"] + 3 * s["budget"] + 600
        r = _child(spec, work, timeout=timeout)
        r["problem"] = label
        r["solver"] = solver
        r["tolerance"] = tol
        if "error" not in r and sol_path.exists():
            sol = np.load(sol_path, mmap_mode="r")
            r["max_error"] = float(np.max(np.abs(np.asarray(sol)[mask] - np.asarray(ref)[mask])))
            del sol
            sol_path.unlink()
        if solver == "spsolve" and "error" in r:
            r["mem_limit"] = spec["mem_limit"]
        r["reference"] = ref_note
        out.append(r)
    del ref
    ref_path.unlink()
    return out


def run(quick: bool) -> dict:
    import sys

    s = settings(quick)
    work = common.temp_dir("tolerance")

    def log(msg):
        print(msg, file=sys.stderr, flush=True)

    results = []
    skip: dict[str, str] = {}
    sp_seen = None  # (unknowns, peak bytes, seconds, label) of the largest spsolve that worked
    try:
        for n in s["sizes"]:
            case = common.model_case(n)
            res = measure_problem({"kind": "model", "n": n}, f"model N={n}", MODEL_TOL, case, s, work, log, skip)
            results += res
            for r in res:
                if r["solver"] == "spsolve" and "error" in r and "spsolve" not in skip:
                    skip["spsolve"] = f"not attempted: it already failed at model N={n} ({r['error']})"
                if r["solver"] == "spsolve" and r.get("peak_rss") and "error" not in r:
                    sp_seen = (n * n, r["peak_rss"], r["times"][0], f"model N={n}")
        from relaxtui.case import load_case

        if s["demo_step"] > 1:
            demo = common.large_demo_variant(work, step=s["demo_step"])
            label = f"large demo, every {s['demo_step']}th pixel"
        else:
            demo = common.LARGE_DEMO
            label = "large demo"
        case = load_case(demo)
        label += f" ({case.shape[0]}x{case.shape[1]})"
        tol = float(case.solver.tolerance) if case.solver.tolerance is not None else 1e-3
        unknowns = int(_interior_mask(case).sum())
        if sp_seen is not None and "spsolve" not in skip:
            need = sp_seen[1] * unknowns / sp_seen[0]
            if need > _mem_limit():
                skip["spsolve"] = (f"not attempted: at {sp_seen[3]} ({sp_seen[0] / 1e6:.1f} M unknowns) it took {sp_seen[2]:.0f} s "
                                   f"and {sp_seen[1] / 1e9:.1f} GB; {unknowns / 1e6:.1f} M unknowns would need more than "
                                   f"{need / 1e9:.0f} GB (LU fill grows faster than the unknowns), over the "
                                   f"{_mem_limit() / 1e9:.0f} GB limit")
        results += measure_problem({"kind": "case", "path": str(demo)}, label, tol, case, s, work, log, skip)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return summarise(results, s, quick)


def _seconds(r) -> str:
    if "times" not in r or not r["times"]:
        return "—"
    return common.fmt_stats(common.stats(r["times"]), 3)


def summarise(results: list[dict], s: dict, quick: bool) -> dict:
    rows = []
    notes = []
    refs = {}
    for r in results:
        refs.setdefault(r["problem"], r.get("reference", ""))
        label = LABEL.get(r["solver"], r["solver"])
        if "error" in r and "times" not in r:
            extra = ""
            if r.get("peak_rss"):
                extra = f"; peak {r['peak_rss'] / common.MB:.0f} MB"
            rows.append([r["problem"], label, "—", "", "", "—", f"not reached: {r['error']}{extra}"])
            continue
        info = r["info"]
        n = len(r["times"])
        its = info.get("iterations")
        detail = []
        if r["solver"].startswith("relaxtui"):
            detail.append(f"{info['status']}, estimated error {info['estimated_error']:.2g}, ω {info['omega']:.4f}, "
                          f"set-up {info['prepare_seconds']:.2f} s")
        if "assembly_seconds" in info:
            detail.append(f"assembly {info['assembly_seconds']:.2f} s")
        if "setup_seconds" in info:
            detail.append(f"AMG setup {info['setup_seconds']:.2f} s, {info['levels']} levels")
        if "relres" in info:
            detail.append(f"relative residual {info['relres']:.1e}")
        if r.get("derived"):
            detail.append("time of the calibration run minus its error checks (long run)")
        elif not r.get("same_size_warmup", True):
            detail.append("no same-size warm-up (long run)")
        peak = r.get("peak_rss")
        rows.append([r["problem"], label, _seconds(r), str(n), "" if peak is None else f"{peak / common.MB:.0f}",
                     "—" if its is None else str(its), f"{r.get('max_error', float('nan')):.2e}; " + "; ".join(detail)])
    for p, ref in refs.items():
        notes.append(f"{p}: reference {ref}.")
    # where relaxation loses: the largest model problem
    by = {(r["problem"], r["solver"]): r for r in results}
    findings = []
    for problem in (f"model N={s['sizes'][-1]}", next((r["problem"] for r in results if not r["problem"].startswith("model")), None)):
        sor = by.get((problem, "relaxtui-rbsor"))
        if not sor or not sor.get("times"):
            continue
        t_sor = common.stats(sor["times"])["median"]
        reached = sor["info"]["status"] == "converged" and sor.get("max_error", np.inf) <= sor["tolerance"]
        for other in ("pyamg", "relaxtui-multigrid", "spsolve"):
            o = by.get((problem, other))
            if o and o.get("times"):
                ratio = t_sor / common.stats(o["times"])["median"]
                verdict = ("SOR loses" if ratio > 1 else "SOR wins") if reached else "SOR did not even reach the tolerance"
                findings.append(f"{problem}: red-black SOR took {ratio:.1f}x the time of {LABEL[other]} ({verdict}).")
    tol_fail = [r for r in results if r.get("max_error") is not None and r["solver"].startswith("relaxtui")
                and r["max_error"] > r["tolerance"]]
    for r in tol_fail:
        findings.append(f"{r['problem']}: relaxtui's true error {r['max_error']:.2e} exceeds the tolerance.")
    notes = findings + notes
    demo_tol = [r["tolerance"] for r in results if not r["problem"].startswith("model")]
    notes.append(f"Tolerance: {MODEL_TOL:g} on the model problem (boundary values 0 and 1); the large demo's own tolerance "
                 f"({demo_tol[0] if demo_tol else float('nan'):g} m of head). Peak RSS: VmHWM of the solver's process after its timed runs, the mark reset just "
                 "before them (so warm-up and calibration do not count; where a calibration run stands in for a long "
                 "pyamg/CG run, its own peak minus the reference vector); it includes the interpreter and imports.")
    notes.append("Stopping: relaxtui stops on its own error estimate; spsolve is direct; pyamg and CG stop at the first "
                 "iteration whose true max error is <= the tolerance, found by a calibration run against the reference — "
                 "an oracle no user has, which flatters them.")
    notes.append(f"Timed runs: {common.REPEATS} after a same-size warm-up when one solve takes under a sixth of the "
                 f"{s['budget']:.0f} s budget, else as many as fit (n column), the first counted. Every solver also "
                 "warmed up on the 63² model problem first, relaxtui also with two sweeps on the case itself. "
                 "BLAS single-threaded; numba uses all cores.")
    notes.append(f"A solve is abandoned after {s['cap_relax']:.0f} s (relaxtui, pyamg), {s['cap']:.0f} s (CG on the model "
                 f"problem; spsolve's process is killed after twice that) or {s['cap_demo_cg']:.0f} s (CG on the large demo); "
                 "spsolve runs under an address-space limit.")
    return {
        "title": "2. Time to tolerance (same true accuracy)" + (" — quick sizes" if quick else ""),
        "tables": [{"columns": ["problem", "solver", "seconds median (min–max)", "n", "peak RSS MB", "sweeps / iterations",
                                "max error vs reference; details"], "rows": rows}],
        "notes": notes,
        "targets": [],
        "data": results,
    }

