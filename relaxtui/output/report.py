"""The report of a run: the contract's keys plus the engineering numbers.

Flows are positive into the domain and scaled by the case's depth; the
imbalance is |sum of flows + source total| / (sum of |flows| + |source total|)
(see the case-format contract). Non-finite numbers (a diverged run) are
reported as ``null`` so the JSON stays valid.
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path

import numpy as np

CAUTION = ("Results are a numerical model of the case as drawn, not a design approval: check them against "
           "measurements and defer to local codes and licensed engineering practice, above all where heat "
           "or voltage can hurt people.")


def _f(x):
    """A JSON-safe float: None for NaN or infinity."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def extremes_and_peak(case, low, high, peak) -> tuple[dict, dict]:
    """The report's extremes and peak-flux entries from the lowest and highest cell, (value, row,
    col) each, and the peak flux, (value, qx, qy, row, col); ``None`` where the field has none."""
    if low is None:
        ext = {"min": None, "max": None, "min_at": None, "max_at": None}
    else:
        ext = {"min": low[0], "max": high[0], "min_at": cell_position(case, low[1], low[2]),
               "max_at": cell_position(case, high[1], high[2])}
    if peak is None:
        flux = {"value": 0.0, "qx": 0.0, "qy": 0.0, "row": None, "col": None, "x": None, "y": None}
    else:
        value, qx, qy, row, col = peak
        at = cell_position(case, row, col)
        flux = {"value": value, "qx": qx, "qy": qy, "row": row, "col": col, "x": at["x"], "y": at["y"]}
    return ext, flux


def cell_position(case, row: int, col: int) -> dict:
    """Row/column and the cell centre in metres (origin bottom-left, y up)."""
    rows = case.shape[0]
    h = case.cell_size
    return {"row": int(row), "col": int(col), "x": _f((col + 0.5) * h), "y": _f((rows - row - 0.5) * h)}


STRIP_CELLS = 1 << 16  # the report's per-cell work runs in row strips of about this many cells


def _strips(rows: int, cols: int):
    step = max(1, STRIP_CELLS // max(cols, 1))
    for a in range(0, rows, step):
        yield a, min(rows, a + step)


def extremes(case, field: np.ndarray) -> dict:
    """min and max over interior and fixed cells with their positions (the first in row-major order on a tie).

    The exported field is NaN outside the domain already; a diverged run's
    infinities are skipped too. Row strips keep the temporaries small (a
    whole-field copy would be 8 B/cell at the solve's memory peak).
    """
    rows, cols = field.shape
    best = {"min": None, "max": None}
    at = {"min": None, "max": None}
    for a, b in _strips(rows, cols):
        part = field[a:b]
        finite = np.isfinite(part)
        if not finite.any():
            continue
        for key, pick, fill in (("min", np.argmin, np.inf), ("max", np.argmax, -np.inf)):
            i = int(pick(np.where(finite, part, fill)))
            v = float(part.flat[i])
            if best[key] is None or (v < best[key] if key == "min" else v > best[key]):
                best[key] = v
                at[key] = (a + i // cols, i % cols)
    if best["min"] is None:
        return {"min": None, "max": None, "min_at": None, "max_at": None}
    return {
        "min": best["min"],
        "max": best["max"],
        "min_at": cell_position(case, *at["min"]),
        "max_at": cell_position(case, *at["max"]),
    }


def peak_flux_in_strips(field: np.ndarray, case) -> dict:
    """relaxtui.output.flux.peak_flux, computed over row strips with one row of overlap on each side.

    Differences and a fixed cell's inherited conductivity reach one cell, so
    the strip's inner rows get exactly the numbers of the whole-field
    computation; the first largest cell in row-major order wins, as there.
    """
    from dataclasses import replace

    rows, cols = field.shape
    best = None
    for a, b in _strips(rows, cols):
        lo, hi = max(0, a - 1), min(rows, b + 1)
        sub = replace(case, codes=case.codes[lo:hi])
        part = np.array(field[lo:hi], dtype=np.float64)
        # rows of the overlap take no part in the search (their own strip has them)
        keep = np.zeros(part.shape[0], dtype=bool)
        keep[a - lo : b - lo] = True
        found = _peak_inner(part, sub, keep)
        if found is None:
            continue
        value, qx, qy, r, c = found
        if best is None or value > best[0]:
            best = (value, qx, qy, lo + r, c)
    if best is None:
        return {"value": 0.0, "qx": 0.0, "qy": 0.0, "row": None, "col": None, "x": None, "y": None}
    value, qx, qy, row, col = best
    pos = cell_position(case, row, col)
    return {"value": value, "qx": qx, "qy": qy, "row": row, "col": col, "x": pos["x"], "y": pos["y"]}


def _peak_inner(part, sub, keep):
    """(|q|, qx, qy, row, col) of the first largest finite |q| among the rows ``keep`` of a strip, or None."""
    from relaxtui.output.flux import flux

    qx, qy = flux(part, sub)
    mag = np.hypot(qx, qy)
    mag[~keep] = np.nan
    finite = np.isfinite(mag)
    if not finite.any():
        return None
    mag[~finite] = -1.0
    flat = int(np.argmax(mag))
    r, c = divmod(flat, part.shape[1])
    return float(mag[r, c]), float(qx[r, c]), float(qy[r, c]), r, c


def build_report(run, field) -> dict:
    """The report of a finished :class:`relaxtui.solver.driver.Run` whose exported field is ``field``
    (an array, or a :class:`relaxtui.solver.outcome.FieldExport` read in row strips and cells)."""
    case = run.case
    op = run.operator
    u = run.field
    d = run.rule.last
    flows, source_total, imbalance = op.flows(u)
    report = {
        "case": str(case.path) if case.path is not None else case.name,
        "title": case.title,
        "quantity": case.quantity,
        "unit": case.unit,
        "grid": [int(case.shape[0]), int(case.shape[1])],
        "cell_size": case.cell_size,
        "depth": case.depth,
        "unknowns": int(op.unknowns),
        "snapped": int(case.snapped),
        "method": run.method,
        "omega": float(run.omega),
        "omega_note": run.omega_note,
        "omega_changes": [{"sweep": s, "omega": w, "note": note} for s, w, note in run.omega_changes],
        "precision": getattr(run, "precision", "double"),  # the working field's storage used: "double" or "single"
        "precision_note": getattr(run, "precision_note", ""),
        "tolerance": run.tolerance,
        "status": run.status,
        "message": run.message,
        "sweeps": int(run.rule.sweeps),
        "seconds": round(run.seconds, 6),
        "prepare_seconds": round(run.prepare_seconds, 6),
        "estimated_error": _f(d.estimated_error),
        "residual": _f(op.residual(u)),
        "convergence_factor": _f(d.factor),
        "flows": {name: _f(v) for name, v in flows.items()},
        "source_total": _f(source_total),
        "imbalance": _f(imbalance),
    }
    # from the working array in one pass (an operator split across MPI ranks: by strips on the ranks);
    # else (per-cell flux coefficients) from the exported field, in row strips
    summary = getattr(op, "field_summary", None)
    found = summary(u) if summary is not None else None
    if found is not None:
        ext, peak = found
    else:
        ext, peak = extremes(case, field), peak_flux_in_strips(field, case)
    report.update({k: (_f(v) if k in ("min", "max") else v) for k, v in ext.items()})
    report["flux_max"] = {k: (_f(v) if isinstance(v, float) else v) for k, v in peak.items()}
    if case.mask_path is not None and case.path is not None:
        from relaxtui.case.domain import mask_outside_folder

        report["mask"] = os.path.realpath(case.mask_path)  # resolved: a shared picture elsewhere is visible
        report["mask_outside_case_folder"] = mask_outside_folder(case) is not None
    from relaxtui.output.probes import ProbeSet  # case format v1.1: the value at each [[probe]]

    report["probes"] = {name: _f(v) for name, v in ProbeSet(case).as_dict(field).items()}
    report["geometry"] = getattr(case, "geometry", "planar")
    if report["geometry"] == "axisymmetric":
        report["depth"] = None  # flows are totals around the axis
    if run.stepper_info:
        report["method_info"] = run.stepper_info
    report["caution"] = CAUTION
    return report


def stamp_outputs(report: dict, pending, paths: dict, digests: dict | None = None) -> dict:
    """Give ``report`` a run id and, under ``outputs``, the path and SHA-256 of each file of its set.

    ``pending`` holds (temporary file, target) pairs of an
    :class:`relaxtui.output.atomic.OutputSet` (the checksums are of the
    temporary files, which become the targets unchanged); ``paths`` maps each
    output's role ("field", "history", ...) to its path or None; ``digests`` maps temporary files to
    the SHA-256 their writer computed as it wrote them (those files are not read again).
    """
    import uuid

    from relaxtui.output.atomic import file_sha256

    report.setdefault("run_id", uuid.uuid4().hex)
    by_target = {os.path.realpath(target): tmp for tmp, target in pending}
    listed = {}
    for role, path in paths.items():
        if path is None:
            continue
        tmp = by_target.get(os.path.realpath(path))
        if tmp is not None:
            known = (digests or {}).get(tmp)
            listed[role] = {"path": str(path), "sha256": known if known is not None else file_sha256(tmp)}
    report["outputs"] = listed
    return report


def check_against_reports(path, limit: int = 200) -> list[str]:
    """Warnings for ``path`` from the reports beside it: a report that lists this file with another
    SHA-256 (the set it belongs to was not written completely, or the file changed since)."""
    from relaxtui.output.atomic import file_sha256

    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    try:
        real = os.path.realpath(target)
        candidates = sorted(p for p in folder.iterdir() if p.suffix == ".json")[:limit]
    except OSError:
        return []
    digest = None
    found = []
    for candidate in candidates:
        try:
            if not candidate.is_file() or candidate.stat().st_size > (4 << 20):
                continue
            doc = json.loads(candidate.read_text(encoding="utf-8"))
        except (OSError, ValueError, UnicodeDecodeError):
            continue
        outputs = doc.get("outputs") if isinstance(doc, dict) else None
        if not isinstance(outputs, dict):
            continue
        for role, entry in outputs.items():
            if not isinstance(entry, dict) or not isinstance(entry.get("path"), str):
                continue
            listed = Path(entry["path"])
            # the path as given when it was written (relative to that run's folder), or the file of
            # that name beside the report
            same = os.path.realpath(listed) == real or (
                listed.name == target.name and os.path.realpath(candidate.parent) == os.path.dirname(real))
            if not same:
                continue
            if digest is None:
                digest = file_sha256(target)
            if entry.get("sha256") != digest:
                found.append(f"{_printable(str(candidate))} (run {_printable(str(doc.get('run_id')))}) describes a "
                             f"different {role} than {_printable(str(target))}: that output set is incomplete or mixed")
    return found


def _printable(text: str) -> str:
    from relaxtui.errors import printable

    return printable(text)
