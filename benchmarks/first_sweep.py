"""Time to the first sweep: how long a solve prepares before it relaxes anything.

For each grid size (default 1023², 2047², 4096²) a model-problem case (n x n
unknowns in a one-cell fixed frame, the top side held at 100, the others at 0)
is written into a temporary folder as a PNG and a TOML file, and each method
is run in a fresh process, as ``relaxtui solve`` would run it, for a few
sweeps (``--max-sweeps``, default 20), once with ω given and once with ω
``auto``. Reported per run:

- ``load``: reading the picture and checking the case (``load_case``);
- ``first sweep``: from the process's launch (before the interpreter starts)
  to the end of the first sweep, picture loading included;
- ``prepare``: the run's own ``prepare_seconds`` (assembly, kernels, ω);
- ``share``: prepare / (prepare + sweeping) of that short run;
- ``background``: what was still estimated beside the sweeps when the run ended.

``--full`` also runs red-black SOR with auto ω to the default tolerance at the
sizes given, the case where the radius estimate matters most, and reports the
preparation's share of the whole run. ``--cache`` runs each setting twice with
a radius cache folder and reports the second (a cached radius).

Usage: python benchmarks/first_sweep.py [--sizes 1023,2047,4096] [--methods ...] [--full] [--json FILE]
The machine is shared: numbers vary by ±20 % or more; run it on a quiet machine.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
GIVEN = {"jacobi": 1.0, "gauss-seidel": 1.0, "sor": 1.9, "red-black-sor": 1.9, "symmetric-sor": 1.8, "multigrid": None}

CHILD = r"""
import json, sys, time
launched = float(sys.argv[1])
path, method, omega, sweeps, cache, tol = sys.argv[2], sys.argv[3], sys.argv[4], int(sys.argv[5]), sys.argv[6], sys.argv[7]
t0 = time.time()
from relaxtui.case import load_case
from relaxtui.solver.driver import Run
case = load_case(path)
t_load = time.time()
run = Run(case, method=method, omega=None if omega == "-" else (omega if omega == "auto" else float(omega)),
          max_sweeps=sweeps, tolerance=None if tol == "-" else float(tol), radius_cache=None if cache == "-" else cache)
run.prepare()
run.step(0.0)
t_first = time.time()
while not run.done:
    run.step(0.25)
background = run.background
res = run.result()
print(json.dumps({"start": t0 - launched, "load": t_load - t0, "first_sweep": t_first - launched,
                  "prepare": run.prepare_seconds, "sweeping": run.seconds, "sweeps": res.report["sweeps"],
                  "status": res.report["status"], "omega": res.report["omega"], "omega_note": res.report["omega_note"],
                  "background": background}))
"""


def write_model_case(folder: Path, n: int) -> Path:
    import numpy as np
    from PIL import Image

    size = n + 2
    rgb = np.full((size, size, 3), 255, np.uint8)  # white: interior
    rgb[0, :] = rgb[-1, :] = rgb[:, 0] = rgb[:, -1] = (0, 0, 255)  # blue: cold frame
    rgb[0, 1:-1] = (255, 0, 0)  # red: hot top side
    for i, j in ((0, 0), (0, -1), (-1, 0), (-1, -1)):
        rgb[i, j] = (0, 0, 0)  # black: the corners touch no interior cell
    Image.fromarray(rgb).save(folder / f"model{n}.png")
    toml = (f'mask = "model{n}.png"\ntitle = "model problem {n}"\n\n'
            '[[region]]\nname = "plate"\ncolor = "#ffffff"\nkind = "interior"\n\n'
            '[[region]]\nname = "hot"\ncolor = "#ff0000"\nkind = "fixed"\nvalue = 100\n\n'
            '[[region]]\nname = "cold"\ncolor = "#0000ff"\nkind = "fixed"\nvalue = 0\n\n'
            '[[region]]\nname = "corner"\ncolor = "#000000"\nkind = "outside"\n')
    path = folder / f"model{n}.toml"
    path.write_text(toml)
    return path


def child(path: Path, method: str, omega, sweeps: int, cache: str = "-", tol: str = "-") -> dict:
    env = dict(os.environ)
    env.setdefault("OPENBLAS_NUM_THREADS", "1")
    launched = time.time()
    out = subprocess.run([sys.executable, "-c", CHILD, repr(launched), str(path), method, "-" if omega is None else str(omega),
                          str(sweeps), cache, tol], capture_output=True, text=True, env=env, timeout=3600)
    if out.returncode != 0:
        raise RuntimeError(out.stderr.strip().splitlines()[-1] if out.stderr.strip() else f"exit {out.returncode}")
    rec = json.loads(out.stdout.strip().splitlines()[-1])
    rec["wall"] = time.time() - launched
    return rec


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="1023,2047,4096")
    ap.add_argument("--methods", default=",".join(GIVEN))
    ap.add_argument("--max-sweeps", type=int, default=20)
    ap.add_argument("--full", action="store_true", help="also red-black SOR, auto ω, to the default tolerance")
    ap.add_argument("--cache", action="store_true", help="run each setting a second time with a warm radius cache")
    ap.add_argument("--json", help="write the records as JSON")
    args = ap.parse_args(argv)
    sizes = [int(s) for s in args.sizes.split(",")]
    methods = [m for m in args.methods.split(",") if m]
    records = []
    print(f"# load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores (a shared machine: expect noise)")
    print(f"{'grid':>6} {'method':<14} {'omega':<6} {'load s':>7} {'first sweep s':>14} {'prepare s':>10} {'share':>6} "
          f"{'wall s':>7}  background / note")
    with tempfile.TemporaryDirectory(prefix="relaxtui-first-sweep-") as tmp:
        folder = Path(tmp)
        for n in sizes:
            path = write_model_case(folder, n)
            child(path, "red-black-sor", 1.5, 1)  # warm the kernel cache and the page cache
            for method in methods:
                for omega in ([GIVEN[method], "auto"] if GIVEN[method] is not None else [None]):
                    cache = str(folder / f"cache{n}") if args.cache else "-"
                    if args.cache:
                        os.makedirs(cache, exist_ok=True)
                        child(path, method, omega, args.max_sweeps, cache)
                    rec = child(path, method, omega, args.max_sweeps, cache)
                    rec.update(grid=n, method=method, omega_setting="default" if omega is None else str(omega), cached=args.cache)
                    share = rec["prepare"] / max(rec["prepare"] + rec["sweeping"], 1e-9)
                    rec["share"] = share
                    records.append(rec)
                    note = rec["background"] or rec["omega_note"][:70]
                    print(f"{n:>6} {method:<14} {rec['omega_setting']:<6} {rec['load']:>7.2f} {rec['first_sweep']:>14.2f} "
                          f"{rec['prepare']:>10.2f} {share:>6.0%} {rec['wall']:>7.2f}  {note}", flush=True)
            if args.full:
                rec = child(path, "red-black-sor", "auto", 10_000_000, tol="1e-3")
                share = rec["prepare"] / max(rec["prepare"] + rec["sweeping"], 1e-9)
                rec.update(grid=n, method="red-black-sor", omega_setting="auto", full=True, share=share)
                records.append(rec)
                print(f"{n:>6} {'red-black-sor':<14} {'auto':<6} full solve to 1e-3: {rec['status']} after {rec['sweeps']} sweeps, "
                      f"first sweep {rec['first_sweep']:.2f} s, prepare {rec['prepare']:.2f} s of "
                      f"{rec['prepare'] + rec['sweeping']:.1f} s ({share:.0%})", flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps(records, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
