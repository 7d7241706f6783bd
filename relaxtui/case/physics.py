"""Case format v1.1: contact resistance, orthotropy, coefficient maps, probes, axisymmetry.

Everything a v1.1 key means lives here, on the case side: the records a
:class:`~relaxtui.case.model.Case` carries (:class:`Contact`, :class:`Probe`,
:class:`CoefficientMap`), the parsing of the new keys (called by the loader with
its own checker, so messages name file, key and line as everywhere), the
loading of map files, and the checks run on cases built from arrays too.

A case that uses none of the new keys carries empty tuples and
``geometry = "planar"`` and is assembled by the v1 code path unchanged
(bit for bit the same field).

Keys (docs/case-format.md, "v1.1 additions"):

* top level: ``geometry = "planar" | "axisymmetric"``; ``[[contact]]`` with
  ``between = [name, name]`` and ``resistance`` (> 0, per unit face area);
  ``[[probe]]`` with ``name``, ``x``, ``y`` (metres, origin at the picture's
  bottom-left corner, y up);
* an interior region: ``conductivity = [kx, ky]``; ``conductivity_map`` and
  ``source_map`` (a ``.npy`` float array of the picture's shape, or a 16-bit
  grey PNG scaled linearly from ``map_min`` at 0 to ``map_max`` at 65535).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from relaxtui.errors import CaseError

GEOMETRIES = ("planar", "axisymmetric")
TOP_KEYS_V11 = ("geometry", "contact", "probe")
CONTACT_KEYS = ("between", "resistance")
PROBE_KEYS = ("name", "x", "y")
MAP_KEYS = ("conductivity_map", "source_map")
MAP_RANGE_KEYS = ("map_min", "map_max")
INTERIOR_KEYS_V11 = MAP_KEYS + MAP_RANGE_KEYS
PNG_FULL = 65535.0


@dataclass(frozen=True)
class Contact:
    """A contact resistance on every face between a cell of region ``a`` and one of region ``b``."""

    a: str
    b: str
    resistance: float  # per unit face area (e.g. m²·K/W), > 0
    line: int | None = None


@dataclass(frozen=True)
class Probe:
    """A named point (metres, origin bottom-left, y up) whose value is reported."""

    name: str
    x: float
    y: float
    line: int | None = None


@dataclass(frozen=True, eq=False)
class CoefficientMap:
    """Per-cell values of ``key`` ("conductivity" or "source") on the cells of region ``region``.

    ``values`` is (rows, cols) float64 as read (scaled for a PNG); only the
    region's cells are used. ``low``/``high`` are the range over those cells.
    """

    region: str
    key: str  # "conductivity" or "source"
    file: str  # as written in the case file ("<array>" for a map given as an array)
    values: np.ndarray
    low: float = math.nan
    high: float = math.nan
    line: int | None = None


# ---------------------------------------------------------------------------
# Parsing (the loader passes its KeyLines-derived line numbers and checker)


def parse_geometry(value, line, chk) -> str:
    text = chk.string(value, "geometry", line)
    if text not in GEOMETRIES:
        chk.fail(line, f"key 'geometry' must be \"planar\" or \"axisymmetric\", got {text!r}")
    return text


def _entries(raw, what: str, keys, top_line, entry_line, chk):
    """Yield (i, entry, "what i: ") for each table of the ``[[what]]`` array ``raw`` once it is a
    table with exactly the keys ``keys``; ``entry_line(i, key)`` is the line of key in entry i."""
    if not isinstance(raw, list):
        chk.fail(top_line, f"key '{what}' must be an array of tables (write each as [[{what}]])")
    for i, entry in enumerate(raw):
        who = f"{what} {i + 1}: "
        header = entry_line(i, None)
        if not isinstance(entry, dict):
            chk.fail(header, f"{what} {i + 1} must be a table ([[{what}]])")
        for key in entry:
            if key not in keys:
                chk.fail(entry_line(i, key), f"{who}unknown key {key!r} (it takes: {', '.join(keys)})")
        for key in keys:
            if key not in entry:
                chk.fail(header, f"{who}missing key '{key}'")
        yield i, entry, who


def parse_contacts(raw, top_line, entry_line, chk) -> list[tuple[str, str, float, int | None]]:
    """``raw`` is the value of the ``contact`` key; ``entry_line(i, key)`` the line of key in entry i."""
    out = []
    for i, entry, who in _entries(raw, "contact", CONTACT_KEYS, top_line, entry_line, chk):
        line = entry_line(i, "between")
        between = entry["between"]
        if not isinstance(between, list) or len(between) != 2 or not all(isinstance(n, str) for n in between):
            chk.fail(line, f"{who}key 'between' must be two region names, like [\"plate\", \"chip\"]")
        if between[0] == between[1]:
            chk.fail(line, f"{who}key 'between' names region {between[0]!r} twice; a contact joins two different regions")
        r = chk.number(entry["resistance"], "resistance", entry_line(i, "resistance"), who, positive=True)
        out.append((between[0], between[1], r, line))
    return out


def parse_probes(raw, top_line, entry_line, chk) -> list[Probe]:
    out = []
    seen: dict[str, int] = {}
    for i, entry, who in _entries(raw, "probe", PROBE_KEYS, top_line, entry_line, chk):
        name = chk.string(entry["name"], "name", entry_line(i, "name"), who, nonempty=True)
        if not name.isprintable() or "," in name or '"' in name:
            chk.fail(entry_line(i, "name"), f"{who}key 'name' must be printable text without commas or quotes (it is a CSV column)")
        if name in seen:
            chk.fail(entry_line(i, "name"), f"{who}key 'name': {name!r} is already the name of probe {seen[name] + 1}")
        seen[name] = i
        x = chk.number(entry["x"], "x", entry_line(i, "x"), who)
        y = chk.number(entry["y"], "y", entry_line(i, "y"), who)
        out.append(Probe(name=name, x=x, y=y, line=entry_line(i, None)))
    return out


def parse_region_extras(raw: dict, kind: str, line_of, chk, who: str) -> dict:
    """The v1.1 keys of one region: orthotropic conductivity and map references.

    Returns fields to add: ``conductivity`` (kx) and ``conductivity_y`` for an
    array, ``conductivity_map`` / ``source_map`` (file text, line) and
    ``map_range`` ({map key: (min, max)} for PNG maps). The caller has already
    refused keys that do not apply to the kind.
    """
    out: dict = {}
    if kind != "interior":
        return out
    if isinstance(raw.get("conductivity"), list):
        line = line_of("conductivity")
        pair = raw["conductivity"]
        if len(pair) != 2:
            chk.fail(line, f"{who}key 'conductivity' must be one number or two, [kx, ky]; got {len(pair)} values")
        out["conductivity"] = chk.number(pair[0], "conductivity", line, who + "kx of ", positive=True)
        out["conductivity_y"] = chk.number(pair[1], "conductivity", line, who + "ky of ", positive=True)
    pngs = []
    for key in MAP_KEYS:
        if key not in raw:
            continue
        line = line_of(key)
        text = chk.string(raw[key], key, line, who, nonempty=True)
        plain = key.removesuffix("_map")
        if plain in raw:
            chk.fail(line, f"{who}keys '{plain}' and '{key}' both given; give one (the map holds the value of every cell)")
        suffix = Path(text).suffix.lower()
        if suffix not in (".npy", ".png"):
            chk.fail(line, f"{who}key '{key}' must name a .npy array or a 16-bit grey .png, got {text!r}")
        out[key] = (text, line)
        if suffix == ".png":
            pngs.append(key)
    ranges = {}
    given = [k for k in MAP_RANGE_KEYS if k in raw]
    if given and not pngs:
        chk.fail(line_of(given[0]), f"{who}key '{given[0]}' applies only to a .png conductivity_map or source_map")
    if pngs:
        for k in MAP_RANGE_KEYS:
            if k not in raw:
                chk.fail(line_of(pngs[0]), f"{who}missing key '{k}' (a .png map is scaled from map_min at 0 to map_max at 65535)")
        lo_raw, hi_raw = raw["map_min"], raw["map_max"]
        if len(pngs) == 2:
            # two PNG maps: each range key is [for conductivity_map, for source_map]
            for k, v in (("map_min", lo_raw), ("map_max", hi_raw)):
                if not isinstance(v, list) or len(v) != 2:
                    chk.fail(line_of(k), f"{who}key '{k}' must be [for conductivity_map, for source_map] when both maps are .png")
            pairs = {"conductivity_map": (lo_raw[0], hi_raw[0]), "source_map": (lo_raw[1], hi_raw[1])}
        else:
            for k, v in (("map_min", lo_raw), ("map_max", hi_raw)):
                if isinstance(v, list):
                    chk.fail(line_of(k), f"{who}key '{k}' must be a number (one .png map)")
            pairs = {pngs[0]: (lo_raw, hi_raw)}
        for key, (lo, hi) in pairs.items():
            lo = chk.number(lo, "map_min", line_of("map_min"), who)
            hi = chk.number(hi, "map_max", line_of("map_max"), who)
            if key == "conductivity_map" and not (lo > 0 and hi > 0):
                chk.fail(line_of("map_min"), f"{who}a conductivity map's map_min and map_max must be > 0, got {lo:g} and {hi:g}")
            ranges[key] = (lo, hi)
    out["map_range"] = ranges
    return out


# ---------------------------------------------------------------------------
# Map files


def read_map(path: Path, shape: tuple[int, int], value_range, label: str) -> np.ndarray:
    """A map file as (rows, cols) float64: a .npy float array, or a 16-bit grey PNG scaled to ``value_range``."""
    if not path.exists():
        raise CaseError(f"{label}: map not found (looked for {str(path)!r})")
    if path.is_dir():
        raise CaseError(f"{label}: is a folder, not a map file")
    if path.suffix.lower() == ".npy":
        try:  # the header first: a wrong shape or type is refused before any data is read
            with open(path, "rb") as f:
                version = np.lib.format.read_magic(f)
                read = np.lib.format.read_array_header_1_0 if version == (1, 0) else np.lib.format.read_array_header_2_0
                head_shape, _, head_dtype = read(f)
        except (ValueError, OSError, EOFError) as exc:
            raise CaseError(f"{label}: not a readable .npy array ({exc})") from None
        if head_dtype.kind not in "fiu":
            raise CaseError(f"{label}: the map must hold real numbers, not {head_dtype}")
        if tuple(head_shape) != tuple(shape):
            raise CaseError(f"{label}: the map has shape {tuple(head_shape)}, the picture is {shape[0]} rows x {shape[1]} columns")
        try:
            arr = np.load(path, allow_pickle=False)
        except (ValueError, OSError, EOFError) as exc:
            raise CaseError(f"{label}: not a readable .npy array ({exc})") from None
        if arr.dtype.kind not in "fiu" or arr.dtype.kind == "b":
            raise CaseError(f"{label}: the map must hold real numbers, not {arr.dtype}")
        values = np.ascontiguousarray(arr, dtype=np.float64)
    else:
        from relaxtui.case import picture

        header = picture.read_header(path, label)
        if header.color_type != 0 or header.bit_depth != 16:
            raise CaseError(f"{label}: a map picture must be a 16-bit grey PNG (this one has bit depth {header.bit_depth}, "
                            f"colour type {header.color_type})")
        try:
            from PIL import Image

            with Image.open(path) as im:
                raw = np.array(im)
        except Exception as exc:  # Pillow raises many kinds for a broken file
            raise CaseError(f"{label}: cannot decode the map picture ({exc})") from None
        lo, hi = value_range
        values = lo + (hi - lo) * (raw.astype(np.float64) / PNG_FULL)
    if values.shape != tuple(shape):
        raise CaseError(f"{label}: the map has shape {values.shape}, the picture is {shape[0]} rows x {shape[1]} columns")
    return values


def check_map(values: np.ndarray, cells: np.ndarray, key: str, label: str) -> tuple[float, float]:
    """Refuse NaN/infinite values (and non-positive conductivities) on the region's cells; return their range."""
    v = values[cells]
    bad = ~np.isfinite(v) if key == "source" else ~(v > 0.0) | ~np.isfinite(v)
    if bad.any():
        rr, cc = np.nonzero(cells)
        k = int(np.flatnonzero(bad)[0])
        what = "finite" if key == "source" else "finite and > 0"
        raise CaseError(f"{label}: value {float(v[k])!r} at row {int(rr[k])}, column {int(cc[k])} (a cell of the region) must be {what}")
    if v.size == 0:
        return math.nan, math.nan
    return float(v.min()), float(v.max())


# ---------------------------------------------------------------------------
# Checks on a whole case (build_case runs them: cases from arrays too)


def check_case_extras(regions, codes, contacts, probes, geometry, maps, cell_size, depth_given, label):
    """Validate the v1.1 parts of a case; returns (contacts, probes, maps) as tuples."""
    if geometry not in GEOMETRIES:
        raise CaseError(f"{label}: geometry must be \"planar\" or \"axisymmetric\", got {geometry!r}")
    if geometry == "axisymmetric" and depth_given:
        raise CaseError(f"{label}: key 'depth' does not apply to an axisymmetric case (flows are totals around the axis)")
    index = {r.name: i for i, r in enumerate(regions)}
    seen = {}
    out_contacts = []
    for c in contacts:
        where = f"{label}:{c.line}" if c.line else label
        for n in (c.a, c.b):
            if n not in index:
                raise CaseError(f"{where}: contact: key 'between': no region is named {n!r}")
            if regions[index[n]].kind not in ("interior", "fixed"):
                raise CaseError(f"{where}: contact: key 'between': region {n!r} is {regions[index[n]].kind}; "
                                "a contact joins interior or fixed regions")
        if regions[index[c.a]].kind == "fixed" and regions[index[c.b]].kind == "fixed":
            raise CaseError(f"{where}: contact: key 'between': both regions are fixed; faces between fixed cells are not solved")
        if not (isinstance(c.resistance, (int, float)) and math.isfinite(c.resistance) and c.resistance > 0):
            raise CaseError(f"{where}: contact: key 'resistance' must be a finite number > 0, got {c.resistance!r}")
        pair = frozenset((c.a, c.b))
        if pair in seen:
            raise CaseError(f"{where}: contact: key 'between': {c.a!r} and {c.b!r} already have a contact (line {seen[pair]})")
        seen[pair] = c.line
        out_contacts.append(c)
    rows, cols = codes.shape
    kinds = np.array([r.kind in ("interior", "fixed") for r in regions])
    for p in probes:
        where = f"{label}:{p.line}" if p.line else label
        if not (math.isfinite(p.x) and math.isfinite(p.y)):
            raise CaseError(f"{where}: probe {p.name!r}: x and y must be finite")
        col = math.floor(p.x / cell_size)
        row = rows - 1 - math.floor(p.y / cell_size)
        if not (0 <= p.x <= cols * cell_size and 0 <= p.y <= rows * cell_size):
            raise CaseError(f"{where}: probe {p.name!r}: point (x {p.x:g} m, y {p.y:g} m) lies outside the picture "
                            f"({cols * cell_size:g} m wide, {rows * cell_size:g} m high)")
        col, row = min(col, cols - 1), max(row, 0)
        if not kinds[codes[row, col]]:
            raise CaseError(f"{where}: probe {p.name!r}: point (x {p.x:g} m, y {p.y:g} m) lies outside the domain "
                            f"(cell row {row}, column {col} is {regions[codes[row, col]].kind})")
    out_maps = []
    for m in maps:
        where = f"{label}:{m.line}" if m.line else label
        if m.region not in index or regions[index[m.region]].kind != "interior":
            raise CaseError(f"{where}: a {m.key} map belongs to an interior region; {m.region!r} is not one")
        if m.key not in ("conductivity", "source"):
            raise CaseError(f"{where}: a map's key must be conductivity or source, got {m.key!r}")
        values = np.asarray(m.values, dtype=np.float64)
        if values.shape != (rows, cols):
            raise CaseError(f"{where}: {m.file}: the map has shape {values.shape}, the picture is {rows} x {cols}")
        lo, hi = check_map(values, codes == index[m.region], m.key, f"{where}: region {m.region!r}: {m.key}_map {m.file!r}")
        out_maps.append(CoefficientMap(region=m.region, key=m.key, file=m.file, values=values, low=lo, high=hi, line=m.line))
    return tuple(out_contacts), tuple(probes), tuple(out_maps)


# ---------------------------------------------------------------------------
# Per-cell coefficients (for flux fields, exports and the UI)


def cell_coefficients(case) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(kx, ky, s) per cell, (rows, cols) float64: an interior cell's conductivity in x and y and its
    source, from its region or the region's maps; NaN on every other cell."""
    codes = case.codes
    n = len(case.regions)
    kx = np.full(n, np.nan)
    ky = np.full(n, np.nan)
    s = np.full(n, np.nan)
    index = {}
    for i, r in enumerate(case.regions):
        index[r.name] = i
        if r.kind == "interior":
            kx[i] = 1.0 if r.conductivity is None else float(r.conductivity)
            ky[i] = kx[i] if getattr(r, "conductivity_y", None) is None else float(r.conductivity_y)
            s[i] = float(r.source)
    kx, ky, s = kx[codes], ky[codes], s[codes]
    for m in getattr(case, "maps", ()):
        cells = codes == index[m.region]
        if m.key == "conductivity":
            kx[cells] = m.values[cells]
            ky[cells] = m.values[cells]
        else:
            s[cells] = m.values[cells]
    return kx, ky, s
