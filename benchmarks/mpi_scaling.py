"""Strong scaling of the strip-decomposed sweeps across MPI ranks, and a model of larger jobs.

    python benchmarks/mpi_scaling.py [--sizes 4096,8191] [--ranks 1,2,4] [--aquifer SWEEPS] [--multigrid N] [--markdown FILE]
    python benchmarks/mpi_scaling.py --multigrid-scaling 4096,8191 [--markdown FILE]

Needs the mpi extra (``pip install '.[mpi]'``). Sections:

1. *ping-pong* on 2 ranks: one-way time of 8 B .. 1 MiB messages (latency and
   bandwidth of this machine's MPI, shared memory between ranks).
2. *scaling*: a uniform N x N plate (fixed frame), Jacobi and red-black SOR
   (ω 1.9), timed chunks of 20 sweeps (one reduction per chunk, as the
   driver does), for: one process with 2 numba threads (the ordinary
   ``relaxtui solve``), and ``mpiexec -n P`` with 1 numba thread per rank.
   Per sweep: wall time, Mcell/s, and the time each rank spent waiting for
   halo rows and in the chunk's reduction (mean over ranks).
3. *model*: per-sweep time of P ranks at 32 768² and 65 536² from the
   measured single-rank cell rate and the measured latency and bandwidth
   (see :func:`model`).
4. ``--aquifer SWEEPS``: ``relaxtui solve grids/large-aquifer.toml --method
   red-black-sor --max-sweeps SWEEPS`` in one process (2 threads) and on 2
   ranks (1 thread each): wall time and the reports' agreement.
5. ``--multigrid N``: ``relaxtui solve`` with the case's own [solver]
   (multigrid) on grids/large-aquifer.toml and on an N x N plate, one
   process (2 threads) against 2 ranks (1 thread each): iterations, the
   stopping rule's factor, seconds per iteration, field difference.
6. ``--multigrid-scaling SIZES`` (this section alone): multigrid on the
   N x N plate of section 5 for each N, one process (2 threads) against
   ``mpiexec -n 2`` (1 thread each): wall time from launch to files
   written, split into set-up, iterations and the rest (start-up, loading,
   the residual certificate, gathering and writing the outputs), with the
   load average before each run.

The machine these numbers come from has 2 cores; with P = 4 the ranks are
oversubscribed (2 per core) and the table says so. Other work on the machine
shows in the min-max spread.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
CHUNK = 20  # sweeps between reductions
AQUIFER_OMEGA = 1.99  # given, so that both runs of the demo sweep with the same ω
REPEATS = 3


# --- inner parts (run under mpiexec, or as a plain child) ------------------------------------------

def plate_case(n: int):
    from relaxtui.case.loader import build_case
    from relaxtui.case.model import Region

    codes = np.zeros((n, n), dtype=np.uint8)
    codes[0, :] = 1
    codes[-1, :] = 2
    codes[:, 0] = codes[:, -1] = 2
    regions = (Region(name="plate", color="#ffffff", kind="interior", conductivity=1.0),
               Region(name="hot", color="#ff0000", kind="fixed", value=1.0),
               Region(name="cold", color="#0000ff", kind="fixed", value=0.0))
    return build_case(codes, regions)


def sweeps_for(n: int) -> int:
    return max(CHUNK, CHUNK * round(2.5e6 * 60 / (n * n) / CHUNK))  # about 60 sweeps at 4096²


def inner_single(n: int, method: str) -> dict:
    """The ordinary single-process sweeps (numba threads as the environment says)."""
    import numba

    from relaxtui.solver.assembled import Operator

    op = Operator(plate_case(n))
    u = op.new_field()
    upd, res = np.empty(CHUNK), np.empty(CHUNK)
    omega = 1.0 if method == "jacobi" else 1.9
    op.sweep(u, method, omega, CHUNK, upd, res)  # warm-up (and compile)
    k = sweeps_for(n)
    times = []
    for _ in range(REPEATS):
        t0 = time.perf_counter()
        for _ in range(k // CHUNK):
            op.sweep(u, method, omega, CHUNK, upd, res)
        times.append((time.perf_counter() - t0) / k)
    return {"ranks": 1, "threads": numba.get_num_threads(), "n": n, "method": method, "sweep_s": times,
            "cells": op.cells_streamed, "halo_s": 0.0, "reduce_s": 0.0}


def inner_ranks(n: int, method: str) -> dict | None:
    """Every rank builds its strip (the whole operator is assembled on every rank: set-up, not timed)."""
    from relaxtui.parallel.comm import mpi, set_threads
    from relaxtui.parallel.group import _part
    from relaxtui.parallel.strip import Strip, split_rows
    from relaxtui.solver.assembled import Operator

    comm = mpi().COMM_WORLD
    rank, size = comm.Get_rank(), comm.Get_size()
    threads = set_threads(comm)
    case = plate_case(n)
    op = Operator(case)
    bounds = split_rows(np.count_nonzero(op.cls[1:-1], axis=1), size)
    meta, cls, codes = _part(op, case, *bounds[rank])
    meta["cls"], meta["codes"] = cls.copy(), codes.copy()
    cells, guess = op.cells_streamed, op.default_guess()
    del op
    strip = Strip(comm, meta, threads)
    strip.warm()
    strip.new_field(None, guess)
    omega = 1.0 if method == "jacobi" else 1.9
    strip.sweep(method, omega, CHUNK)  # warm-up
    k = sweeps_for(n)
    times, halo, red = [], [], []
    for _ in range(REPEATS):
        comm.Barrier()
        h0, r0 = strip.halo_seconds, strip.reduce_seconds
        t0 = time.perf_counter()
        for _ in range(k // CHUNK):
            strip.sweep(method, omega, CHUNK)
        comm.Barrier()
        times.append((time.perf_counter() - t0) / k)
        halo.append((strip.halo_seconds - h0) / k)
        red.append((strip.reduce_seconds - r0) / k)
    halo_all = comm.gather(statistics.median(halo), root=0)
    red_all = comm.gather(statistics.median(red), root=0)
    if rank:
        return None
    return {"ranks": size, "threads": threads, "n": n, "method": method, "sweep_s": times, "cells": cells,
            "halo_s": float(np.mean(halo_all)), "reduce_s": float(np.mean(red_all)),
            "strips": [b - a for a, b in bounds]}


def inner_pingpong() -> dict | None:
    from relaxtui.parallel.comm import mpi

    MPI = mpi()
    comm = MPI.COMM_WORLD
    rank = comm.Get_rank()
    out = {}
    for nbytes in (8, 4096, 32768, 262144, 1 << 20):
        buf = np.zeros(nbytes // 8)
        reps = 2000 if nbytes <= 32768 else 200
        samples = []
        for _ in range(5):
            comm.Barrier()
            t0 = time.perf_counter()
            for _ in range(reps):
                if rank == 0:
                    comm.Send(buf, dest=1)
                    comm.Recv(buf, source=1)
                else:
                    comm.Recv(buf, source=0)
                    comm.Send(buf, dest=0)
            samples.append((time.perf_counter() - t0) / reps / 2)
        out[nbytes] = statistics.median(samples)
    x = np.zeros(1)
    y = np.zeros(1)
    comm.Barrier()
    t0 = time.perf_counter()
    for _ in range(2000):
        comm.Allreduce(x, y, op=MPI.MAX)
    out["allreduce8"] = (time.perf_counter() - t0) / 2000
    return out if rank == 0 else None


# --- the outer driver ------------------------------------------------------------------------------

def mpiexec() -> str:
    exe = shutil.which("mpiexec", path=str(Path(sys.executable).parent)) or shutil.which("mpiexec")
    if exe is None:
        sys.exit("mpiexec not found: pip install '.[mpi]'")
    return exe


def child_env(threads: int) -> dict:
    env = {k: v for k, v in os.environ.items() if not k.startswith(("PMI_", "PMIX_", "HYDRA_", "MPIR_", "OMPI_", "MPI_LOCAL"))}
    env["NUMBA_NUM_THREADS"] = str(threads)
    return env


def launch(args: list[str], ranks: int | None, threads: int, timeout: float = 3600) -> dict:
    cmd = [sys.executable, str(Path(__file__).resolve()), *args]
    if ranks is not None:
        cmd = [mpiexec(), "-n", str(ranks), *cmd]
    proc = subprocess.run(cmd, env=child_env(threads), capture_output=True, text=True, timeout=timeout, cwd=ROOT)
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed:\n{proc.stderr[-3000:]}")
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("{")]
    return json.loads(lines[-1])


def model(ranks: int, n: int, rate: float, lat: float, bw: float, colours: int, chunk: int = CHUNK) -> dict:
    """Per-sweep time of ``ranks`` strips of an n x n grid.

    compute = n² / ranks / rate (rate: one rank's measured cells/s, so the
    model assumes one rank per core and memory bandwidth that grows with the
    nodes, as it does on a cluster); exchange = colours x (lat + 8 n / bw)
    per sweep (both neighbours at once: send and receive overlap, as measured
    for P = 2); reduction = log2(ranks) x lat per chunk. Strips of n / ranks
    rows; blocks would cut the exchanged bytes by sqrt(ranks) / 2 at the price
    of 4 neighbours.
    """
    compute = n * n / ranks / rate
    exchange = colours * (lat + 8.0 * n / bw)
    reduce = max(1.0, np.log2(ranks)) * lat / chunk
    total = compute + exchange + reduce
    return {"compute": compute, "exchange": exchange, "reduce": reduce, "total": total,
            "comm_share": (exchange + reduce) / total, "efficiency": compute / total}


def fmt_t(s: float) -> str:
    return f"{s * 1e3:.3g} ms" if s >= 1e-3 else f"{s * 1e6:.3g} µs"


def solve_both(case: Path, args: list[str], stem: str) -> tuple[dict, Path]:
    """``relaxtui solve CASE ARGS`` in one process (2 threads) and on 2 ranks (1 thread each), each in a
    folder of its own (no run reuses the other's Jacobi-radius cache file); {label: (wall, report, code)}."""
    import tempfile

    exe = Path(sys.executable).with_name("relaxtui")
    cmd = [str(exe)] if exe.exists() else [sys.executable, "-m", "relaxtui"]
    out = {}
    base = Path(tempfile.mkdtemp(prefix="relaxtui-mpi-"))
    for label, pre, threads in (("1 process x 2 threads", [], 2), ("mpiexec -n 2 x 1 thread", [mpiexec(), "-n", "2"], 1)):
        tmp = base / f"t{threads}"
        tmp.mkdir()
        rep = tmp / f"{stem}-{threads}.json"
        t0 = time.perf_counter()
        proc = subprocess.run(pre + cmd + ["solve", str(case), *args, "-q", "--report", str(rep),
                                           "--out", str(tmp / f"{stem}-{threads}.npy")],
                              env=child_env(threads), capture_output=True, text=True, cwd=tmp)
        wall = time.perf_counter() - t0
        r = json.loads(rep.read_text())
        out[label] = (wall, r, proc.returncode)
    return out, base


def field_difference(base: Path, stem: str) -> float:
    a, b = (np.load(base / f"t{t}" / f"{stem}-{t}.npy") for t in (2, 1))
    return float(np.nanmax(np.abs(a - b)))


def aquifer(lines: list[str], max_sweeps: int) -> None:
    case = ROOT / "grids" / "large-aquifer.toml"
    out, base = solve_both(case, ["--method", "red-black-sor", "--omega", str(AQUIFER_OMEGA), "--max-sweeps", str(max_sweeps)],
                           "aquifer")
    lines += ["", f"## large-aquifer.toml, --method red-black-sor --omega {AQUIFER_OMEGA} --max-sweeps {max_sweeps}", "",
              "| run | ω note |", "|---|---|"] + [f"| {k} | {v[1]['omega_note']} |" for k, v in out.items()] + ["",
              "Red-black SOR does not reach the demo's tolerance (README), so both runs stop at the same sweep limit "
              "and can be compared cell by cell. ω is given: "
              "with auto ω a grid this large starts at a provisional ω that depends on how many Lanczos steps fit "
              "its first seconds, in one process as on several.", "",
              "| run | wall s | solve s | set-up s | sweeps | status | omega | max head | imbalance |", "|---|---|---|---|---|---|---|---|---|"]
    for label, (wall, r, code) in out.items():
        lines.append(f"| {label} | {wall:.1f} | {r['seconds']:.1f} | {r['prepare_seconds']:.1f} | {r['sweeps']} | {r['status']} "
                     f"| {r['omega']:.8f} | {r['max']:.6f} | {r['imbalance']:.3g} |")
    lines.append("")
    lines.append(f"largest field difference between the two runs: {field_difference(base, 'aquifer'):.3g} m "
                 f"(tolerance {out['1 process x 2 threads'][1]['tolerance']:g} m)")


def plate_files(folder: Path, n: int) -> Path:
    """The plate of :func:`plate_case` as a picture and a case file (multigrid, tolerance 1e-6)."""
    from PIL import Image

    rgb = np.full((n, n, 3), 255, dtype=np.uint8)
    rgb[:, 0] = rgb[:, -1] = rgb[-1, :] = (0, 0, 255)
    rgb[0, :] = (255, 0, 0)
    Image.fromarray(rgb, "RGB").save(folder / "plate.png")
    body = ['title = "plate"', 'quantity = "temperature"', 'unit = "K"', 'mask = "plate.png"', "cell_size = 1.0", "snap = false",
            "", "[solver]", 'method = "multigrid"', "tolerance = 1e-6", ""]
    for name, colour, rest in (("plate", "#ffffff", 'kind = "interior"\nconductivity = 1.0'),
                               ("hot", "#ff0000", 'kind = "fixed"\nvalue = 1.0'), ("cold", "#0000ff", 'kind = "fixed"\nvalue = 0.0')):
        body += ["[[region]]", f'name = "{name}"', f'color = "{colour}"', rest, ""]
    (folder / "plate.toml").write_text("\n".join(body), encoding="utf-8")
    return folder / "plate.toml"


def multigrid(lines: list[str], n: int) -> None:
    """Multigrid (the cases' own [solver]) in one process and on 2 ranks: iterations, factor, time per iteration."""
    import tempfile

    cases = [("large-aquifer.toml", ROOT / "grids" / "large-aquifer.toml"),
             (f"plate {n}²", plate_files(Path(tempfile.mkdtemp(prefix="relaxtui-plate-")), n))]
    lines += ["", "## multigrid, one process against 2 ranks", "",
              "| case | run | wall s | solve s | set-up s | iterations | s / iteration | factor | status | field difference |",
              "|---|---|---|---|---|---|---|---|---|---|"]
    for name, case in cases:
        out, base = solve_both(case, [], "mg")
        diff = field_difference(base, "mg")
        for label, (wall, r, code) in out.items():
            per = r["seconds"] / max(1, r["sweeps"])
            lines.append(f"| {name} | {label} | {wall:.1f} | {r['seconds']:.2f} | {r['prepare_seconds']:.1f} | {r['sweeps']} "
                         f"| {per:.3f} | {r['convergence_factor']:.4g} | {r['status']} | {diff:.3g} |")


def multigrid_scaling(lines: list[str], sizes: list[int]) -> None:
    """Multigrid wall time on N x N plates, one process (2 threads) against 2 ranks (1 thread each)."""
    import tempfile

    lines += ["## multigrid wall time, one process against 2 ranks (N x N plate, fixed frame, tolerance 1e-6)", "",
              "| grid | run | load before | wall s | set-up s | iterations s | rest s | iterations | factor | status "
              "| field difference |", "|---|---|---|---|---|---|---|---|---|---|---|"]
    for n in sizes:
        case = plate_files(Path(tempfile.mkdtemp(prefix="relaxtui-plate-")), n)
        load = os.getloadavg()[0]
        out, base = solve_both(case, [], "mg")
        diff = field_difference(base, "mg")
        for label, (wall, r, code) in out.items():
            rest = wall - r["prepare_seconds"] - r["seconds"]
            lines.append(f"| {n}² | {label} | {load:.1f} | {wall:.1f} | {r['prepare_seconds']:.1f} | {r['seconds']:.1f} "
                         f"| {rest:.1f} | {r['sweeps']} | {r['convergence_factor']:.4g} | {r['status']} | {diff:.3g} |")
            load = os.getloadavg()[0]  # before the second run
        shutil.rmtree(base, ignore_errors=True)
        shutil.rmtree(case.parent, ignore_errors=True)
    lines += ["", "set-up: the report's `prepare_seconds` (assembly, hierarchy, kernels loaded); iterations: its "
              "`seconds`; rest: wall minus both."]


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sizes", default="4096,8191")
    p.add_argument("--ranks", default="1,2,4")
    p.add_argument("--aquifer", type=int, metavar="SWEEPS", help="also time large-aquifer.toml, red-black SOR, SWEEPS sweeps")
    p.add_argument("--multigrid", type=int, metavar="N", help="also compare multigrid on the aquifer and an N x N plate")
    p.add_argument("--multigrid-scaling", metavar="SIZES",
                   help="only: multigrid wall time on N x N plates, one process against 2 ranks (comma-separated N)")
    p.add_argument("--markdown")
    p.add_argument("--inner", nargs=2, metavar=("N", "METHOD"))
    p.add_argument("--inner-single", nargs=2, metavar=("N", "METHOD"))
    p.add_argument("--pingpong", action="store_true")
    a = p.parse_args()
    if a.inner:
        r = inner_ranks(int(a.inner[0]), a.inner[1])
        if r is not None:
            print(json.dumps(r))
        return
    if a.inner_single:
        print(json.dumps(inner_single(int(a.inner_single[0]), a.inner_single[1])))
        return
    if a.pingpong:
        r = inner_pingpong()
        if r is not None:
            print(json.dumps(r))
        return

    cores = len(os.sched_getaffinity(0))
    load = os.getloadavg()
    if a.multigrid_scaling:
        lines = [f"# MPI multigrid scaling ({time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())})", "",
                 f"{cores} cores; load average at start {load[0]:.1f} / {load[1]:.1f} / {load[2]:.1f}; one run each.", ""]
        multigrid_scaling(lines, [int(x) for x in a.multigrid_scaling.split(",") if x.strip()])
        text = "\n".join(lines) + "\n"
        print(text)
        if a.markdown:
            Path(a.markdown).write_text(text, encoding="utf-8")
        return
    lines = [f"# MPI strong scaling ({time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())})", "",
             f"{cores} cores; load average at start {load[0]:.1f} / {load[1]:.1f} / {load[2]:.1f} "
             "(other engineers' work shares the machine). Median of 3 timed runs, min-max in brackets.", ""]
    pp = launch(["--pingpong"], 2, 1)
    lat, bw = pp["8"], (1 << 20) / pp[str(1 << 20)]
    lines += ["## ping-pong, 2 ranks (one way)", "", "| message | time |", "|---|---|"]
    for k in ("8", "4096", "32768", "262144", str(1 << 20)):
        lines.append(f"| {int(k):,} B | {fmt_t(pp[k])} |")
    lines += [f"| Allreduce of 8 B | {fmt_t(pp['allreduce8'])} |", "",
              f"latency {fmt_t(lat)}, bandwidth {bw / 1e9:.2f} GB/s (1 MiB)", ""]
    ranks = [int(x) for x in a.ranks.split(",")]
    rates = {}
    for n in (int(x) for x in a.sizes.split(",") if x):
        lines += [f"## {n}²", "", "| method | layout | sweep (median, min-max) | Mcell/s | halo wait / sweep | reduction / sweep | strips |",
                  "|---|---|---|---|---|---|---|"]
        for method in ("jacobi", "red-black-sor"):
            rows = [launch(["--inner-single", str(n), method], None, 2)]
            rows += [launch(["--inner", str(n), method], P, 1) for P in ranks]
            for r in rows:
                med = statistics.median(r["sweep_s"])
                lo, hi = min(r["sweep_s"]), max(r["sweep_s"])
                over = " (oversubscribed: 2 ranks per core)" if r["ranks"] > cores else ""
                layout = (f"1 process x {r['threads']} threads" if "strips" not in r
                          else f"mpiexec -n {r['ranks']} x {r['threads']} thread{over}")
                lines.append(f"| {method} | {layout} | {fmt_t(med)} ({fmt_t(lo)}–{fmt_t(hi)}) | {r['cells'] / med / 1e6:.0f} "
                             f"| {fmt_t(r['halo_s'])} | {fmt_t(r['reduce_s'])} | {'/'.join(map(str, r.get('strips', [])))} |")
                if "strips" in r and r["ranks"] == 1:
                    rates[(n, method)] = r["cells"] / med
        lines.append("")
    # model from the largest measured size
    lines += ["## model: per-sweep time on a cluster (one rank per core)", "",
              f"From the measured single-rank cell rate at the largest size and this machine's measured latency "
              f"{fmt_t(lat)} and bandwidth {bw / 1e9:.2f} GB/s (shared memory; a real network has higher latency).", "",
              "| method | grid | ranks | compute | halo | reduction | total | communication share |", "|---|---|---|---|---|---|---|---|"]
    nmax = max(n for n, _ in rates) if rates else None
    for method, colours in (("jacobi", 1), ("red-black-sor", 2)):
        if (nmax, method) not in rates:
            continue
        rate = rates[(nmax, method)]
        for n in (32768, 65536):
            for P in (16, 64):
                m = model(P, n, rate, lat, bw, colours)
                lines.append(f"| {method} | {n}² | {P} | {fmt_t(m['compute'])} | {fmt_t(m['exchange'])} | {fmt_t(m['reduce'])} "
                             f"| {fmt_t(m['total'])} | {100 * m['comm_share']:.2g} % |")
    if a.aquifer:
        aquifer(lines, a.aquifer)
    if a.multigrid:
        multigrid(lines, a.multigrid)
    text = "\n".join(lines) + "\n"
    print(text)
    if a.markdown:
        Path(a.markdown).write_text(text, encoding="utf-8")


if __name__ == "__main__":
    main()
