"""The report of a run: the contract's keys plus the engineering numbers.

Flows are positive into the domain and scaled by the case's depth; the
imbalance is |sum of flows + source total| / (sum of |flows| + |source total|)
(see the case-format contract). Non-finite numbers (a diverged run) are
reported as ``null`` so the JSON stays valid.
"""

from __future__ import annotations

import math

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
    return {"row": int(row), "col": int(col), "x": (col + 0.5) * h, "y": (rows - row - 0.5) * h}


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
    summary = getattr(op, "field_summary", None)
    if summary is not None:  # an operator split across MPI ranks computes them by strips
        ext, peak = summary(u)
    else:
        from relaxtui.output.flux import peak_flux

        ext, peak = extremes(case, field), peak_flux(field, case)
    report.update({k: (_f(v) if k in ("min", "max") else v) for k, v in ext.items()})
    report["flux_max"] = {k: (_f(v) if isinstance(v, float) else v) for k, v in peak.items()}
    if run.stepper_info:
        report["method_info"] = run.stepper_info
    report["caution"] = CAUTION
    return report
