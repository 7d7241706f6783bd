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


def cell_position(case, row: int, col: int) -> dict:
    """Row/column and the cell centre in metres (origin bottom-left, y up)."""
    rows = case.shape[0]
    h = case.cell_size
    return {"row": int(row), "col": int(col), "x": _f((col + 0.5) * h), "y": _f((rows - row - 0.5) * h)}


def extremes(case, field: np.ndarray) -> dict:
    """min and max over interior and fixed cells with their positions."""
    # the exported field is NaN outside the domain already; only a diverged run's
    # infinities need masking (a full copy is 8 B/cell at the solve's peak)
    masked = np.where(np.isinf(field), np.nan, field) if np.isinf(field).any() else field
    if np.isnan(masked).all():
        return {"min": None, "max": None, "min_at": None, "max_at": None}
    i_min = int(np.nanargmin(masked))
    i_max = int(np.nanargmax(masked))
    cols = field.shape[1]
    return {
        "min": float(masked.flat[i_min]),
        "max": float(masked.flat[i_max]),
        "min_at": cell_position(case, i_min // cols, i_min % cols),
        "max_at": cell_position(case, i_max // cols, i_max % cols),
    }


def build_report(run, field: np.ndarray) -> dict:
    """The report of a finished :class:`relaxtui.solver.driver.Run` whose exported field is ``field``."""
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
    report.update({k: (_f(v) if k in ("min", "max") else v) for k, v in extremes(case, field).items()})
    from relaxtui.output.flux import peak_flux

    report["flux_max"] = {k: (_f(v) if isinstance(v, float) else v) for k, v in peak_flux(field, case).items()}
    if case.mask_path is not None and case.path is not None:
        from relaxtui.case.domain import mask_outside_folder

        report["mask"] = os.path.realpath(case.mask_path)  # resolved: a shared picture elsewhere is visible
        report["mask_outside_case_folder"] = mask_outside_folder(case) is not None
    if run.stepper_info:
        report["method_info"] = run.stepper_info
    report["caution"] = CAUTION
    return report


def stamp_outputs(report: dict, pending, paths: dict) -> dict:
    """Give ``report`` a run id and, under ``outputs``, the path and SHA-256 of each file of its set.

    ``pending`` holds (temporary file, target) pairs of an
    :class:`relaxtui.output.atomic.OutputSet` (the checksums are of the
    temporary files, which become the targets unchanged); ``paths`` maps each
    output's role ("field", "history", ...) to its path or None.
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
            listed[role] = {"path": str(path), "sha256": file_sha256(tmp)}
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
