"""``relaxtui sweep``: one headless solve per ω or per method, and a table of them."""

from __future__ import annotations

import math
import sys
import threading
import time
from pathlib import Path

from relaxtui.commands.solve import (
    EXIT_CONVERGED,
    EXIT_INTERRUPTED,
    EXIT_NOT_CONVERGED,
    _sigint_to,
)
from relaxtui.errors import UsageError
from relaxtui.output.text import group


def parse_range(text: str) -> list[float]:
    """``START:STOP:STEP`` (STOP included) or a comma-separated list of ω values."""
    try:
        if ":" in text:
            parts = [float(x) for x in text.split(":")]
            if len(parts) != 3:
                raise ValueError
            start, stop, step = parts
            if step <= 0 or stop < start:
                raise ValueError
            n = int(math.floor((stop - start) / step + 1e-9)) + 1
            values = [round(start + i * step, 12) for i in range(n)]
        else:
            values = [float(x) for x in text.split(",")]
    except ValueError:
        raise UsageError(f"--omega wants START:STOP:STEP (e.g. 1.80:1.99:0.01) or a list a,b,c; got {text!r}") from None
    from relaxtui.options import check_omega

    for w in values:
        try:
            check_omega(w)
        except UsageError as exc:
            raise UsageError(f"{exc} in --omega {text!r}") from None
    if len(values) > 500:
        raise UsageError(f"--omega {text!r} gives {len(values)} settings; at most 500")
    return values


def run(args) -> int:
    from relaxtui.case import load_case
    from relaxtui.options import parse_method
    from relaxtui.solver.driver import Run, check_outputs
    from relaxtui.solver.methods import OMEGA_SCAN_METHODS
    from relaxtui.solver.assembled import Operator

    if args.omega is None and args.methods is None:
        raise UsageError("give --omega START:STOP:STEP (with --method) or --methods M1,M2,...")
    if args.omega is not None and args.methods is not None:
        raise UsageError("give either --omega or --methods, not both")
    if args.method is not None and args.omega is None:
        raise UsageError("--method goes with --omega (the method whose omega is scanned); compare methods with --methods")
    if args.csv:
        check_outputs(csv=args.csv)
    settings: list[tuple[str, object]] = []
    if args.omega is not None:
        method = args.method or "red-black-sor"
        if method not in OMEGA_SCAN_METHODS:
            raise UsageError(f"an omega scan needs {' or '.join(OMEGA_SCAN_METHODS)}, not {method}")
        settings = [(method, w) for w in parse_range(args.omega)] + [(method, "auto")]
        rank_by = "sweeps"
    else:
        names = [m.strip() for m in args.methods.split(",") if m.strip()]
        if not names:
            raise UsageError("--methods needs at least one method name")
        names = [parse_method(name, "--methods: method") for name in names]
        settings = [(name, "auto") for name in names]
        rank_by = "seconds"
    # the memory check for the most demanding method of the table (multigrid needs the most per cell)
    heaviest = "multigrid" if any(m == "multigrid" for m, _ in settings) else settings[0][0]
    case = load_case(args.case, method=heaviest, precision=getattr(args, "precision", None))
    if args.csv:  # the table never replaces an input (`--csv case.toml` used to write the table over the case file)
        from relaxtui.commands.solve import check_output_set

        check_output_set({"table": args.csv}, {"case file": args.case, "picture": case.mask_path})
    # validate every setting before the first solve
    for method, w in settings:
        Run(case, method=method, omega=w, tolerance=args.tolerance, max_sweeps=args.max_sweeps, time_limit=args.time_limit,
            precision=getattr(args, "precision", None))

    op = Operator(case)  # one operator: its Jacobi radius is estimated once for every solve
    cache = Path(args.csv).resolve().parent if args.csv else None  # on disk beside the table, if one is written
    rows = []
    interrupted = threading.Event()
    with _sigint_to(interrupted):
        for number, (method, w) in enumerate(settings, 1):
            if interrupted.is_set():
                break
            label = f"relaxtui sweep: [{number}/{len(settings)}] {method} omega {'auto' if w == 'auto' else f'{w:g}'}"
            run = Run(case, method=method, omega=w, tolerance=args.tolerance, max_sweeps=args.max_sweeps,
                      time_limit=args.time_limit, operator=op, radius_cache=cache, precision=getattr(args, "precision", None))
            run.prepare()
            last = time.monotonic()
            while not run.done:
                if interrupted.is_set():
                    run.cancel()
                p = run.step(0.5)
                if not args.quiet and time.monotonic() - last >= 5.0 and not run.done:
                    last = time.monotonic()
                    err = f"{p.estimated_error:.2g}" if math.isfinite(p.estimated_error) else "not yet estimable"
                    print(f"{label}: sweep {p.sweeps}, estimated error {err} (tolerance {p.tolerance:g})", file=sys.stderr, flush=True)
            p = run.progress
            mcells = op.cells_streamed * p.sweeps / p.seconds / 1e6 if p.seconds > 0 else 0.0
            rows.append({
                "method": method,
                "omega_setting": "auto" if w == "auto" else f"{w:g}",
                "omega": run.omega,
                "sweeps": p.sweeps,
                "seconds": p.seconds,
                "mcells_per_s": mcells,
                "status": p.status,
                "factor": p.factor,
                "estimated_error": p.estimated_error,
            })
            if not args.quiet:
                print(f"{label}: {p.status} after {group(p.sweeps)} sweeps, {p.seconds:.2f} s", file=sys.stderr, flush=True)
    best = _mark_best(rows, rank_by)
    _print_table(rows, best, rank_by, case, run.tolerance if rows else None)
    if args.csv:
        _write_csv(args.csv, rows, best)
    if interrupted.is_set():
        return EXIT_INTERRUPTED
    return EXIT_CONVERGED if rows and all(r["status"] == "converged" for r in rows) else EXIT_NOT_CONVERGED


def _mark_best(rows, rank_by):
    fixed = [i for i, r in enumerate(rows) if r["status"] == "converged" and r["omega_setting"] != "auto"] or \
            [i for i, r in enumerate(rows) if r["status"] == "converged"]
    if not fixed:
        return None
    return min(fixed, key=lambda i: (rows[i][rank_by], rows[i]["seconds"]))


def _print_table(rows, best, rank_by, case, tolerance) -> None:
    from rich import box
    from rich.console import Console
    from rich.table import Table

    unit = f" {case.unit}" if case.unit else ""
    methods = {r["method"] for r in rows}
    one = len(methods) == 1
    title = f"{case.name}: tolerance {tolerance:g}{unit}" + (f", {rows[0]['method']}" if one and rows else "")
    t = Table(title=f"{title}; * best by {rank_by}", title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False,
              padding=(0, 1), collapse_padding=True, show_edge=False)
    cols = [("", "left")] + ([] if one else [("method", "left")]) + [
        ("omega", "right"), ("sweeps", "right"), ("seconds", "right"), ("Mcell/s", "right"), ("status", "left"), ("factor", "right")]
    for col, just in cols:  # about 75 columns wide with every field: fits an 80-column terminal
        t.add_column(col, justify=just, no_wrap=True)
    for i, r in enumerate(rows):
        omega = f"auto {r['omega']:.4f}" if r["omega_setting"] == "auto" else f"{r['omega']:.4f}"
        if r["method"] == "gauss-seidel":
            omega = "-"
        cells = ["*" if i == best else ""] + ([] if one else [r["method"]]) + [
            omega, group(r["sweeps"]), f"{r['seconds']:.2f}", f"{r['mcells_per_s']:.0f}", r["status"],
            "n/a" if r["factor"] is None else f"{r['factor']:.5f}"]
        t.add_row(*cells)
    Console().print(t)


def _write_csv(path, rows, best) -> None:
    from relaxtui.output.atomic import write_text

    lines = ["method,omega_setting,omega,sweeps,seconds,mcells_per_s,status,factor,best"]
    for i, r in enumerate(rows):
        factor = "" if r["factor"] is None else repr(r["factor"])
        lines.append(f"{r['method']},{r['omega_setting']},{r['omega']!r},{r['sweeps']},{r['seconds']:.6f},"
                     f"{r['mcells_per_s']:.3f},{r['status']},{factor},{int(i == best)}")
    write_text(path, "\n".join(lines) + "\n", "table")
