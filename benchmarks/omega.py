"""Automatic ω against the theoretical optimum and against a fine scan.

    python benchmarks/omega.py [--quick]

Model problem (an N x N block in a fixed frame, references: Young 1971):
sweeps to the tolerance with ``omega="auto"`` against ω_opt = 2/(1 + sin πh),
target at most 1.25x. Irregular demo cases: auto against the best ω of a scan
in steps of 0.002 around the auto value, target at most 1.25x. Sweeps are
deterministic (they do not depend on machine load); seconds are reported
for orientation only.
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def model_case(n: int):
    from relaxtui.case.model import Case, Region

    size = n + 2
    codes = np.zeros((size, size), dtype=np.uint8)
    codes[0, :] = 1
    codes[-1, :] = codes[:, 0] = codes[:, -1] = 2
    codes[0, 0] = codes[0, -1] = codes[-1, 0] = codes[-1, -1] = 3
    regions = (Region("plate", "#ffffff", "interior", conductivity=1.0), Region("hot", "#ff0000", "fixed", value=100.0),
               Region("cold", "#0000ff", "fixed", value=0.0), Region("corner", "#000000", "outside"))
    return Case(path=None, mask_path=Path(f"model-{n}.png"), regions=regions, codes=codes)


def sweeps_to(case, omega, tol, method="red-black-sor"):
    from relaxtui.solver.driver import solve

    r = solve(case, method=method, omega=omega, tolerance=tol).report
    return r["sweeps"], r["omega"], r["seconds"], r["status"]


def model_rows(sizes, tol):
    rows = []
    for n in sizes:
        case = model_case(n)
        w_opt = 2.0 / (1.0 + math.sin(math.pi / (n + 1)))
        s_auto, w_auto, t_auto, st_a = sweeps_to(case, "auto", tol)
        s_opt, _, t_opt, st_o = sweeps_to(case, w_opt, tol)
        rows.append({"case": f"model {n}x{n}", "tolerance": tol, "auto_omega": w_auto, "auto_sweeps": s_auto,
                     "reference": f"theory {w_opt:.5f}", "reference_sweeps": s_opt, "ratio": s_auto / s_opt,
                     "status": f"{st_a}/{st_o}", "auto_seconds": t_auto})
    return rows


def scan_rows(names, quick):
    from relaxtui.case import load_case

    rows = []
    for name in names:
        case = load_case(ROOT / "grids" / f"{name}.toml")
        tol = case.solver.tolerance or 1e-3
        s_auto, w_auto, t_auto, st = sweeps_to(case, "auto", tol)
        step = 0.004 if quick else 0.002
        grid = np.arange(max(1.0, w_auto - 0.04), min(1.999, w_auto + 0.012) + 1e-12, step)
        best = min(((sweeps_to(case, float(w), tol)[0], float(w)) for w in grid))
        rows.append({"case": name, "tolerance": tol, "auto_omega": w_auto, "auto_sweeps": s_auto,
                     "reference": f"scan best {best[1]:.4f}", "reference_sweeps": best[0], "ratio": s_auto / best[0],
                     "status": st, "auto_seconds": t_auto})
    return rows


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="smaller sizes and a coarser scan")
    args = p.parse_args(argv)
    sizes = [255, 511] if args.quick else [255, 511, 1023]
    rows = model_rows(sizes, 1e-6)
    rows += scan_rows(["electrodes", "composite"] if args.quick else ["electrodes", "composite", "heat-spreader"], args.quick)
    print(f"{'case':18s} {'tol':>7s} {'auto ω':>8s} {'sweeps':>7s} {'reference':>18s} {'sweeps':>7s} {'ratio':>6s}  status")
    for r in rows:
        print(f"{r['case']:18s} {r['tolerance']:7.0e} {r['auto_omega']:8.5f} {r['auto_sweeps']:7d} {r['reference']:>18s} "
              f"{r['reference_sweeps']:7d} {r['ratio']:6.2f}  {r['status']}")
    worst = max(r["ratio"] for r in rows)
    print(f"worst ratio {worst:.2f} (target <= 1.25)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
