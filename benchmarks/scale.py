"""Scale on one workstation (issue 14): each row of the issue's table, measured side by side in one run.

    python benchmarks/scale.py [--quick]

Rows (sizes: full / ``--quick``):
- multigrid end to end: ``relaxtui solve --method multigrid --tolerance 1e-4`` on the model
  picture (process start to field, report and history written; wall time of the child) against
  pyamg Ruge-Stuben + CG, set-up and solve, given the smallest CG iteration count that reaches a
  true max error of 1e-4 (benchmarks/multigrid.py's calibration: pyamg's best case); 2047² / 511².
- multigrid set-up against its cycles: 511², 1023², 2047², 4095², 8191², 16 383² / 511², 1023²
  (the report's set-up seconds against its iteration seconds); peak memory per cell (peak RSS of
  the child, started from a small launcher (common.LAUNCHER), report and .npy written): 4095², 8191² and 16 383² (with its wall time
  against 120 s; about 13 GB: run it under the machine's heavy-run lock) / 1023².
- the 16 383² picture: load (decode, colour match, domain check) in a child, seconds and peak
  bytes per pixel; / 4095² with ``--quick``.
- sweep rates, uniform 4096² / 1024²: red-black ÷ Jacobi and Jacobi ÷ the copy kernel
  (16 B/cell each), timed in one round-robin in this process.
- single precision (a float32 field) ÷ double, Jacobi and red-black SOR, 4096² / 1024²
  (also alone: ``python benchmarks/precision.py``).
- peak memory of a relaxation solve with report and exports (``--out``, ``--report``,
  ``--history``; 20 sweeps), one material, red-black SOR and Jacobi: 4095² / 1023².
- automatic ω set-up (prepare seconds of the report) as a share of a red-black SOR run to 1e-4:
  2047² / 511².

Every figure is measured in this run; the machine is shared, so ratios compare figures taken
seconds apart.
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

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import common  # noqa: E402

HOT = 100.0
FIXED = 200 * common.MB  # the fixed part of the memory model (interpreter, numba, compiled code)


def row(name, value, unit, detail="", target="", ok=None):
    return {"name": name, "value": value, "unit": unit, "detail": detail, "target": target, "ok": ok}


def model_picture(folder: Path, n: int) -> Path:
    """The model problem as a palette PNG and its TOML: n x n interior cells, the top of the frame at
    100, the other sides at 0. Written row strip by row strip (one byte per pixel in memory)."""
    from PIL import Image

    a = np.zeros((n + 2, n + 2), np.uint8)
    a[0, :] = 1
    a[-1, :] = a[:, 0] = a[:, -1] = 2
    a[0, 0] = a[0, -1] = 2
    im = Image.frombuffer("P", (n + 2, n + 2), a, "raw", "P", 0, 1)
    im.putpalette([255, 255, 255, 255, 0, 0, 0, 0, 255] + [0] * (253 * 3))
    png = folder / f"model{n}.png"
    im.save(png, compress_level=6)
    toml = folder / f"model{n}.toml"
    toml.write_text(f'mask = "{png.name}"\n[[region]]\ncolor = "#ffffff"\nkind = "interior"\n'
                    f'[[region]]\ncolor = "#ff0000"\nkind = "fixed"\nvalue = {HOT}\n'
                    '[[region]]\ncolor = "#0000ff"\nkind = "fixed"\nvalue = 0\n')
    return toml


def solve_child(toml: Path, method: str, work: Path, *, tolerance=None, sweeps=None) -> dict:
    """``relaxtui solve`` in a child of a small launcher: its wall seconds, peak RSS and the report it wrote."""
    from startup import relaxtui_exe

    cmd = [relaxtui_exe(), "solve", str(toml), "--method", method, "--quiet", "--out", str(work / "f.npy"),
           "--report", str(work / "r.json"), "--history", str(work / "h.csv")]
    cmd += ["--tolerance", str(tolerance)] if tolerance is not None else []
    cmd += ["--max-sweeps", str(sweeps)] if sweeps is not None else []
    side = work / "child.json"
    side.unlink(missing_ok=True)
    t = time.perf_counter()
    proc = subprocess.run(common.from_small_parent(cmd, side), env=common.child_env(), stdout=subprocess.DEVNULL,
                          stderr=subprocess.PIPE, cwd=work)
    wall = time.perf_counter() - t
    err = proc.stderr.decode(errors="replace")
    if proc.returncode not in (0, 1) or not side.exists():
        return {"error": f"exit {proc.returncode}: {err.strip()[-300:]}", "wall": wall}
    child = json.loads(side.read_text())  # the command's own wall time and peak (not the launcher's)
    return {"wall": child["wall"], "peak": child["maxrss"], "report": json.loads((work / "r.json").read_text())}


LOAD_SCRIPT = r"""
import json, resource, sys, time
t = time.perf_counter()
import relaxtui
case = relaxtui.load_case(sys.argv[1])
print(json.dumps({"seconds": time.perf_counter() - t, "peak": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024,
                  "pixels": int(case.codes.size)}))
"""


def multigrid_rows(folder: Path, n: int) -> list[dict]:
    import multigrid as bench

    toml = model_picture(folder, n)
    solve_child(model_picture(folder, 63), "multigrid", folder, tolerance=1e-4)  # warm the compiled code
    mine = solve_child(toml, "multigrid", folder, tolerance=1e-4)
    if "error" in mine:
        return [row(f"multigrid {n}² end to end", "error", "", mine["error"])]
    err = float(np.nanmax(np.abs(np.load(folder / "f.npy")[1:-1, 1:-1] - bench.model_exact(n, HOT))))
    A, b = bench.model_matrix(n)
    exact = bench.model_exact(n, HOT).reshape(-1)
    its = bench.pyamg_calibrate(n, A, b, exact, tol=1e-4)
    amg, amg_err = bench.pyamg_time(A, b, its, exact)
    ratio = mine["wall"] / amg
    return [row(f"multigrid {n}² wall ÷ pyamg", round(ratio, 3), "ratio",
                f"relaxtui solve {mine['wall']:.2f} s (set-up {mine['report']['method_info']['setup_seconds']:.2f} s, "
                f"iterations {mine['report']['seconds']:.2f} s, {mine['report']['sweeps']} it., true error {err:.1e}); "
                f"pyamg RS+CG {amg:.2f} s ({its} it., true error {amg_err:.1e})", "<= 0.15", ratio <= 0.15)]


def setup_rows(folder: Path, n: int, wall_target: float | None = None, memory: bool = True) -> list[dict]:
    """Set-up ÷ cycles and (``memory``) peak bytes per cell of a multigrid solve to 1e-4; with
    ``wall_target`` also its wall time (process start to the files written) against that many seconds.
    Below 4095² the fixed 200 MiB dominates the peak and bytes per cell say little: ``memory=False``."""
    toml = model_picture(folder, n)
    r = solve_child(toml, "multigrid", folder, tolerance=1e-4)
    (folder / "f.npy").unlink(missing_ok=True)  # a 16 383² field is 2 GiB of the temporary folder
    if "error" in r:
        return [row(f"multigrid {n}² solve", "error", "", r["error"])]
    setup = r["report"]["method_info"]["setup_seconds"]
    cycles = r["report"]["seconds"]
    cells = (n + 2) ** 2
    per_cell = (r["peak"] - FIXED) / cells
    return [row(f"multigrid {n}² set-up ÷ cycles", round(setup / cycles, 2), "ratio",
                f"set-up {setup:.2f} s, {r['report']['sweeps']} iterations {cycles:.2f} s, wall {r['wall']:.1f} s",
                "<= 1", setup <= cycles)] + ([] if not memory else [
            row(f"multigrid {n}² peak memory", round(per_cell, 1), "B/cell",
                f"peak RSS {r['peak'] / common.MB:.0f} MiB less {FIXED // common.MB} MiB fixed, over {cells} cells "
                "(report and .npy included)", "<= 48", per_cell <= 48)]) + ([] if wall_target is None else [
            row(f"multigrid {n}² wall", round(r["wall"], 1), "s",
                f"{r['report']['status']} after {r['report']['sweeps']} iterations: process start to field, report "
                f"and history written", f"<= {wall_target:g}", r["wall"] <= wall_target)])


def picture_rows(folder: Path, n: int) -> list[dict]:
    toml = model_picture(folder, n)
    size = (folder / f"model{n}.png").stat().st_size
    r = common.run_json(common.from_small_parent([sys.executable, "-c", LOAD_SCRIPT, str(toml)], folder / "load.json"),
                        env=common.child_env(), timeout=900)
    if "error" in r:
        return [row(f"picture {n + 2}² load", "error", "", r["error"])]
    return [row(f"picture {n + 2}² load", round(r["seconds"], 1), "s",
                f"palette PNG of {size / 1e3:.0f} kB: decode, colour match and domain check; peak RSS "
                f"{r['peak'] / common.MB:.0f} MiB = {r['peak'] / r['pixels']:.2f} B/pixel (interpreter included)",
                "loaded (Pillow's default limit refused it)", True)]


def rate_rows(n: int) -> list[dict]:
    import numba

    from relaxtui.kernels import sweeps as k
    from relaxtui.solver.assembled import Operator

    op = Operator(common.model_case(n))
    u = op.new_field()
    s = 6  # even: Jacobi's two buffers end an odd count with a copy back, which the driver's even chunks avoid
    upd, res = np.zeros(s), np.zeros(s)
    a = np.random.default_rng(1).random(op.padded_shape)
    b = np.ones_like(a)
    nb = numba.get_num_threads()
    fns = {"copy": lambda: [k.copy_kernel(a, b, nb) for _ in range(s)],
           "jacobi": lambda: op.sweep(u, "jacobi", 1.0, s, upd, res),
           "red-black": lambda: op.sweep(u, "red-black-sor", 1.0, s, upd, res)}
    t = common.round_robin(fns, 7)
    rate = {x: op.cells_streamed * s / np.median(v) / 1e6 for x, v in t.items()}
    rb_j = float(np.median([t["jacobi"][i] / t["red-black"][i] for i in range(7)]))
    j_c = float(np.median([t["copy"][i] / t["jacobi"][i] for i in range(7)]))
    detail = f"{nb} threads; Mcell/s: copy {rate['copy']:.0f}, Jacobi {rate['jacobi']:.0f}, red-black {rate['red-black']:.0f}"
    return [row(f"red-black ÷ Jacobi sweep rate {n}²", round(rb_j, 2), "ratio", detail + " (median of per-round ratios)", ">= 0.85", rb_j >= 0.85),
            row(f"Jacobi ÷ copy bandwidth {n}²", round(j_c, 2), "ratio", "16 B/cell each", ">= 0.85", j_c >= 0.85)]


def precision_rows(n: int) -> list[dict]:
    """Sweep rate of a float32 field (``--precision single``) over a float64 one, uniform n², Jacobi and
    red-black SOR, timed in one round-robin (the same operator, the same starting field)."""
    import numba

    from relaxtui.solver.assembled import Operator

    op = Operator(common.model_case(n))
    fields = {p: op.new_field(precision=p) for p in ("double", "single")}
    s = 6  # even, as in rate_rows
    upd, res = np.zeros(s), np.zeros(s)
    fns = {}
    for method, label in (("jacobi", "Jacobi"), ("red-black-sor", "red-black")):
        for p, u in fields.items():
            fns[(label, p)] = (lambda u=u, method=method: op.sweep(u, method, 1.0, s, upd, res))
    t = common.round_robin({f"{a} {b}": f for (a, b), f in fns.items()}, 7)
    rate = {x: op.cells_streamed * s / np.median(v) / 1e6 for x, v in t.items()}
    out = []
    for label in ("Jacobi", "red-black"):
        ratio = float(np.median([t[f"{label} double"][i] / t[f"{label} single"][i] for i in range(7)]))
        out.append(row(f"{label} sweep rate single ÷ double {n}²", round(ratio, 2), "ratio",
                       f"{numba.get_num_threads()} threads; Mcell/s: double {rate[f'{label} double']:.0f}, single "
                       f"{rate[f'{label} single']:.0f} (median of per-round ratios)", ">= 1.7", ratio >= 1.7))
    return out


def memory_rows(folder: Path, n: int) -> list[dict]:
    toml = model_picture(folder, n)
    out = []
    for method, budget in (("red-black-sor", 24), ("jacobi", 32)):
        r = solve_child(toml, method, folder, sweeps=20)
        if "error" in r:
            out.append(row(f"{method} {n}² peak memory", "error", "", r["error"]))
            continue
        cells = (n + 2) ** 2
        per_cell = (r["peak"] - FIXED) / cells
        out.append(row(f"{method} {n}² peak memory", round(per_cell, 1), "B/cell",
                       f"20 sweeps, --out --report --history; peak RSS {r['peak'] / common.MB:.0f} MiB less "
                       f"{FIXED // common.MB} MiB fixed", f"<= {budget}", per_cell <= budget))
    return out


def omega_rows(folder: Path, n: int) -> list[dict]:
    toml = model_picture(folder, n)
    r = solve_child(toml, "red-black-sor", folder, tolerance=1e-4)
    if "error" in r:
        return [row(f"auto ω share {n}²", "error", "", r["error"])]
    prep, sweeps = r["report"]["prepare_seconds"], r["report"]["seconds"]
    share = prep / (prep + sweeps)
    return [row(f"auto ω set-up share of red-black SOR {n}²", round(share, 3), "share",
                f"prepare (assembly, ω estimate, kernel load) {prep:.1f} s, {r['report']['sweeps']} sweeps "
                f"{sweeps:.1f} s, ω {r['report']['omega']:.4f}", "<= 0.10", share <= 0.10)]


def run(quick: bool = False) -> list[dict]:
    t0 = time.monotonic()
    rows = []
    with tempfile.TemporaryDirectory(prefix="relaxtui-scale-") as tmp:
        folder = Path(tmp)
        rows += rate_rows(1024 if quick else 4096)
        rows += precision_rows(1024 if quick else 4096)
        rows += memory_rows(folder, 1021 if quick else 4093)
        rows += multigrid_rows(folder, 511 if quick else 2047)
        for n in (511,) if quick else (511, 1023, 2047):  # set-up ÷ cycles at every size (issue 14)
            rows += setup_rows(folder, n, memory=False)
        if not quick:
            rows += setup_rows(folder, 4095)
        rows += setup_rows(folder, 1023 if quick else 8191)
        if not quick:  # about 14 GB and a few minutes of both cores: the full run only
            rows += setup_rows(folder, 16383, wall_target=120.0)
        rows += omega_rows(folder, 511 if quick else 2047)
        rows += picture_rows(folder, 4093 if quick else 16381)
    rows.append(row("machine load at the end", round(os.getloadavg()[0], 1), "load average",
                    f"{os.cpu_count()} cores shared with other users; section {(time.monotonic() - t0) / 60:.1f} min"))
    return rows


def main(argv=None, rows=None, doc=None) -> int:
    """The command line of this file, or of another whose ``rows(quick)`` and ``doc`` are given."""
    p = argparse.ArgumentParser(description=(doc or __doc__).splitlines()[0])
    p.add_argument("--quick", action="store_true", help="small sizes (a few minutes)")
    p.add_argument("--json", action="store_true", help="print the rows as JSON")
    args = p.parse_args(argv)
    common.print_rows((rows or run)(args.quick), args.json)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
