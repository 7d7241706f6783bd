"""Shared helpers of the benchmark sections: timing statistics, peak memory, cases, child processes.

Every figure a section reports is measured in that run; nothing here holds a
number of its own except the benchmark settings (sizes, repeats, budgets).
"""

from __future__ import annotations

import importlib.util
import json
import os
import re
import statistics
import subprocess
import sys
import tempfile
import time
import tomllib
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
MB = 1 << 20
REPEATS = 5  # timed repeats after one warm-up


# --- sibling benchmark files that other developers own (loaded by path: the repository root
#     also holds a "kernels" package, so a bare import would be ambiguous) ---------------------

def load_sibling(name: str):
    """benchmarks/<name>.py as a module, or None if the file does not exist."""
    path = HERE / f"{name}.py"
    if not path.exists():
        return None
    spec = importlib.util.spec_from_file_location(f"bench_{name}", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def kernels_bench():
    mod = load_sibling("kernels")
    if mod is None:
        raise RuntimeError("benchmarks/kernels.py is missing")
    return mod


# --- statistics --------------------------------------------------------------------------

def stats(samples) -> dict:
    """Median, min, max and count of a list of numbers."""
    xs = [float(x) for x in samples]
    return {"median": statistics.median(xs), "min": min(xs), "max": max(xs), "n": len(xs)}


def fmt_stats(s: dict | None, digits: int = 3, scale: float = 1.0) -> str:
    """'median (min–max)' with ``digits`` significant digits, or the single value when n = 1."""
    if s is None:
        return "n/a"
    m, lo, hi = (s["median"] * scale, s["min"] * scale, s["max"] * scale)
    if s["n"] == 1:
        return f"{_sig(m, digits)} (n=1)"
    return f"{_sig(m, digits)} ({_sig(lo, digits)}–{_sig(hi, digits)})"


def _sig(x: float, digits: int) -> str:
    if x == 0 or not np.isfinite(x):
        return f"{x:g}"
    mag = int(np.floor(np.log10(abs(x))))
    decimals = max(0, digits - 1 - mag)
    return f"{x:.{decimals}f}"


def round_robin(fns: dict, repeats: int = REPEATS) -> dict:
    """Time each callable ``repeats`` times after one warm-up round, interleaved.

    Round r calls every function once, in turn, so that a burst of load from
    the machine's other users falls on all of them alike. Returns
    name -> list of seconds (warm-up excluded).
    """
    out = {k: [] for k in fns}
    for r in range(repeats + 1):
        for name, fn in fns.items():
            t = time.perf_counter()
            fn()
            dt = time.perf_counter() - t
            if r > 0:
                out[name].append(dt)
    return out


# --- memory ------------------------------------------------------------------------------

def proc_field(path: str, key: str) -> int:
    """A "Key:   N kB" line of a /proc file (status, meminfo) in bytes."""
    with open(path) as f:
        for line in f:
            if line.startswith(key + ":"):
                return int(line.split()[1]) * 1024
    raise RuntimeError(f"no {key} in {path}")


def peak_rss() -> int:
    """Peak resident set size of this process (VmHWM) in bytes."""
    return proc_field("/proc/self/status", "VmHWM")


def current_rss() -> int:
    return proc_field("/proc/self/status", "VmRSS")


def reset_peak_rss() -> bool:
    """Reset VmHWM to the current RSS (Linux >= 4.0: write 5 to /proc/self/clear_refs)."""
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
        return True
    except OSError:
        return False


# --- child processes ---------------------------------------------------------------------

def child_env(threads: int | None = None, **extra) -> dict:
    """Environment of a benchmark child: BLAS single-threaded (as the relaxtui CLI sets it)."""
    env = dict(os.environ)
    for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        env[var] = "1"
    if threads is not None:
        env["NUMBA_NUM_THREADS"] = str(threads)
    env.update({k: str(v) for k, v in extra.items()})
    return env


# A child's peak RSS (ru_maxrss, from wait4 or from getrusage inside it) starts at its parent's own
# high-water mark: Linux carries the forking process's peak into the child when it execs (measured
# here: a child of a process that had touched 1.6 GB reported 1551 MiB for `python -c pass`, 10 MiB
# when started through this launcher). So memory rows start their child from a fresh, small
# interpreter that runs the command, waits for it and writes its wall time and peak to a file.
LAUNCHER = r"""
import json, os, subprocess, sys, time
t = time.perf_counter()
p = subprocess.Popen(sys.argv[2:])
_, status, usage = os.wait4(p.pid, 0)
with open(sys.argv[1], "w") as f:
    json.dump({"wall": time.perf_counter() - t, "maxrss": usage.ru_maxrss * 1024}, f)
code = os.waitstatus_to_exitcode(status)
sys.exit(code if code >= 0 else 128 - code)
"""


def from_small_parent(cmd: list[str], side: Path) -> list[str]:
    """``cmd`` started by :data:`LAUNCHER`, which writes {"wall", "maxrss"} of it to ``side``."""
    return [sys.executable, "-S", "-c", LAUNCHER, str(side), *map(str, cmd)]


def run_json(args: list[str], *, env=None, timeout: float | None = None, cwd=None) -> dict:
    """Run a child that prints one JSON object on its last stdout line; return it.

    A child that fails, times out or prints no JSON gives
    {"error": "..."} instead of raising, so one failed measurement does not
    sink a whole section.
    """
    t0 = time.perf_counter()
    proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env, cwd=cwd)
    try:
        out, err = proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.communicate()
        return {"error": f"timed out after {timeout:.0f} s", "wall": time.perf_counter() - t0}
    wall = time.perf_counter() - t0
    lines = [ln for ln in out.splitlines() if ln.strip()]
    if proc.returncode != 0 or not lines:
        tail = (err.strip().splitlines() or ["(no output)"])[-1]
        return {"error": f"exit {proc.returncode}: {tail[:300]}", "wall": wall}
    try:
        data = json.loads(lines[-1])
    except json.JSONDecodeError:
        return {"error": f"no JSON from child: {lines[-1][:200]}", "wall": wall}
    data.setdefault("wall", wall)
    return data


def python_child(script: str, *args, **kw) -> dict:
    """Run ``script`` (a path under benchmarks/) with this interpreter and arguments."""
    return run_json([sys.executable, str(HERE / script), *map(str, args)], **kw)


# --- cases -------------------------------------------------------------------------------

def model_case(n: int):
    """The model problem: n x n unknowns in a one-cell frame, top row 1, the others 0 (from benchmarks/kernels.py)."""
    return kernels_bench().make_case("uniform", n)


def two_material_case(n: int):
    """benchmarks/kernels.py's two-material case: a k = 10 disc with a source and a convection edge."""
    return kernels_bench().make_case("two-material", n)


LARGE_DEMO = ROOT / "grids" / "large-aquifer.toml"


def toml_text(data: dict) -> str:
    """A TOML writer for the case files' shapes: scalars, one [solver] table, [[region]] arrays."""

    def val(v):
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, (int, float)):
            return repr(v)
        if isinstance(v, str):
            return json.dumps(v)
        raise TypeError(f"cannot write {v!r}")

    lines = []
    tables = []
    for k, v in data.items():
        if isinstance(v, dict):
            tables.append((k, v))
        elif isinstance(v, list):
            tables.append((k, v))
        else:
            lines.append(f"{k} = {val(v)}")
    for k, v in tables:
        if isinstance(v, dict):
            lines.append(f"\n[{k}]")
            lines += [f"{a} = {val(b)}" for a, b in v.items()]
        else:
            for item in v:
                lines.append(f"\n[[{k}]]")
                lines += [f"{a} = {val(b)}" for a, b in item.items()]
    return "\n".join(lines) + "\n"


def large_demo_variant(folder: Path, *, step: int = 1, uniform: bool = False) -> Path:
    """Write a variant of the large demo into ``folder`` and return its TOML path.

    step > 1: the picture subsampled every ``step`` pixels (nearest), cells
    ``step`` times larger (for --quick). uniform: every interior region gets
    the first interior region's conductivity and source (one material).
    """
    data = tomllib.loads(LARGE_DEMO.read_text())
    mask = LARGE_DEMO.parent / data["mask"]
    if step > 1:
        from PIL import Image

        with Image.open(mask) as im:
            im = im.convert("RGB")
            arr = np.asarray(im)[::step, ::step]
        out_png = folder / f"large-aquifer-{step}.png"
        Image.fromarray(np.ascontiguousarray(arr)).save(out_png)
        data["mask"] = out_png.name
        data["cell_size"] = float(data["cell_size"]) * step
    else:
        data["mask"] = str(mask)
    if uniform:
        first = next(r for r in data["region"] if r["kind"] == "interior")
        for r in data["region"]:
            if r["kind"] == "interior":
                r["conductivity"] = first["conductivity"]
                r["source"] = first["source"]
    name = f"large-aquifer{'-uniform' if uniform else ''}{f'-every{step}' if step > 1 else ''}.toml"
    path = folder / name
    path.write_text(toml_text(data))
    return path


def temp_dir(prefix: str) -> Path:
    return Path(tempfile.mkdtemp(prefix=f"relaxtui-bench-{prefix}-"))


# --- machine -----------------------------------------------------------------------------

def machine() -> dict:
    cpu = "unknown"
    try:
        text = Path("/proc/cpuinfo").read_text()
        m = re.search(r"^model name\s*:\s*(.+)$", text, re.M)
        if m:
            cpu = m.group(1).strip()
    except OSError:
        pass
    try:
        mem = Path("/proc/meminfo").read_text()
        total = int(re.search(r"MemTotal:\s*(\d+)", mem).group(1)) * 1024
    except (OSError, AttributeError):
        total = 0
    load = os.getloadavg()
    import numba
    import scipy

    try:
        import pyamg

        pyamg_v = pyamg.__version__
    except ImportError:
        pyamg_v = "not installed"
    return {
        "cpu": cpu,
        "cores": os.cpu_count(),
        "memory_gb": round(total / 1e9, 1),
        "load": [round(x, 2) for x in load],
        "python": sys.version.split()[0],
        "numpy": np.__version__,
        "numba": numba.__version__,
        "scipy": scipy.__version__,
        "pyamg": pyamg_v,
    }


def busy_processes() -> list[str]:
    """Other processes using CPU right now (a shared machine makes numbers noisy)."""
    me = {os.getpid(), os.getppid()}
    try:
        out = subprocess.run(["ps", "-eo", "pid,pcpu,comm", "--sort=-pcpu"], capture_output=True, text=True, timeout=10).stdout
    except (OSError, subprocess.SubprocessError):
        return []
    busy = []
    for line in out.splitlines()[1:]:
        parts = line.split(None, 2)
        if len(parts) == 3 and int(parts[0]) not in me:
            try:
                if float(parts[1]) >= 20.0:
                    busy.append(f"{parts[2]} ({parts[1]} % CPU)")
            except ValueError:
                pass
    return busy


def format_rows(rows: list[dict]) -> str:
    """Plain-text table of benchmark rows (dicts with name, value, unit, detail, target, ok)."""
    width = max(len(r["name"]) for r in rows)
    lines = []
    for r in rows:
        mark = "" if r["ok"] is None else ("  ok" if r["ok"] else "  MISS")
        target = f"  [{r['target']}]" if r["target"] else ""
        lines.append(f"{r['name']:<{width}}  {str(r['value']):>10} {r['unit']:<8} {r['detail']}{target}{mark}")
    return "\n".join(lines)


def print_rows(rows: list[dict], as_json: bool = False) -> None:
    print(json.dumps(rows, indent=1) if as_json else format_rows(rows))
