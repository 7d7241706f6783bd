"""relaxtui benchmarks: every section in its own process, one table each.

    python benchmarks/run.py [--quick] [--markdown FILE] [--only a,b]

Sections (each one child process; a section that needs per-solver peak memory
starts one more child per measurement):

1. roofline   sweep speed of every method against a copy kernel, numpy Jacobi
2. tolerance  time to the same true accuracy: red-black SOR (auto omega),
              scipy spsolve, pyamg smoothed aggregation, scipy CG
3. scaling    sweeps/s and time to tolerance as N doubles, fitted exponent
4. threads    Mcell/s at 1 and 2 numba threads
5. startup    `relaxtui solve` on a tiny case (cold and warm numba cache), `relaxtui --help`
6. memory     peak resident memory per cell of `relaxtui solve` on the large demo, and of a
              relaxation solve (red-black SOR, Jacobi) on the 4095² model problem, one material
+  multigrid  benchmarks/multigrid.py, when that file exists
+  scale      benchmarks/scale.py: the rows of the scale issue (multigrid vs pyamg, set-up vs
              cycles, the 16 383² picture, sweep rates vs the copy kernel, peak memory, auto ω share)
   kernels    benchmarks/kernels.py (the kernel developer's checks): only with --only kernels
   precision  benchmarks/precision.py: single ÷ double sweep rates (also in scale): only with --only precision

Timings are medians of 5 repeats after a warm-up, with min–max; where a single
run is long the repeats are reduced and the table says n=. ``--quick`` uses
small sizes (a smoke run, under 2 minutes on 2 cores); its numbers say little.
"""

from __future__ import annotations

import argparse
import datetime as dt
import inspect
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import common  # noqa: E402

SECTIONS = ("roofline", "tolerance", "scaling", "threads", "startup", "memory", "kernels", "multigrid", "scale", "precision")
MODULES = {"roofline": "roofline", "tolerance": "tolerance", "scaling": "scaling", "threads": "threads",
           "startup": "startup", "memory": "footprint"}
DEFAULT = ("roofline", "tolerance", "scaling", "threads", "startup", "memory", "multigrid", "scale")
# benchmarks/kernels.py (its own 4096² speed table, memory and kernel-loading checks in a few dozen
# subprocesses) repeats much of section 1 and takes minutes: run it with --only kernels.


# --- CPU used by others (the machine is shared) -------------------------------------------

def _busy_jiffies() -> tuple[float, float]:
    """(busy, total) CPU seconds of the whole machine since boot, from /proc/stat."""
    with open("/proc/stat") as f:
        parts = f.readline().split()[1:]
    vals = [int(x) for x in parts]
    hz = os.sysconf("SC_CLK_TCK")
    user, nice, system, idle, iowait, irq, softirq = vals[:7]
    steal = vals[7] if len(vals) > 7 else 0
    busy = user + nice + system + irq + softirq
    return busy / hz, (busy + idle + iowait + steal) / hz


def _own_cpu() -> float:
    s = resource.getrusage(resource.RUSAGE_SELF)
    c = resource.getrusage(resource.RUSAGE_CHILDREN)
    return s.ru_utime + s.ru_stime + c.ru_utime + c.ru_stime


class CpuShare:
    """Cores' worth of CPU that other processes used over an interval (busy machine minus this benchmark)."""

    def __init__(self):
        self.busy0, _ = _busy_jiffies()
        self.own0 = _own_cpu()
        self.t0 = time.monotonic()

    def others(self) -> float:
        busy, _ = _busy_jiffies()
        elapsed = time.monotonic() - self.t0
        return max(0.0, (busy - self.busy0) - (_own_cpu() - self.own0)) / elapsed if elapsed > 0 else 0.0


# --- child side ---------------------------------------------------------------------------

def run_section(name: str, quick: bool, previous: Path | None) -> dict:
    if name in MODULES:
        mod = __import__(MODULES[name])
        kwargs = {"quick": quick}
        if "previous" in inspect.signature(mod.run).parameters:
            kwargs["previous"] = previous
        return mod.run(**kwargs)
    # sections owned by other developers: a function returning rows (dicts)
    mod = common.load_sibling(name)
    if mod is None:
        return {"title": f"{name} (benchmarks/{name}.py)", "tables": [], "targets": [],
                "notes": [f"benchmarks/{name}.py does not exist yet: section skipped."], "skipped": True}
    fn = getattr(mod, "run", None)
    if fn is None:
        return {"title": f"{name} (benchmarks/{name}.py)", "tables": [], "targets": [],
                "notes": [f"benchmarks/{name}.py has no run() function: section skipped."], "skipped": True}
    params = inspect.signature(fn).parameters
    rows = fn(quick=quick) if "quick" in params else fn()
    return rows_section(name, rows)


def rows_section(name: str, rows) -> dict:
    """A section from a list of row dicts (the format of benchmarks/kernels.py)."""
    rows = list(rows)
    keys = []
    for r in rows:
        for k in r:
            if k not in keys:
                keys.append(k)
    table_keys = [k for k in keys if k != "ok"]
    body = []
    targets = []
    for r in rows:
        body.append([_cell(r.get(k)) for k in table_keys] + ([_ok(r.get("ok"))] if "ok" in keys else []))
        if r.get("target"):
            targets.append({"target": f"{r.get('name', '')}: {r['target']}",
                            "measured": f"{r.get('value', '')} {r.get('unit', '')}".strip(), "ok": r.get("ok")})
    columns = table_keys + (["ok"] if "ok" in keys else [])
    return {"title": f"{name} (benchmarks/{name}.py)", "tables": [{"columns": columns, "rows": body}],
            "targets": targets, "notes": [f"Rows returned by benchmarks/{name}.py's run(), shown as they are."]}


def _cell(v) -> str:
    return "" if v is None else str(v)


def _ok(v) -> str:
    return "" if v is None else ("ok" if v else "MISS")


# --- parent side --------------------------------------------------------------------------

def render_text(sec: dict) -> str:
    lines = [f"== {sec['title']} =="]
    for t in sec.get("tables", []):
        if t.get("caption"):
            lines.append(t["caption"])
        cols = t["columns"]
        widths = [max(len(str(c)), *(len(str(r[i])) for r in t["rows"])) if t["rows"] else len(str(c)) for i, c in enumerate(cols)]
        lines.append("  ".join(str(c).ljust(w) for c, w in zip(cols, widths)))
        lines.append("  ".join("-" * w for w in widths))
        for r in t["rows"]:
            lines.append("  ".join(str(x).ljust(w) for x, w in zip(r, widths)))
        lines.append("")
    for tg in sec.get("targets", []):
        mark = "" if tg.get("ok") is None else ("ok  " if tg["ok"] else "MISS")
        lines.append(f"  [{mark:4}] {tg['target']}: {tg['measured']}" + (f" ({tg['note']})" if tg.get("note") else ""))
    for n in sec.get("notes", []):
        lines.append(f"  note: {n}")
    if "others_cores" in sec:
        lines.append(f"  other processes used {sec['others_cores']:.2f} cores on average during this section "
                     f"({sec['seconds']:.0f} s)")
    return "\n".join(lines) + "\n"


def _md_escape(x) -> str:
    return str(x).replace("|", "\\|")


def render_markdown(sections: list[dict], meta: dict) -> str:
    m = meta["machine"]
    out = ["# relaxtui benchmark results", ""]
    out.append(f"- date: {meta['date']}")
    out.append(f"- command: `{meta['command']}`{' (quick smoke run: small sizes, numbers say little)' if meta['quick'] else ''}")
    out.append(f"- CPU: {m['cpu']}, {m['cores']} cores, {m['memory_gb']} GB memory")
    out.append(f"- software: Python {m['python']}, numpy {m['numpy']}, numba {m['numba']}, scipy {m['scipy']}, pyamg {m['pyamg']}")
    out.append(f"- total time: {meta['seconds'] / 60:.1f} min")
    out.append(f"- machine shared: {meta['shared']}")
    out.append("- sections: " + ", ".join(f"{s['title'].split(' (')[0]} {s.get('seconds', 0) / 60:.1f} min" for s in sections))
    out.append("")
    for sec in sections:
        out.append(f"## {sec['title']}")
        out.append("")
        for t in sec.get("tables", []):
            if t.get("caption"):
                out.append(t["caption"])
                out.append("")
            out.append("| " + " | ".join(_md_escape(c) for c in t["columns"]) + " |")
            out.append("|" + "|".join(" --- " for _ in t["columns"]) + "|")
            for r in t["rows"]:
                out.append("| " + " | ".join(_md_escape(x) for x in r) + " |")
            out.append("")
        if sec.get("targets"):
            out.append("Targets:")
            out.append("")
            for tg in sec["targets"]:
                mark = "" if tg.get("ok") is None else ("met: " if tg["ok"] else "**MISSED**: ")
                extra = f" ({tg['note']})" if tg.get("note") else ""
                out.append(f"- {mark}{tg['target']}: {tg['measured']}{extra}")
            out.append("")
        for n in sec.get("notes", []):
            out.append(f"- {n}")
        if "others_cores" in sec:
            out.append(f"- other processes used {sec['others_cores']:.2f} cores on average during this section ({sec['seconds']:.0f} s)")
        out.append("")
    return "\n".join(out)


def write_atomic(path: Path, text: str) -> None:
    path = Path(path)
    if not path.parent.is_dir():
        raise SystemExit(f"run.py: error: folder {path.parent} does not exist")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "w") as f:
            f.write(text)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="small sizes: a smoke run in under 2 minutes")
    p.add_argument("--markdown", metavar="FILE", help="also write the results as Markdown")
    p.add_argument("--only", metavar="A,B", help=f"run only these sections ({', '.join(SECTIONS)})")
    p.add_argument("--section", help=argparse.SUPPRESS)  # child mode: run one section
    p.add_argument("--result", help=argparse.SUPPRESS)
    p.add_argument("--previous", help=argparse.SUPPRESS)
    args = p.parse_args(argv)

    if args.section:
        result = run_section(args.section, args.quick, Path(args.previous) if args.previous else None)
        Path(args.result).write_text(json.dumps(result))
        return 0

    names = DEFAULT if not args.only else tuple(s.strip() for s in args.only.split(",") if s.strip())
    unknown = [s for s in names if s not in SECTIONS]
    if unknown:
        p.error(f"unknown section(s) {', '.join(unknown)}; choose from {', '.join(SECTIONS)}")
    if args.markdown and not Path(args.markdown).resolve().parent.is_dir():
        p.error(f"folder of {args.markdown} does not exist")
    meta = {"date": dt.datetime.now().astimezone().strftime("%Y-%m-%d %H:%M %Z"), "quick": args.quick,
            "command": "python benchmarks/run.py" + (" --quick" if args.quick else "") + (f" --only {args.only}" if args.only else ""),
            "machine": common.machine()}
    print(f"relaxtui benchmarks, {meta['date']}: {meta['machine']['cpu']}, {meta['machine']['cores']} cores"
          f"{' (quick)' if args.quick else ''}", flush=True)
    t_start = time.perf_counter()
    whole = CpuShare()
    results = []
    work = Path(tempfile.mkdtemp(prefix="relaxtui-bench-run-"))
    try:
        for name in names:
            out = work / f"{name}.json"
            cmd = [sys.executable, str(HERE / "run.py"), "--section", name, "--result", str(out), "--previous", str(work)]
            if args.quick:
                cmd.append("--quick")
            share = CpuShare()
            t0 = time.perf_counter()
            print(f"-- running section {name} ...", file=sys.stderr, flush=True)
            proc = subprocess.run(cmd, env=common.child_env(), stdout=sys.stderr)
            seconds = time.perf_counter() - t0
            if proc.returncode != 0 or not out.exists():
                sec = {"title": name, "tables": [], "targets": [], "notes": [f"section failed (exit {proc.returncode}); see the messages above"]}
            else:
                sec = json.loads(out.read_text())
            sec["seconds"] = seconds
            sec["others_cores"] = share.others()
            results.append(sec)
            print(render_text(sec), flush=True)
    finally:
        for f in work.iterdir():
            f.unlink()
        work.rmdir()
    meta["seconds"] = time.perf_counter() - t_start
    others = whole.others()
    meta["shared"] = (f"yes: other processes used {others:.2f} of the {meta['machine']['cores']} cores on average during the run "
                      "(measured from /proc/stat minus this benchmark's own CPU time); timings are noisy"
                      if others >= 0.1 else f"no other load measured ({others:.2f} cores on average)")
    missed = [f"{s['title']}: {t['target']}: {t['measured']}" for s in results for t in s.get("targets", []) if t.get("ok") is False]
    print(f"total {meta['seconds'] / 60:.1f} min; machine shared: {meta['shared']}")
    print("targets missed:" if missed else "targets missed: none")
    for m in missed:
        print(f"  {m}")
    if args.markdown:
        write_atomic(Path(args.markdown), render_markdown(results, meta))
        print(f"wrote {args.markdown}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
