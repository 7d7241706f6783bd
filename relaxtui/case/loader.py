"""Loading a case: a TOML file and its PNG picture, validated into a :class:`Case`.

:func:`load_case` implements the case-file contract (../shared/case-format.md)
completely; every problem is a :class:`CaseError` with a one-line message that
names the file, the key and, where the TOML text shows it, the line.
:func:`build_case` runs the checks on an already decoded array of region codes
(the loader uses it; tests build cases from arrays with it).

Choices where the contract is silent (also in the README):

* numbers must be finite (``inf`` and ``nan`` are refused);
* ``name`` must be a non-empty string; ``"transparent"`` is matched in any case;
* the first problem found is reported (top-level keys, then ``[solver]``, then
  the regions in order, then the picture, then the domain).

Nothing here imports numba at module level. The solvability check labels
groups of interior cells through the graph of horizontal runs in numpy; only
a picture with more than RUN_GRAPH_LIMIT runs (noise-like) loads the compiled
labelling kernel.
"""

from __future__ import annotations

import difflib
import math
from pathlib import Path
from typing import Sequence

import numpy as np

from relaxtui import options
from relaxtui.case import physics, picture
from relaxtui.case.domain import check_domain
from relaxtui.case.model import (
    KINDS,
    Case,
    Region,
    SolverDefaults,
)
from relaxtui.case.tomltext import MAX_NESTING, KeyLines, _fail, _read_toml, _where  # noqa: F401 - re-exported
from relaxtui.errors import CaseError, UsageError
from relaxtui.options import show_value as _show
from relaxtui.options import type_name as _type_name
from relaxtui.solver import memory

TOP_KEYS = ("title", "quantity", "unit", "mask", "cell_size", "depth", "snap", "solver", "region") + physics.TOP_KEYS_V11
SOLVER_KEYS = ("method", "omega", "tolerance", "max_sweeps", "precision")
COMMON_KEYS = ("name", "color", "kind")
# Keys each kind takes besides name, color and kind; and which of them are required.
KIND_KEYS = {
    "interior": ("conductivity", "source") + physics.INTERIOR_KEYS_V11,
    "fixed": ("value", "conductivity"),
    "outside": (),
    "flux": ("flux",),
    "convection": ("coefficient", "ambient"),
}
REQUIRED_KEYS = {"interior": (), "fixed": ("value",), "outside": (), "flux": ("flux",), "convection": ("coefficient", "ambient")}
POSITIVE_KEYS = ("conductivity", "coefficient")
# The ranges relaxtui computes in (float64 with room for the products of assembly, flows and
# positions): a number outside them is refused with its key and line rather than overflowing later.
NUMBER_RANGES = {
    "conductivity": (1e-300, 1e300),
    "coefficient": (1e-300, 1e300),
    "cell_size": (1e-30, 1e30),
    "depth": (1e-30, 1e30),
}
MAX_MAGNITUDE = 1e150  # |value|, |ambient|, |flux|, |source|
ALL_REGION_KEYS = COMMON_KEYS + ("conductivity", "source", "value", "flux", "coefficient", "ambient") + physics.INTERIOR_KEYS_V11
DEFAULT_CONDUCTIVITY = 1.0
MAX_REGIONS = picture.MAX_REGIONS

_KIND_CHOICES = "interior, fixed, outside, flux, convection"


# ---------------------------------------------------------------------------
# Messages

def check_range(key: str, x: float, fail) -> None:
    """Call ``fail(message)`` when the number ``x`` of ``key`` lies outside what relaxtui computes in."""
    if key in NUMBER_RANGES:
        lo, hi = NUMBER_RANGES[key]
        if not lo <= abs(x) <= hi:
            fail(f"key '{key}' = {x:g} is outside the range relaxtui computes in ({lo:g} to {hi:g})")
    elif key in ("value", "ambient", "flux", "source") and abs(x) > MAX_MAGNITUDE:
        fail(f"key '{key}' = {x:g} is outside the range relaxtui computes in (magnitude at most {MAX_MAGNITUDE:g})")


def _q(text: str) -> str:
    """A key or name quoted for a message: 'key', or its repr if it holds odd characters."""
    return f"'{text}'" if text.isprintable() and "'" not in text else repr(text)


def _suggest(key: str, allowed: Sequence[str]) -> str:
    close = difflib.get_close_matches(key, list(allowed), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


class _Checker:
    """Type and range checks that raise a CaseError with file, key and line."""

    def __init__(self, label: str):
        self.label = label

    def fail(self, line, message):
        raise _fail(self.label, line, message)

    def number(self, value, key, line, who="", *, positive=False) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(line, f"{who}key '{key}' must be a number, not {_type_name(value)} ({_show(value)})")
        try:
            x = float(value)
        except OverflowError:
            self.fail(line, f"{who}key '{key}' is an integer of {len(str(abs(value)))} digits, too large for a number")
        if not math.isfinite(x):
            self.fail(line, f"{who}key '{key}' must be a finite number, got {_show(value)}")
        if positive and not x > 0.0:
            self.fail(line, f"{who}key '{key}' must be > 0, got {_show(value)}")
        check_range(key, x, lambda message: self.fail(line, f"{who}{message}"))
        return x

    def string(self, value, key, line, who="", *, nonempty=False) -> str:
        if not isinstance(value, str):
            self.fail(line, f"{who}key '{key}' must be a string, not {_type_name(value)} ({_show(value)})")
        if nonempty and not value.strip():
            self.fail(line, f"{who}key '{key}' must not be empty")
        return value

    def boolean(self, value, key, line, who="") -> bool:
        if not isinstance(value, bool):
            self.fail(line, f"{who}key '{key}' must be true or false, not {_type_name(value)} ({_show(value)})")
        return value


def _parse_solver(raw, lines: KeyLines, chk: _Checker) -> SolverDefaults:
    if not isinstance(raw, dict):
        chk.fail(lines.top_line("solver"), f"key 'solver' must be a table ([solver]), not {_type_name(raw)}")
    for key in raw:
        if key not in SOLVER_KEYS:
            chk.fail(lines.table_line("solver", key), f"[solver]: unknown key {_q(key)}{_suggest(key, SOLVER_KEYS)} (it takes: {', '.join(SOLVER_KEYS)})")
    who = "[solver]: "
    values = {}
    for key, check in (("method", options.check_method), ("omega", options.check_omega),
                       ("tolerance", options.check_tolerance), ("max_sweeps", options.check_max_sweeps),
                       ("precision", options.check_precision)):
        if key in raw:
            try:
                values[key] = check(raw[key], f"key {key!r}")
            except UsageError as exc:
                chk.fail(lines.table_line("solver", key), f"{who}{exc}")
    method, omega = values.get("method"), values.get("omega")
    if method is not None and omega is not None:
        try:  # an omega beside a method without one: refused as on the command line
            options.check_omega_for(method, omega, "key 'omega'")
        except UsageError as exc:
            chk.fail(lines.table_line("solver", "omega"), f"{who}{exc}")
    tolerance, max_sweeps = values.get("tolerance"), values.get("max_sweeps")
    return SolverDefaults(method=method, omega=omega, tolerance=tolerance, max_sweeps=max_sweeps, precision=values.get("precision"))


def _parse_region(i: int, raw, lines: KeyLines, chk: _Checker) -> tuple[dict, int | None]:
    """Check one [[region]] table; return its fields (name may be None) and header line."""
    header = lines.region_line(i)
    n = i + 1
    if not isinstance(raw, dict):
        chk.fail(header, f"region {n} must be a table ([[region]]), not {_type_name(raw)}")
    name = raw.get("name")
    who = f"region {n} ({name if name.isprintable() else repr(name)}): " if isinstance(name, str) and name.strip() else f"region {n}: "

    def only(allowed, message) -> None:  # refuse the first key of the table not in ``allowed``
        for key in raw:
            if key not in allowed:
                chk.fail(lines.region_line(i, key), f"{who}{message(key)}")

    def needed(key: str, note: str) -> int | None:  # refuse a missing key; else its line
        if key not in raw:
            chk.fail(header, f"{who}missing key '{key}' {note}")
        return lines.region_line(i, key)

    only(ALL_REGION_KEYS, lambda key: f"unknown key {_q(key)}{_suggest(key, ALL_REGION_KEYS)}")
    kind_line = needed("kind", f"(one of: {_KIND_CHOICES})")
    kind = chk.string(raw["kind"], "kind", kind_line, who)
    if kind not in KINDS:
        chk.fail(kind_line, f"{who}key 'kind' must be one of {_KIND_CHOICES}; got {kind!r}{_suggest(kind, KINDS)}")
    takes = COMMON_KEYS + KIND_KEYS[kind]
    only(takes, lambda key: f"key '{key}' does not apply to kind '{kind}' (it takes: {', '.join(takes)})")
    color_line = needed("color", "(\"#rrggbb\" or \"transparent\")")
    color_text = chk.string(raw["color"], "color", color_line, who)
    packed = picture.parse_color(color_text)
    if packed is None:
        chk.fail(color_line, f"{who}key 'color' must be \"#rrggbb\" (six hex digits) or \"transparent\", got {color_text!r}")
    for key in REQUIRED_KEYS[kind]:
        needed(key, f"(kind '{kind}' needs: {', '.join(REQUIRED_KEYS[kind])})")
    if "name" in raw:
        name = chk.string(raw["name"], "name", lines.region_line(i, "name"), who, nonempty=True)
    else:
        name = None
    fields: dict = {"name": name, "color": picture.color_name(packed), "kind": kind, "packed": packed}
    extras = physics.parse_region_extras(raw, kind, lambda key: lines.region_line(i, key), chk, who)
    fields.update(extras)
    for key in KIND_KEYS[kind]:
        if key in raw and key not in extras and key not in physics.INTERIOR_KEYS_V11:
            fields[key] = chk.number(raw[key], key, lines.region_line(i, key), who, positive=key in POSITIVE_KEYS)
    if kind == "interior":
        fields.setdefault("conductivity", DEFAULT_CONDUCTIVITY)
        fields.setdefault("source", 0.0)
    return fields, header


def _name_regions(parsed: list[tuple[dict, int | None]], lines: KeyLines, label: str) -> list[Region]:
    """Give default names (``<kind>-<n>``) and refuse duplicate names and colours."""
    per_kind: dict[str, int] = {}
    names: list[tuple[str, bool]] = []
    for fields, _ in parsed:
        per_kind[fields["kind"]] = per_kind.get(fields["kind"], 0) + 1
        if fields["name"] is None:
            names.append((f"{fields['kind']}-{per_kind[fields['kind']]}", False))
        else:
            names.append((fields["name"], True))
    seen: dict[str, int] = {}
    for i, (name, explicit) in enumerate(names):
        if name in seen:
            j = seen[name]
            other_line = lines.region_line(j, "name" if names[j][1] else None)
            at = f" (line {other_line})" if other_line else ""
            if explicit and names[j][1]:
                raise _fail(label, lines.region_line(i, "name"), f"region {i + 1}: key 'name': {name!r} is already the name of region {j + 1}{at}")
            if explicit:
                raise _fail(label, lines.region_line(i, "name"), f"region {i + 1}: key 'name': {name!r} clashes with the default name of region {j + 1}{at}; name that region")
            raise _fail(label, lines.region_line(i), f"region {i + 1}: its default name {name!r} clashes with the key 'name' of region {j + 1}{at}; give region {i + 1} a name")
        seen[name] = i
    colours: dict[int, int] = {}
    for i, (fields, _) in enumerate(parsed):
        p = fields["packed"]
        if p in colours:
            j = colours[p]
            other_line = lines.region_line(j, "color")
            at = f" (line {other_line})" if other_line else ""
            raise _fail(label, lines.region_line(i, "color"), f"region {i + 1}: key 'color': {fields['color']} is already the colour of region {j + 1}{at} (colours compare case-insensitively)")
        colours[p] = i
    regions = []
    for (fields, header), (name, _) in zip(parsed, names):
        regions.append(
            Region(
                name=name,
                color=fields["color"],
                kind=fields["kind"],
                conductivity=fields.get("conductivity"),
                source=fields.get("source", 0.0),
                value=fields.get("value"),
                flux=fields.get("flux"),
                coefficient=fields.get("coefficient"),
                ambient=fields.get("ambient"),
                line=header,
                conductivity_y=fields.get("conductivity_y"),
            )
        )
    return regions


def load_case(path: str | Path, *, method: str | None = None, precision: str | None = None) -> Case:
    """Read a case TOML file and its PNG picture into a validated :class:`Case`.

    Parameters
    ----------
    path : str or Path
        The case file. Its ``mask`` is resolved relative to the file's folder.
    method, precision : str, optional
        The method and storage precision the run will use when the command line overrides the
        case's ``[solver]`` table; the memory check before decoding is made for them. ``None``
        (the default) checks for the case's own settings.

    Raises
    ------
    CaseError
        For every problem the contract names (one line: file, key, line), for
        a picture that cannot be read, for a picture too large for the memory
        available (checked from the PNG header, before decoding) and for an
        ill-posed domain.
    """
    path = Path(path)
    label = str(path)
    doc, text = _read_toml(path, label)
    lines = KeyLines(text)
    chk = _Checker(label)

    for key in doc:
        if key not in TOP_KEYS:
            chk.fail(lines.top_line(key), f"unknown key {_q(key)}{_suggest(key, TOP_KEYS)} (the top level takes: {', '.join(TOP_KEYS)})")
    title = quantity = unit = None
    if "title" in doc:
        title = chk.string(doc["title"], "title", lines.top_line("title"))
    if "quantity" in doc:
        quantity = chk.string(doc["quantity"], "quantity", lines.top_line("quantity"))
    if "unit" in doc:
        unit = chk.string(doc["unit"], "unit", lines.top_line("unit"))
    if "mask" not in doc:
        chk.fail(None, "missing key 'mask' (the PNG picture, relative to this file)")
    mask_text = chk.string(doc["mask"], "mask", lines.top_line("mask"), nonempty=True)
    cell_size = chk.number(doc.get("cell_size", 1.0), "cell_size", lines.top_line("cell_size"), positive=True)
    depth = chk.number(doc.get("depth", 1.0), "depth", lines.top_line("depth"), positive=True)
    snap = chk.boolean(doc.get("snap", False), "snap", lines.top_line("snap"))
    solver = _parse_solver(doc["solver"], lines, chk) if "solver" in doc else SolverDefaults()

    if "region" not in doc:
        chk.fail(None, "no [[region]] tables: declare what each colour of the picture means")
    raw_regions = doc["region"]
    if not isinstance(raw_regions, list):
        chk.fail(lines.top_line("region"), f"key 'region' must be an array of tables (write each as [[region]]), not {_type_name(raw_regions)}")
    if not raw_regions:
        chk.fail(lines.top_line("region"), "no regions: declare what each colour of the picture means")
    if len(raw_regions) > MAX_REGIONS:
        chk.fail(lines.region_line(MAX_REGIONS), f"{len(raw_regions)} regions declared; at most {MAX_REGIONS} are supported")
    parsed = [_parse_region(i, raw, lines, chk) for i, raw in enumerate(raw_regions)]
    regions = _name_regions(parsed, lines, label)
    geometry = physics.parse_geometry(doc["geometry"], lines.top_line("geometry"), chk) if "geometry" in doc else "planar"
    if geometry == "axisymmetric" and "depth" in doc:
        chk.fail(lines.top_line("depth"), "key 'depth' does not apply to geometry \"axisymmetric\" (flows are totals around the axis)")
    contacts = []
    if "contact" in doc:
        for a, b, r, line in physics.parse_contacts(doc["contact"], lines.top_line("contact"),
                                                    lambda i, key: lines.entry_line("contact", i, key), chk):
            contacts.append(physics.Contact(a=a, b=b, resistance=r, line=line))
    probes = []
    if "probe" in doc:
        probes = physics.parse_probes(doc["probe"], lines.top_line("probe"), lambda i, key: lines.entry_line("probe", i, key), chk)

    mask_line = lines.top_line("mask")
    mask_path = path.parent / mask_text
    mask_label = f"{label}:{mask_line}: mask {mask_text!r}" if mask_line else f"{label}: mask {mask_text!r}"
    if not mask_path.exists():
        raise CaseError(f"{mask_label}: picture not found (looked for {str(mask_path)!r})")
    if mask_path.is_dir():
        raise CaseError(f"{mask_label}: is a folder, not a PNG picture")
    picture.require_regular_file(mask_path, mask_label, "PNG picture")
    header = picture.read_header(mask_path, mask_label)
    per_cell = geometry == "axisymmetric" or any(k in f for f, _ in parsed for k in physics.MAP_KEYS)
    check_memory(header.height, header.width, method or solver.method, len(regions), mask_label, per_cell=per_cell,
                 precision=precision or solver.precision)
    decoded = picture.decode(mask_path, mask_label)
    codes, snapped = picture.match(decoded, [f["packed"] for f, _ in parsed], snap=snap, label=mask_label)
    del decoded
    maps = []
    for (fields, _), region in zip(parsed, regions):
        for key in physics.MAP_KEYS:
            if key in fields:
                text, line = fields[key]
                where = f"{_where(label, line)}: region {region.name!r}: {key} {text!r}"
                values = physics.read_map(path.parent / text, codes.shape, fields["map_range"].get(key), where)
                maps.append(physics.CoefficientMap(region=region.name, key=key.removesuffix("_map"), file=text,
                                                   values=values, line=line))
    return build_case(
        codes,
        regions,
        path=path,
        mask_path=mask_path,
        cell_size=cell_size,
        depth=depth,
        snap=snap,
        snapped=snapped,
        title=title,
        quantity=quantity if quantity is not None else "field",
        unit=unit if unit is not None else "",
        solver=solver,
        contacts=contacts,
        probes=probes,
        geometry=geometry,
        maps=maps,
    )


def check_memory(rows: int, cols: int, method: str | None, materials: int, label: str, per_cell: bool = False,
                 precision: str | None = None) -> None:
    """Refuse a picture whose solve would need more memory than is available."""
    need = memory.estimate_solve_bytes(rows, cols, method, materials, per_cell=per_cell, precision=precision)
    have = memory.available_bytes()
    if have is not None and need > have:
        raise CaseError(
            f"{label}: the picture is {cols} x {rows} pixels ({rows * cols} cells); a solve needs about "
            f"{memory.format_bytes(need)} but only {memory.format_bytes(have)} of memory is available"
        )


# ---------------------------------------------------------------------------
# Cases from arrays, and the domain checks

def _check_region_object(i: int, r: Region, label: str) -> None:
    if not isinstance(r, Region):
        raise CaseError(f"{label}: region {i + 1} is not a Region, got {type(r).__name__}")
    who = f"region {i + 1} ({r.name if isinstance(r.name, str) and r.name.isprintable() else repr(r.name)})"
    if r.kind not in KINDS:
        raise _fail(label, r.line, f"{who}: kind must be one of {_KIND_CHOICES}; got {r.kind!r}")
    if not isinstance(r.name, str) or not r.name.strip():
        raise _fail(label, r.line, f"region {i + 1}: name must be a non-empty string")
    if picture.parse_color(r.color) is None:
        raise _fail(label, r.line, f"{who}: color must be \"#rrggbb\" or \"transparent\", got {r.color!r}")

    def finite(key, value, positive=False, required=False):
        if value is None:
            if required:
                raise _fail(label, r.line, f"{who}: kind '{r.kind}' needs '{key}'")
            return
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) or not math.isfinite(float(value)):
            raise _fail(label, r.line, f"{who}: '{key}' must be a finite number, got {value!r}")
        if positive and not float(value) > 0:
            raise _fail(label, r.line, f"{who}: '{key}' must be > 0, got {value!r}")

    if r.kind == "interior":
        finite("conductivity", r.conductivity, positive=True, required=True)
        finite("conductivity_y", r.conductivity_y, positive=True)
        finite("source", r.source, required=True)
    if r.kind != "interior" and getattr(r, "conductivity_y", None) is not None:
        raise _fail(label, r.line, f"{who}: an orthotropic conductivity [kx, ky] applies to interior regions only")
    if r.kind == "fixed":
        finite("value", r.value, required=True)
        finite("conductivity", r.conductivity, positive=True)
    elif r.kind == "flux":
        finite("flux", r.flux, required=True)
    elif r.kind == "convection":
        finite("coefficient", r.coefficient, positive=True, required=True)
        finite("ambient", r.ambient, required=True)


def build_case(
    codes,
    regions: Sequence[Region],
    *,
    path: str | Path | None = None,
    mask_path: str | Path | None = None,
    cell_size: float = 1.0,
    depth: float = 1.0,
    snap: bool = False,
    snapped: int = 0,
    title: str | None = None,
    quantity: str = "field",
    unit: str = "",
    solver: SolverDefaults | None = None,
    contacts: Sequence = (),
    probes: Sequence = (),
    geometry: str = "planar",
    maps: Sequence = (),
) -> Case:
    """Build a validated :class:`Case` from an array of region codes.

    Parameters
    ----------
    codes : (rows, cols) integer array
        Region index of each cell, image order. Converted to C-contiguous
        uint8 (no copy when it already is one).
    regions : sequence of Region
        At most 255, unique names and colours.
    path, mask_path : optional
        Names used in messages and reports (``mask_path`` defaults to
        ``<array>``).
    cell_size, depth : float
        Metres; both > 0.

    Raises
    ------
    CaseError
        Bad regions or codes, no interior cell, or a group of interior cells
        that touches no fixed or convection cell.
    """
    path = Path(path) if path is not None else None
    mask_path = Path(mask_path) if mask_path is not None else Path("<array>")
    label = str(path) if path is not None else str(mask_path)
    regions = tuple(regions)
    if not regions:
        raise CaseError(f"{label}: no regions")
    if len(regions) > MAX_REGIONS:
        raise CaseError(f"{label}: {len(regions)} regions; at most {MAX_REGIONS} are supported")
    names: dict[str, int] = {}
    colours: dict[int, int] = {}
    for i, r in enumerate(regions):
        _check_region_object(i, r, label)
        if r.name in names:
            raise _fail(label, r.line, f"region {i + 1}: name {r.name!r} is already the name of region {names[r.name] + 1}")
        names[r.name] = i
        p = picture.parse_color(r.color)
        if p in colours:
            raise _fail(label, r.line, f"region {i + 1}: colour {r.color} is already the colour of region {colours[p] + 1}")
        colours[p] = i
    for key, value in (("cell_size", cell_size), ("depth", depth)):
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) or not math.isfinite(float(value)) or not float(value) > 0:
            raise CaseError(f"{label}: {key} must be a finite number > 0, got {value!r}")

    arr = np.asarray(codes)
    if arr.ndim != 2 or arr.shape[0] == 0 or arr.shape[1] == 0:
        raise CaseError(f"{label}: codes must be a non-empty 2-D array, got shape {arr.shape}")
    if arr.dtype != np.uint8:
        if arr.dtype.kind not in "iub":
            raise CaseError(f"{label}: codes must be integers, got dtype {arr.dtype}")
        lo, hi = int(arr.min()), int(arr.max())
        if lo < 0 or hi >= len(regions):
            raise CaseError(f"{label}: codes must lie in 0..{len(regions) - 1}, got {lo}..{hi}")
        arr = arr.astype(np.uint8)
    elif int(arr.max()) >= len(regions):
        raise CaseError(f"{label}: codes must lie in 0..{len(regions) - 1}, got up to {int(arr.max())}")
    arr = np.ascontiguousarray(arr)

    check_domain(arr, regions, label)
    contacts, probes, maps = physics.check_case_extras(regions, arr, contacts, probes, geometry, maps,
                                                       float(cell_size), False, label)
    return Case(
        path=path,
        mask_path=mask_path,
        regions=regions,
        codes=arr,
        cell_size=float(cell_size),
        depth=float(depth),
        snap=bool(snap),
        snapped=int(snapped),
        title=title,
        quantity=quantity,
        unit=unit,
        solver=solver if solver is not None else SolverDefaults(),
        contacts=contacts,
        probes=probes,
        geometry=geometry,
        maps=maps,
    )
