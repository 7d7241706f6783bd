"""Section 5, start-up: wall time of the installed ``relaxtui`` command.

- ``relaxtui solve`` on a tiny case (a 32 x 32 plate, hot top edge, cold other
  edges, a small copper insert: two materials, so the mixed-stretch kernels
  load too), cold: NUMBA_CACHE_DIR points to a new empty folder for every run,
  so every kernel is compiled; warm: the same folder again, filled;
- ``relaxtui --help``;
- which heavy modules ``relaxtui --help`` imports (``python -X importtime``).

Wall time of the whole process (subprocess start to exit), after a warm-up
run: 3 cold runs (each compiles everything, about a minute), 5 warm ones and 5
of --help (``--quick``: no cold run, 3 of the others, warm on the default
cache). Outputs go to a temporary folder.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import time
from pathlib import Path

import common
import numpy as np

COLD_RUNS = 3  # a cold run compiles every kernel (about a minute): fewer repeats than elsewhere
TINY_TOML = """\
title = "Tiny start-up plate"
quantity = "temperature"
unit = "K"
mask = "tiny.png"
cell_size = 0.001
depth = 0.01

[solver]
tolerance = 1e-4

[[region]]
name = "plate"
color = "#ffffff"
kind = "interior"
conductivity = 15.0

[[region]]
name = "insert"
color = "#d9822b"
kind = "interior"
conductivity = 390.0

[[region]]
name = "hot edge"
color = "#ff0000"
kind = "fixed"
value = 350.0

[[region]]
name = "cold edges"
color = "#0000ff"
kind = "fixed"
value = 300.0
"""


def make_tiny(folder: Path) -> Path:
    from PIL import Image

    a = np.full((32, 32, 3), 255, dtype=np.uint8)
    a[12:20, 12:20] = (0xD9, 0x82, 0x2B)
    a[0, :] = (255, 0, 0)
    a[-1, :] = (0, 0, 255)
    a[1:, 0] = (0, 0, 255)
    a[1:, -1] = (0, 0, 255)
    Image.fromarray(a).save(folder / "tiny.png")
    path = folder / "tiny.toml"
    path.write_text(TINY_TOML)
    return path


def relaxtui_exe() -> str:
    exe = Path(sys.executable).parent / "relaxtui"
    if exe.exists():
        return str(exe)
    found = shutil.which("relaxtui")
    if found is None:
        raise RuntimeError("the relaxtui command is not installed next to this Python")
    return found


def timed(cmd, env, cwd) -> float:
    t = time.perf_counter()
    proc = subprocess.run(cmd, env=env, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, timeout=600)
    dt = time.perf_counter() - t
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} exited {proc.returncode}: {proc.stderr.strip()[-300:]}")
    return dt


def heavy_imports(exe: str, env) -> dict:
    proc = subprocess.run([sys.executable, "-X", "importtime", exe, "--help"], env=env, capture_output=True, text=True, timeout=120)
    names = set()
    for line in proc.stderr.splitlines():
        if line.startswith("import time:") and "|" in line:
            names.add(line.rsplit("|", 1)[1].strip().split(".")[0])
    return {m: (m in names) for m in ("numba", "textual", "scipy", "numpy", "llvmlite", "rich")}


def run(quick: bool) -> dict:
    exe = relaxtui_exe()
    work = common.temp_dir("startup")
    try:
        case = make_tiny(work)
        solve = [exe, "solve", str(case), "--quiet", "--out", str(work / "f.npy"), "--report", str(work / "r.json"),
                 "--history", str(work / "h.csv")]
        help_cmd = [exe, "--help"]
        base = common.child_env()
        cold_runs = 0 if quick else COLD_RUNS
        warm_runs = 3 if quick else common.REPEATS
        # warm-up: loads the interpreter, the packages and the PNG decoder into the OS file cache
        # (with the default numba cache, which the earlier sections of this run have filled)
        timed(solve, base, work)
        cold = []
        warm_env = base
        for i in range(cold_runs):
            d = work / f"cache-cold-{i}"
            d.mkdir()
            cold.append(timed(solve, dict(base, NUMBA_CACHE_DIR=str(d)), work))
            if i == 0:
                warm_env = dict(base, NUMBA_CACHE_DIR=str(d))  # the first cold run's cache, now filled
        cached = sum(1 for _ in Path(warm_env["NUMBA_CACHE_DIR"]).rglob("*.nbc")) if "NUMBA_CACHE_DIR" in warm_env else None
        warm = [timed(solve, warm_env, work) for _ in range(warm_runs)]
        timed(help_cmd, base, work)
        helps = [timed(help_cmd, base, work) for _ in range(warm_runs)]
        imports = heavy_imports(exe, base)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    sw, sh = common.stats(warm), common.stats(helps)
    rows = []
    if cold:
        sc = common.stats(cold)
        rows.append(["relaxtui solve, tiny case, cold cache (compiles every kernel)", common.fmt_stats(sc), str(sc["n"])])
    else:
        rows.append(["relaxtui solve, tiny case, cold cache (compiles every kernel)", "not run in --quick", "0"])
    rows += [["relaxtui solve, tiny case, warm cache", common.fmt_stats(sw), str(sw["n"])],
             ["relaxtui --help", common.fmt_stats(sh), str(sh["n"])]]
    imported = ", ".join(f"{m} {'yes' if v else 'no'}" for m, v in imports.items())
    targets = [
        {"target": "warm start of relaxtui solve on a tiny case < 1.0 s", "measured": f"{sw['median']:.2f} s", "ok": sw["median"] < 1.0},
        {"target": "relaxtui --help < 0.3 s", "measured": f"{sh['median']:.2f} s", "ok": sh["median"] < 0.3},
        {"target": "relaxtui --help imports neither numba nor textual", "measured": imported,
         "ok": not imports["numba"] and not imports["textual"]},
    ]
    where = (f"the first cold run's cache folder ({cached} compiled kernel files)" if cached is not None
             else "the default numba cache, filled by the earlier sections")
    notes = [f"Tiny case: 32 x 32 cells, two materials, tolerance 1e-4 K. Warm runs use {where}.",
             f"Cold runs: {COLD_RUNS} (each compiles every kernel), after the warm-up; warm and --help: 5 after a warm-up.",
             "Wall time of the whole command as a user sees it (Python start-up, imports, case loading, solve, writing three files)."]
    return {"title": "5. Start-up", "tables": [{"columns": ["command", "seconds median (min–max)", "runs"], "rows": rows}],
            "notes": notes, "targets": targets, "data": {"cold": cold, "warm": warm, "help": helps, "imports": imports}}
