"""``relaxtui info CASE.toml``: what a case holds, before any solve.

Prints the title, grid, cell counts, sizes, a table of the regions (kind,
colour, cells, faces with interior cells, parameters), the snapped count and
the memory a solve will need against what is available.
"""

from __future__ import annotations

import numpy as np

from relaxtui.case.domain import mask_outside_folder
from relaxtui.case.model import DEFAULT_METHOD, INTERIOR, Case
from relaxtui.errors import printable
from relaxtui.solver import memory


def face_matrix(codes: np.ndarray, n: int) -> np.ndarray:
    """Faces between cells of different regions.

    Returns an (n, n) int64 symmetric matrix: entry [i, j] (i != j) counts the
    cell faces with a cell of region i on one side and of region j on the
    other. The diagonal is 0 (faces inside one region are not counted), and
    so are faces on the image border.
    """
    codes = np.ascontiguousarray(codes)
    n = int(n)
    counts = np.zeros(n * n, np.int64)
    for a, b in ((codes[:, :-1], codes[:, 1:]), (codes[:-1, :], codes[1:, :])):
        if a.size:
            diff = a != b
            key = a[diff].astype(np.intp) * n + b[diff]
            counts += np.bincount(key, minlength=n * n)
    m = counts.reshape(n, n)
    return m + m.T


def faces_with_interior(case: Case) -> tuple[np.ndarray, int]:
    """Per region: faces between its cells and interior cells (for an interior
    region: with cells of *other* interior regions); and the interior cells'
    faces on the image border."""
    n = len(case.regions)
    m = face_matrix(case.codes, n)
    interior = case.kind_codes() == INTERIOR
    per = m[:, interior].sum(axis=1)
    codes = case.codes
    border = sum(int(interior[edge].sum()) for edge in (codes[0, :], codes[-1, :], codes[:, 0], codes[:, -1]))
    return per.astype(np.int64), border


def _metres(x: float) -> str:
    if x == 0:
        return "0 m"
    if abs(x) >= 1000:
        return f"{x / 1000:.4g} km"
    if abs(x) >= 1:
        return f"{x:.4g} m"
    if abs(x) >= 1e-3:
        return f"{x * 1e3:.4g} mm"
    return f"{x * 1e6:.4g} µm"


def _with_si(x: float) -> str:
    """``0.00025`` -> ``'0.00025 m (250 µm)'``; ``5`` -> ``'5 m'``."""
    si = _metres(x)
    plain = f"{x:g} m"
    return plain if si == plain else f"{plain} ({si})"


def _si_suffix(w: float, h: float) -> str:
    a, b = _metres(w), _metres(h)
    return "" if (a, b) == (f"{w:g} m", f"{h:g} m") else f" ({a} × {b})"


def _params(r, unit: str) -> str:
    """The region's parameters in a compact form: k, s, u, q, h, ambient."""
    u = f" {unit}" if unit else ""
    if r.kind == "interior":
        ky = getattr(r, "conductivity_y", None)
        text = f"k={r.conductivity:g}" if ky is None else f"kx={r.conductivity:g} ky={ky:g} (orthotropic)"
        if r.source:
            text += f" s={r.source:g}"
        return text
    if r.kind == "fixed":
        text = f"u={r.value:g}{u}"
        if r.conductivity is not None:
            text += f" k={r.conductivity:g}"
        return text
    if r.kind == "flux":
        return f"q={r.flux:g}"
    if r.kind == "convection":
        return f"h={r.coefficient:g} ambient={r.ambient:g}{u}"
    return ""


def _map_params(case: Case, r, text: str) -> str:
    """A region's parameters with its coefficient maps (case format v1.1) in place of k or s."""
    for m in getattr(case, "maps", ()):
        if m.region == r.name:
            short = "k" if m.key == "conductivity" else "s"
            parts = [p for p in text.split(" ") if not p.startswith(short + "=")]
            text = " ".join(parts + [f"{short} from {m.file}"])
    return text


def describe(case: Case, console=None, ranks: int | None = None, precision: str | None = None) -> None:
    """Print the description of a loaded case to a rich console (``precision``: over the case's
    [solver] table, the field storage the memory estimate assumes)."""
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    console = console or Console()
    rows, cols = case.shape
    counts = case.region_counts()
    kinds = case.kind_codes()
    unknowns = int(counts[kinds == INTERIOR].sum())
    faces, border = faces_with_interior(case)
    method = case.solver.method or DEFAULT_METHOD
    per_cell = bool(getattr(case, "maps", ())) or getattr(case, "geometry", "planar") == "axisymmetric"
    precision = precision or case.solver.precision or "double"
    need = memory.estimate_solve_bytes(rows, cols, method, len(case.regions), per_cell=per_cell, precision=precision)
    have = memory.available_bytes()
    h = case.cell_size
    unit = case.unit

    console.print(Text(printable(case.title or case.name), style="bold"))
    facts = Table.grid(padding=(0, 2))
    facts.add_column(style="dim")
    facts.add_column(overflow="fold")  # long paths wrap, never cut
    facts.add_row("case", Text(printable(case.path)) if case.path else "(built from an array)")
    outside = mask_outside_folder(case)
    facts.add_row("picture", Text(printable(case.mask_path) + (f"  (outside the case's folder: {printable(outside)})"
                                                               if outside else "")))
    facts.add_row("quantity", Text(printable(f"{case.quantity} ({unit})" if unit else case.quantity)))
    facts.add_row("grid", f"{rows} rows × {cols} columns")
    facts.add_row("cells", f"{rows * cols:,}")
    facts.add_row("unknowns", f"{unknowns:,} interior cells")
    facts.add_row("cell size", _with_si(h))
    facts.add_row("size", f"{cols * h:g} m wide × {rows * h:g} m high" + _si_suffix(cols * h, rows * h))
    geometry = getattr(case, "geometry", "planar")
    if geometry == "axisymmetric":
        facts.add_row("geometry", "axisymmetric: left edge is the axis, x is the radius; flows are totals around the axis")
    else:
        facts.add_row("geometry", "planar")
        facts.add_row("depth", _with_si(case.depth))
    facts.add_row("snapped", f"{case.snapped:,} pixels" + ("" if case.snap else " (snap is off)"))
    s = case.solver
    solver = [method, f"omega {s.omega if s.omega is not None else 'auto'}"]
    if s.tolerance is not None:
        solver.append(f"tolerance {s.tolerance:g}{' ' + printable(unit) if unit else ''}")
    if s.max_sweeps is not None:
        solver.append(f"at most {s.max_sweeps:,} sweeps")
    if precision != "double":
        solver.append(f"{precision} precision" + ("" if memory.field_bytes_per_cell(method, precision) == 4
                                                  else f" (not for {method}: float64)"))
    facts.add_row("solver", ", ".join(solver))
    mem = f"a solve needs about {memory.format_bytes(need)}; {memory.format_bytes(have)} available"
    facts.add_row("memory", Text(mem, style="bold red") if have is not None and need > have else mem)
    if ranks:
        from relaxtui.parallel.group import DISTRIBUTED_METHODS, STEPPED_METHODS
        from relaxtui.parallel.memory import rank_bytes

        ranked = method if method in DISTRIBUTED_METHODS + STEPPED_METHODS else "red-black-sor"
        first, other = rank_bytes(rows, cols, ranked, len(case.regions), ranks)
        note = "" if ranked == method else f" ({method} does not run across ranks: figures for {ranked})"
        facts.add_row("per rank", f"on {ranks} MPI ranks, {ranked}: about {memory.format_bytes(other)} per rank, "
                      f"{memory.format_bytes(first)} on rank 0 (it also decodes the picture and gathers the field){note}")
    console.print(facts)

    table = Table(title="regions", title_justify="left", show_edge=False, pad_edge=False)
    table.add_column("#", justify="right")
    table.add_column("name")
    table.add_column("kind")
    table.add_column("colour", no_wrap=True)
    table.add_column("cells", justify="right", no_wrap=True)
    table.add_column("faces*", justify="right", no_wrap=True)
    table.add_column("parameters")
    for i, r in enumerate(case.regions):
        swatch = Text()
        if r.color != "transparent":
            swatch.append("  ", style=f"on {r.color}")
            swatch.append(" ")
        swatch.append(r.color)
        if r.kind == "interior":
            face = f"{int(faces[i]):,}" if int(faces[i]) else ""
        else:
            face = f"{int(faces[i]):,}"
        table.add_row(str(i + 1), Text(printable(r.name)), r.kind, swatch, f"{int(counts[i]):,}", face,
                      Text(printable(_map_params(case, r, _params(r, unit)))))
    table.add_row("", Text("(image border)", style="dim"), Text("outside", style="dim"), "", "", f"{border:,}", "")
    console.print(table)
    console.print(Text("* faces with interior cells: cell faces between an interior cell and a cell of "
                       "the region (for an interior region: with cells of other interior regions). "
                       "k conductivity, s source, u fixed value, q flux, h film coefficient.", style="dim"))
    describe_v11(case, console)


def describe_v11(case: Case, console) -> None:
    """The case format v1.1 parts: contacts with face counts, coefficient maps with ranges, probes."""
    from rich.table import Table
    from rich.text import Text

    contacts = getattr(case, "contacts", ())
    maps = getattr(case, "maps", ())
    probes = getattr(case, "probes", ())
    names = {r.name: i for i, r in enumerate(case.regions)}
    if contacts:
        m = face_matrix(case.codes, len(case.regions))
        t = Table(title="contacts", title_justify="left", show_edge=False, pad_edge=False)
        for col, justify in (("between", "left"), ("resistance", "right"), ("faces", "right")):
            t.add_column(col, justify=justify)
        for c in contacts:
            t.add_row(f"{c.a} | {c.b}", f"{c.resistance:g} per unit area", f"{int(m[names[c.a], names[c.b]]):,}")
        console.print(t)
    if maps:
        t = Table(title="coefficient maps", title_justify="left", show_edge=False, pad_edge=False)
        for col, justify in (("region", "left"), ("key", "left"), ("file", "left"), ("range on the region", "right")):
            t.add_column(col, justify=justify)
        for mp in maps:
            t.add_row(mp.region, mp.key, mp.file, f"{mp.low:.6g} .. {mp.high:.6g}")
        console.print(t)
    if probes:
        from relaxtui.output.probes import probe_points

        t = Table(title="probes", title_justify="left", show_edge=False, pad_edge=False)
        for col, justify in (("name", "left"), ("x", "right"), ("y", "right"), ("cell", "left")):
            t.add_column(col, justify=justify)
        rows = case.shape[0]
        for p, (_, fr, fc) in zip(probes, probe_points(case)):
            row, col = min(rows - 1, max(0, int(round(fr)))), max(0, min(case.shape[1] - 1, int(round(fc))))
            t.add_row(p.name, f"{p.x:g} m", f"{p.y:g} m", f"near row {row}, column {col} ({case.regions[case.codes[row, col]].name})")
        console.print(t)
    if contacts or maps or probes or getattr(case, "geometry", "planar") != "planar" or any(
            getattr(r, "conductivity_y", None) is not None for r in case.regions):
        console.print(Text("case format v1.1 keys in use (docs/case-format.md, v1.1 additions)", style="dim"))


def run(args) -> int:
    """Handle ``relaxtui info``; returns the exit code."""
    from relaxtui.case import load_case

    case = load_case(args.case, precision=getattr(args, "precision", None))
    describe(case, ranks=getattr(args, "ranks", None), precision=getattr(args, "precision", None))
    return 0
